"""Benchmark: the whole study run (stage, weigh, estimates, book) against DuckDB's typed load of the same file.

Usage: python bench/bench_study_run.py [--rows 1000000] [--waves 1] [--variance taylor]
                                       [--memory-budget 2GB] [--folder DIR] [--banner [--versus-plain]]

Generates a seeded invented study (the staging benchmark's 60 columns and 56 codebook variables,
`bench_staging.write_study`, one file per wave with its own seed), a 3-margin rake step (region,
q00, q01) and the chosen variance method (`taylor`, or a replicate method such as the stratified
jackknife: with 10 strata of 40 areas it makes 400 replicates, each re-raked). Then, each in a
fresh child process so its peak resident memory (ru_maxrss, DuckDB included) is its own:

  duckdb load   CREATE TABLE AS SELECT * FROM read_csv(...) of every wave file (typed by DuckDB's
                sniffer): the reference every other figure is divided by
  stage         `stage_wave` of every wave
  weigh         `fit_wave` + `store` of every wave (as `wavebook weigh`)
  estimates     the estimation part of `runner.weigh_and_estimate` (its own timing, the banner
                tables included with --banner; the process also weighs, so its peak RSS covers both)
  book          the cells export and the book, in the same process (peak RSS up to its end)
  run           `wavebook run --restage --quiet` as a command (everything, from the raw files)

With --banner --versus-plain, the same study without its `[tables]` section (a second spec beside
it, reading the same wave files) is also run as a command, and the banner run is divided by it:
issue 12's measure (at most 3x, peak RSS at most 4 GB).

Prints figures and ratios only; nothing is asserted (the targets of issue 10 are printed beside
them). Timings depend on the machine's load: say so when quoting them.
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_staging import wave_frame, write_study  # noqa: E402 -- the staging benchmark's generator, reused

RAKE_MARGINS = ("region", "q00", "q01")
TARGET_SHARES = {"region": [0.1] * 10, "q00": [0.3, 0.25, 0.2, 0.15, 0.1], "q01": [0.2] * 5}
POPULATION = 50_000_000  # invented population total of the rake targets
TARGETS = {  # issue 10
    "stage": "<= 1.5x the DuckDB load (1M x 60)",
    "run": "<= 6x the DuckDB load, peak RSS <= 3 GB (1M x 60, Taylor); a 400-replicate stratified jackknife "
    "<= 1.5x the Taylor run; 3 waves <= 3.2x one wave; 5M rows in one wave: peak RSS <= 6 GB",
}
BANNER_TARGET = "banner run <= 3x the same study's run without banner, peak RSS <= 4 GB (issue 12; 1M rows, " \
    "Taylor and the 400-replicate stratified jackknife)"


BANNER = ("q02", "q03", "q04", "q05", "aware")  # 4 single-choice breaks of 5 codes and 5 items: 25 columns


def write_run_study(folder: Path, rows: int, waves: int, *, variance: str, banner: bool = False) -> Path:
    """The staging benchmark's study with `waves` waves (seeds 20260301 + k), a rake step and [variance];
    with `banner`, a `[tables]` banner of `BANNER` (every other variable a stub, every test)."""
    import numpy as np
    import polars as pl

    spec_path = write_study(folder, rows, second_wave=False)
    (folder / "waves" / "wave3.csv").unlink()  # the staging benchmark's broken copy: not used here
    for k in range(2, waves + 1):
        wave_frame(rows, np.random.default_rng(20260301 + k)).write_csv(folder / "waves" / f"wave{k}.csv")
    rows_out = [
        {"variable": name, "category": str(code), "target": share * POPULATION}
        for name in RAKE_MARGINS
        for code, share in zip(range(1, 11) if name == "region" else range(1, 6), TARGET_SHARES[name], strict=True)
    ]
    pl.DataFrame(rows_out).write_csv(folder / "targets.csv")
    spec = spec_path.read_text(encoding="utf-8")
    head, _, rest = spec.partition("[waves.W1]")
    design = rest[rest.index("[design]"):]
    wave_tables = "".join(
        f'[waves.W{k}]\nlabel = "Wave {k}"\nfile = "waves/wave{k}.csv"\n' for k in range(1, waves + 1)
    )
    extra = (
        '[[weighting]]\nstep = "rake"\n'
        f"margins = [{', '.join(repr(m).replace(chr(39), chr(34)) for m in RAKE_MARGINS)}]\n"
        'targets = "targets.csv"\ntolerance = 1e-8\nmax_iterations = 200\n'
        f'[variance]\nmethod = "{variance}"\nlevel = 0.95\n'
    )
    if banner:
        extra += f"[tables]\nbanner = [{', '.join(chr(34) + b + chr(34) for b in BANNER)}]\nsignificance = 0.05\n"
    spec_path.write_text(head + wave_tables + design + extra, encoding="utf-8")
    return spec_path


def _peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux: KiB


def _duckdb_load(spec_path: str, results: multiprocessing.Queue) -> None:
    import duckdb

    folder = Path(spec_path).parent
    files = sorted((folder / "waves").glob("wave*.csv"))
    con = duckdb.connect(str(folder / "reference.duckdb"))
    start = time.perf_counter()
    for k, path in enumerate(files):
        con.execute(f"CREATE OR REPLACE TABLE wave{k} AS SELECT * FROM read_csv(?)", [str(path)])
    con.close()
    results.put({"duckdb load": (time.perf_counter() - start, _peak_mib())})


def _stage(spec_path: str, results: multiprocessing.Queue) -> None:
    from pipeline.staging.spec import load_spec
    from pipeline.staging.stage import stage_wave

    study = load_spec(spec_path)
    start = time.perf_counter()
    for wave in study.waves:
        stage_wave(study, wave.id, quiet=True)
    results.put({"stage": (time.perf_counter() - start, _peak_mib())})


def _weigh(spec_path: str, results: multiprocessing.Queue) -> None:
    """`fit_wave` + `store` of every staged wave, as `wavebook weigh` does."""
    from pipeline.staging.database import open_database
    from pipeline.staging.spec import load_spec
    from pipeline.weighting.store import fit_wave, store

    study = load_spec(spec_path)
    start = time.perf_counter()
    con = open_database(study)
    for wave in study.waves:
        recipe, report = fit_wave(study, wave.id, con=con)
        store(con, recipe, report)
    con.close()
    results.put({"weigh": (time.perf_counter() - start, _peak_mib())})


def _estimates_and_book(spec_path: str, memory_budget: str | None, results: multiprocessing.Queue) -> None:
    """Toplines, weighting and estimates (`runner.weigh_and_estimate`, banner tables included), then the
    export and the book."""
    from pipeline import runner
    from pipeline.book import render_book
    from pipeline.book import variance_lines, weighting_section
    from pipeline.staging.database import open_database
    from pipeline.staging.spec import load_spec
    from pipeline.tables import export_cells, unweighted_toplines, write_cells

    study = load_spec(spec_path)
    options = runner.variance_options(study)
    con = open_database(study, read_only=True)
    cells = unweighted_toplines(con, study)
    con.close()
    timings: dict[str, float] = {}
    from pipeline.memory import parse_size

    budget = {} if memory_budget is None else {"memory_budget": parse_size(memory_budget)}
    cells, reports, _, tables = runner.weigh_and_estimate(study, cells, options, quiet=True, timings=timings,
                                                          **budget)
    figures = {"estimates": (timings["estimates"], _peak_mib())}
    start = time.perf_counter()
    out = runner.default_book_path(study)
    export = export_cells(cells, tables)
    write_cells(export, out, study.path.stem)
    render_book(study, export, tests=tables.tests, out_path=out, weighting=weighting_section(study, reports),
                variance=variance_lines(options, study, calibrated=True), level=options.level)
    figures["book"] = (time.perf_counter() - start, _peak_mib())
    results.put(figures)


def _child(target: object, *args: object) -> dict[str, tuple[float, float]]:
    context = multiprocessing.get_context("spawn")
    results = context.Queue()
    process = context.Process(target=target, args=(*args, results))
    process.start()
    figures = results.get()
    process.join()
    return figures


def _run_command(spec_path: Path, memory_budget: str | None) -> tuple[float, float]:
    """`wavebook run --restage --quiet` in its own process: (seconds, peak RSS MiB from wait4)."""
    wavebook = Path(sys.executable).with_name("wavebook")
    command = [str(wavebook), "run", str(spec_path), "--restage", "--quiet"]
    if memory_budget is not None:
        command += ["--memory-budget", memory_budget]
    start = time.perf_counter()
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL)
    _, status, usage = os.wait4(process.pid, 0)
    seconds = time.perf_counter() - start
    if status != 0:
        raise SystemExit(f"wavebook run failed with status {status}")
    return seconds, usage.ru_maxrss / 1024


def measure(
    spec_path: Path, *, memory_budget: str | None = None, run_only: bool = False
) -> dict[str, tuple[float, float]]:
    """Every figure of the module docstring: step -> (seconds, peak RSS MiB); with `run_only`, the
    DuckDB load and the whole run only (for the large cases, where each step costs minutes)."""
    figures = _child(_duckdb_load, str(spec_path))
    if not run_only:
        figures |= _child(_stage, str(spec_path))
        figures |= _child(_weigh, str(spec_path))
        figures |= _child(_estimates_and_book, str(spec_path), memory_budget)
    figures["run"] = _run_command(spec_path, memory_budget)
    return figures


def report(figures: dict[str, tuple[float, float]]) -> str:
    """The figures as a table, each time also as a ratio to the DuckDB typed load."""
    reference = figures["duckdb load"][0]
    lines = [f"{'step':12s} {'seconds':>9s} {'x duckdb':>9s} {'peak RSS MiB':>13s}"]
    for step, (seconds, peak) in figures.items():
        lines.append(f"{step:12s} {seconds:9.2f} {seconds / reference:9.2f} {peak:13,.0f}")
    lines += [f"target {k}: {v}" for k, v in TARGETS.items()]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--waves", type=int, default=1)
    parser.add_argument("--variance", default="taylor", help="taylor (default) or a replicate method, e.g. stratified-jackknife")
    parser.add_argument("--memory-budget", help="passed to `wavebook run --memory-budget` (default: its own)")
    parser.add_argument("--folder", type=Path, help="where to write the study (default: a temp folder)")
    parser.add_argument("--run-only", action="store_true", help="time the DuckDB load and the whole run only")
    parser.add_argument("--banner", action="store_true",
                        help=f"add a [tables] banner of {', '.join(BANNER)} (25 columns, every test) to the study")
    parser.add_argument("--versus-plain", action="store_true",
                        help="with --banner: also run the same study without [tables] and print the ratio")
    args = parser.parse_args(argv)
    if args.versus_plain and not args.banner:
        parser.error("--versus-plain needs --banner")
    with tempfile.TemporaryDirectory(prefix="wavebook-run-bench-") as tmp:
        folder = args.folder or Path(tmp)
        start = time.perf_counter()
        spec_path = write_run_study(folder, args.rows, args.waves, variance=args.variance, banner=args.banner)
        print(f"generated {args.waves} wave(s) of {args.rows:,} rows x 60 columns in {time.perf_counter() - start:.1f} s;"
              f" variance {args.variance}"
              + (f"; banner {', '.join(BANNER)}" if args.banner else ""))
        figures = measure(spec_path, memory_budget=args.memory_budget, run_only=args.run_only)
        if args.versus_plain:
            figures["run plain"] = _run_command(plain_spec(spec_path), args.memory_budget)
        print(report(figures))
        if args.versus_plain:
            (banner_s, banner_rss), (plain_s, _) = figures["run"], figures["run plain"]
            print(f"banner run / run without banner: {banner_s / plain_s:.2f}x; banner run peak RSS "
                  f"{banner_rss / 1024:.2f} GB\ntarget: {BANNER_TARGET}")
    return 0


def plain_spec(spec_path: Path) -> Path:
    """A copy of the study spec without its `[tables]` section (the last section `write_run_study`
    writes), beside it: same waves and design, its own database and results."""
    text = spec_path.read_text(encoding="utf-8")
    plain = spec_path.with_name(f"{spec_path.stem}_plain.toml")
    plain.write_text(text[: text.index("[tables]")], encoding="utf-8")
    return plain


if __name__ == "__main__":
    sys.exit(main())
