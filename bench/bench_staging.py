"""Benchmark: stage a seeded 1,000,000-row x 60-column CSV wave (invented data) and report time and memory.

Usage: python bench/bench_staging.py [--rows 1000000] [--folder DIR]

Generates the wave and a matching spec in a temp folder (or DIR), then stages it as W1 twice
(first load, then an atomic replace), stages W2, a second seeded draw of the same questions (a
wave needs its own file; the drift checks compare 1M rows with 1M staged rows), checks W2, and
checks W3, a copy of W1 with about 1% bad values in 11 columns (the error path: counts and example
ids), each in a fresh child process so that its peak resident memory (ru_maxrss) is its own.
DuckDB runs inside the process, so its memory is part of that figure. DuckDB's own typed load of
the W1 file (`CREATE TABLE AS SELECT * FROM read_csv(...)` into a database file) is timed first,
the same way, and every time is also printed as a ratio to it. Prints figures only; nothing is
asserted.
"""

from __future__ import annotations

import argparse
import multiprocessing
import resource
import sys
import tempfile
import time
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import numpy as np
    import polars as pl

N_SINGLE = 30  # single-choice columns, codes 1..5
N_SCALE = 10  # 0-10 scales with 99 = don't know
N_ITEMS = 10  # two multi-response sets of 5 items
N_NUMERIC = 6  # numeric columns with bounds
# plus resp_id, region, area, p_select = 60 columns


def wave_frame(rows: int, rng: np.random.Generator) -> pl.DataFrame:
    """One wave's 60 columns of seeded invented answers, drawn with `rng`."""
    import numpy as np
    import polars as pl

    region = rng.integers(1, 11, rows)
    columns: dict[str, object] = {
        "resp_id": [f"R{i:07d}" for i in range(rows)],
        "region": region,
        "area": rng.integers(1, 41, rows),
        "p_select": np.round(rng.uniform(0.001, 0.01, rows), 6),
    }
    for j in range(N_SINGLE):
        columns[f"q{j:02d}"] = rng.integers(1, 6, rows)
    for j in range(N_SCALE):
        scale = rng.integers(0, 11, rows)
        columns[f"sat{j:02d}"] = np.where(rng.random(rows) < 0.03, 99, scale)
    for j in range(N_ITEMS):
        columns[f"{'aware' if j < 5 else 'used'}_b{j % 5}"] = (rng.random(rows) < 0.4).astype(np.int8)
    for j in range(N_NUMERIC):
        columns[f"spend{j}"] = np.round(rng.lognormal(3, 1, rows), 2)
    return pl.DataFrame(columns).with_columns(
        pl.when(pl.int_range(pl.len()) % 17 == 0).then(None).otherwise(pl.col("spend0")).alias("spend0")
    )


def write_study(folder: Path, rows: int, *, seed: int = 20260301, second_wave: bool = True) -> Path:
    """Write waves/wave1.csv, waves/wave2.csv (unless not `second_wave`: another seeded draw),
    waves/wave3.csv (seeded invented data) and study.toml into `folder`; return the spec path."""
    import numpy as np
    import polars as pl

    rng = np.random.default_rng(seed)
    frame = wave_frame(rows, rng)
    (folder / "waves").mkdir(parents=True, exist_ok=True)
    frame.write_csv(folder / "waves" / "wave1.csv")
    if second_wave:
        wave_frame(rows, np.random.default_rng(seed + 1)).write_csv(folder / "waves" / "wave2.csv")
    # W3: the same rows with about 1% bad values in 10 coded columns and a numeric one (errors)
    broken = pl.Series(rng.random(rows) < 0.01)
    frame.with_columns(
        *(pl.when(broken).then(pl.lit(7)).otherwise(pl.col(f"q{j:02d}")).alias(f"q{j:02d}") for j in range(10)),
        pl.when(broken).then(pl.lit(-1.0)).otherwise(pl.col("spend1")).alias("spend1"),
    ).write_csv(folder / "waves" / "wave3.csv")
    spec = [
        'title = "Staging benchmark (invented data)"',
        'respondent_id = "resp_id"',
        "[waves.W1]",
        'label = "Wave 1"',
        'file = "waves/wave1.csv"',
        "[waves.W2]",
        'label = "Wave 2 (another draw: exercises the drift checks against W1)"',
        'file = "waves/wave2.csv"',
        "[waves.W3]",
        'label = "Wave 3 (about 1% bad codes in 10 columns: the error path)"',
        'file = "waves/wave3.csv"',
        "[design]",
        'strata = "region"',
        'psu = "area"',
        'selection_probability = "p_select"',
        "population = { " + ", ".join(f"{h} = 400" for h in range(1, 11)) + " }",
        "[variables.region]",
        'label = "Region"',
        'type = "single"',
        "values = { " + ", ".join(f'{h} = "Region {h}"' for h in range(1, 11)) + " }",
    ]
    for j in range(N_SINGLE):
        spec += [f"[variables.q{j:02d}]", f'label = "Question {j}"', 'type = "single"']
        spec += ["values = { " + ", ".join(f'{c} = "Answer {c}"' for c in range(1, 6)) + " }"]
    for j in range(N_SCALE):
        spec += [f"[variables.sat{j:02d}]", f'label = "Rating {j}"', 'type = "rating"']
        spec += ['values = { 0 = "0 Poor", 10 = "10 Excellent", 99 = "Don\'t know" }', "exclude_from_statistics = [99]"]
    for name in ("aware", "used"):
        spec += [f"[variables.{name}]", f'label = "{name}"', 'type = "multi"']
        spec += ["items = { " + ", ".join(f'{name}_b{k} = "Brand {k}"' for k in range(5)) + " }"]
    for j in range(N_NUMERIC):
        spec += [f"[variables.spend{j}]", f'label = "Spend {j}"', 'type = "numeric"', "minimum = 0", "maximum = 1000000"]
    path = folder / "study.toml"
    path.write_text("\n".join(spec) + "\n", encoding="utf-8")
    return path


def _measure(task: str, wave: str, spec_path: str, results: multiprocessing.Queue) -> None:
    """Child process: run one task on one wave, report (seconds, peak RSS in MiB, detail)."""
    from pipeline.staging.spec import load_spec
    from pipeline.staging.stage import check_wave, stage_wave

    study = load_spec(spec_path)
    start = time.perf_counter()
    if task == "check":
        problems = check_wave(study, wave)
        detail = f"{sum(p.severity == 'error' for p in problems)} errors, {len(problems)} problems"
    else:
        detail = stage_wave(study, wave, quiet=True).summary()
    seconds = time.perf_counter() - start
    peak_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux: KiB
    results.put((seconds, peak_mib, detail))


def _reference(task: str, wave: str, spec_path: str, results: multiprocessing.Queue) -> None:
    """Child process: DuckDB's own typed load of W1's file into a database file (the reference)."""
    import duckdb

    folder = Path(spec_path).parent
    database = folder / "reference.duckdb"
    database.unlink(missing_ok=True)
    con = duckdb.connect(str(database))
    start = time.perf_counter()
    con.execute("CREATE TABLE wave AS SELECT * FROM read_csv(?)", [str(folder / "waves" / "wave1.csv")])
    con.close()
    seconds = time.perf_counter() - start
    database.unlink()
    results.put((seconds, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, "typed by DuckDB's sniffer"))


def _write_study_child(folder: str, rows: int, results: multiprocessing.Queue) -> None:
    results.put(str(write_study(Path(folder), rows)))


def _generate(folder: Path, rows: int) -> Path:
    """`write_study` in a child process: a process's peak RSS survives into the children it starts
    (Linux keeps ru_maxrss across exec), so the parent must never hold the generated frames."""
    context = multiprocessing.get_context("spawn")
    results = context.Queue()
    process = context.Process(target=_write_study_child, args=(str(folder), rows, results))
    process.start()
    spec_path = Path(results.get())
    process.join()
    return spec_path


def run_child(task: str, wave: str, spec_path: Path) -> tuple[float, float, str]:
    """Run `task` ("stage", "check" or "reference") on `wave` in a fresh process; return its figures."""
    context = multiprocessing.get_context("spawn")
    results = context.Queue()
    target = _reference if task == "reference" else _measure
    process = context.Process(target=target, args=(task, wave, str(spec_path), results))
    process.start()
    figures = results.get()
    process.join()
    return figures


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--folder", type=Path, help="where to write the data (default: a temp folder)")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="wavebook-bench-") as tmp:
        folder = args.folder or Path(tmp)
        start = time.perf_counter()
        spec_path = _generate(folder, args.rows)
        size_mib = (folder / "waves" / "wave1.csv").stat().st_size / 2**20
        print(f"generated {args.rows:,} rows x 60 columns ({size_mib:,.0f} MiB CSV) in {time.perf_counter() - start:.1f} s")
        steps = (
            ("reference", "W1", "duckdb load W1"),
            ("stage", "W1", "stage W1"),
            ("stage", "W1", "restage W1"),
            ("stage", "W2", "stage W2 + drift"),
            ("check", "W2", "check W2 only"),
            ("check", "W3", "check W3 (errors)"),
        )
        reference = None
        for task, wave, label in steps:
            seconds, peak, detail = run_child(task, wave, spec_path)
            reference = reference or seconds
            print(f"{label:17s} {seconds:6.2f} s {seconds / reference:5.2f}x   peak RSS {peak:7,.0f} MiB   "
                  f"{args.rows / seconds:>10,.0f} rows/s   {detail}")
        db = spec_path.with_suffix(".duckdb")
        print(f"study database: {db.stat().st_size / 2**20:,.0f} MiB")
        print("peak RSS includes DuckDB (in-process); x = ratio to DuckDB's typed load (target: stage <= 1.5x)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
