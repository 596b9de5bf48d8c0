"""Benchmark: render a large result book with banner tables and report render time and page sizes.

Usage: python bench/bench_book.py [--tables 500] [--waves 3] [--columns 25]
                                  [--run-rows 1000000 | --run-seconds S] [--demo]

Builds an invented study of `--tables` single-choice variables (8 categories, a net and a "No
answer" row each) and its unified cells frame (`pipeline.book.source.CELL_COLUMNS`) for `--waves`
waves: the Total and a banner of `--columns` columns (5 breaks) in every wave, with letters,
lighter letters and change marks (aggregates made up from a seeded generator: no respondents are
involved, so this times the book alone). It renders the book with the default choice of form
(one file below 100 tables and 2 MB, else a folder) and as a folder, and prints the render times,
the number of pages and the largest page against the 2 MB target.

The render time is then put against a whole `wavebook run` of the 1,000,000-respondent
benchmark study (`bench_study_run.write_run_study`: 56 variables, Taylor, topline only, so the
share is conservative): `--run-rows N` generates that study and times `wavebook run --restage
--quiet` on it (one heavy job: run nothing else meanwhile), `--run-seconds S` takes a time
measured before. Target: the 500-table render at most 10% of the run. With --demo it also runs
the demo study end to end and prints the share of its run spent rendering. Prints figures only;
nothing is asserted.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

from pipeline.book import render_book
from pipeline.book.source import CELL_COLUMNS
from pipeline.staging.spec import Design, Study, Variable, Wave

sys.path.insert(0, str(Path(__file__).resolve().parent))

CATEGORIES = 8
BREAKS = 5
PAGE_TARGET = 2 * 1024 * 1024
SHARE_TARGET = 0.10


def _break_sizes(columns: int) -> list[int]:
    """Columns per break: `columns` - 1 (the Total) shared as evenly as possible over BREAKS breaks."""
    share, extra = divmod(max(columns - 1, BREAKS), BREAKS)
    return [share + (b < extra) for b in range(BREAKS)]


def _study(folder: Path, tables: int, waves: int, columns: int) -> Study:
    """The invented study: `tables` stubs and the break variables of the banner."""
    sizes = _break_sizes(columns)
    variables = {
        f"q{i:04d}": Variable(
            name=f"q{i:04d}", type="single", label=f"Invented question {i} about grocery habits",
            values={c: f"Answer {c}" for c in range(1, CATEGORIES + 1)},
        )
        for i in range(1, tables + 1)
    }
    for b in range(BREAKS):
        variables[f"break{b}"] = Variable(name=f"break{b}", type="single", label=f"Invented break {b + 1}",
                                          values={c: f"Group {c}" for c in range(1, sizes[b] + 1)})
    return Study(
        path=folder / "study.toml", title="Invented benchmark book", respondent_id="id",
        waves=tuple(Wave(f"W{w}", f"Wave {w}", folder / f"w{w}.csv") for w in range(1, waves + 1)),
        design=Design(kind="probability"), variables=variables,
    )


def synthetic(folder: Path, tables: int, waves: int, columns: int = 25, *, seed: int = 20261202) -> tuple[
        Study, pl.DataFrame]:
    """An invented study and its unified cells frame (estimates, intervals, marks made up)."""
    rng = np.random.default_rng(seed)
    study = _study(folder, tables, waves, columns)
    sizes = _break_sizes(columns)
    keys = ["total"] + [f"break{b}={c}" for b in range(BREAKS) for c in range(1, sizes[b] + 1)]
    letters = [""] + [chr(ord("A") + k) for k in range(len(keys) - 1)]
    breaks = [""] + [f"break{b}" for b in range(BREAKS) for _ in range(sizes[b])]
    labels = ["Total"] + [f"Group {c}" for b in range(BREAKS) for c in range(1, sizes[b] + 1)]
    starts = [0] + [1 + sum(sizes[:b]) for b in range(BREAKS) for _ in range(sizes[b])]  # first column of its break
    widths = [0] + [sizes[b] for b in range(BREAKS) for _ in range(sizes[b])]
    names = [f"q{i:04d}" for i in range(1, tables + 1)]
    rows = CATEGORIES + 2  # categories, a net, "No answer"
    t, w, k, r = np.meshgrid(np.arange(tables), np.arange(waves), np.arange(len(keys)), np.arange(1, rows + 1),
                             indexing="ij")
    t, w, k, r = (a.ravel() for a in (t, w, k, r))
    shares = rng.dirichlet(np.ones(CATEGORIES), size=(tables, waves, len(keys)))
    p = np.zeros(t.size)
    category = r <= CATEGORIES
    p[category] = shares[t[category], w[category], k[category], r[category] - 1]
    net = r == CATEGORIES + 1
    p[net] = shares[t[net], w[net], k[net], :2].sum(axis=1)
    base = np.where(k == 0, 1500, rng.integers(15, 400, size=t.size))
    se = np.sqrt(p * (1 - p) / base) * 1.2
    mark = rng.random((t.size, max(sizes)))
    sig = ["".join(letters[starts[kk] + j] for j in range(widths[kk]) if m[j] < 0.12 and starts[kk] + j != kk)
           for kk, m in zip(k.tolist(), mark, strict=True)]
    change = np.where(rng.random(t.size) < 0.05, np.where(rng.random(t.size) < 0.5, "up", "down"), "")
    change[w == 0] = ""
    flags = np.where(base < 20, "suppressed", np.where(base < 50, "low_base", ""))
    frame = pl.DataFrame({
        "wave": np.array([f"W{x + 1}" for x in range(waves)])[w],
        "table": np.array(names)[t], "row": r.astype(np.int32),
        "row_label": np.where(r <= CATEGORIES, np.char.add("Answer ", r.astype(str)),
                              np.where(net, "Top two", "No answer")),
        "row_kind": np.where(category, "category", np.where(net, "net", "missing")),
        "banner": np.where(k == 0, "total", "default"), "break_variable": np.array(breaks)[k],
        "column": np.array(keys)[k], "column_label": np.array(labels)[k], "letter": np.array(letters)[k],
        "statistic": "percent", "estimate": p, "se": se, "ci_low": np.clip(p - 1.96 * se, 0, 1),
        "ci_high": np.clip(p + 1.96 * se, 0, 1), "df": 40.0, "deff": 1.44, "base_unweighted": base,
        "base_weighted": base * 400.0, "base_effective": base / 1.44, "flags": flags, "sig_higher_than": sig,
        "sig_higher_than_lighter": "", "vs_total": "", "change_from_previous": 0.0, "se_change": se * 1.4,
        "change_mark": change, "note": None,
    }, schema_overrides={"note": pl.String}).with_columns(pl.col("table").alias("variable"))
    hidden = pl.col("flags") == "suppressed"
    frame = frame.with_columns(
        [pl.when(hidden).then(None).otherwise(pl.col(c)).alias(c) for c in ("estimate", "se", "ci_low", "ci_high")]
    )
    total = frame.filter(pl.col("banner") == "total")
    counts = total.with_columns(
        pl.lit("count").alias("statistic"), (pl.col("estimate") * pl.col("base_unweighted")).round().alias("estimate"),
        *[pl.lit(None, dtype=pl.Float64).alias(c) for c in ("se", "ci_low", "ci_high", "df", "deff")],
    )
    bases = total.filter(pl.col("row") == 1).with_columns(
        pl.lit(0, dtype=pl.Int32).alias("row"), pl.lit("Base: all giving an answer").alias("row_label"),
        pl.lit("base").alias("row_kind"), pl.lit("count").alias("statistic"),
        pl.col("base_unweighted").cast(pl.Float64).alias("estimate"),
        *[pl.lit(None, dtype=pl.Float64).alias(c) for c in ("se", "ci_low", "ci_high", "df", "deff")],
    )
    cells = pl.concat([bases, frame, counts], how="vertical_relaxed").select(CELL_COLUMNS)
    return study, cells


def _largest(path: Path, single: bool) -> tuple[int, Path, int]:
    pages = [path] if single else sorted(path.parent.glob("*.html"))
    largest = max(pages, key=lambda p: p.stat().st_size)
    return len(pages), largest, largest.stat().st_size


def _timed_run(rows: int, folder: Path) -> tuple[float, float]:
    """Seconds of `wavebook run --restage --quiet` on the benchmark study of `rows` respondents,
    and of `wavebook book` re-rendering its own book."""
    from bench_study_run import write_run_study

    spec = write_run_study(folder, rows, 1, variance="taylor")
    command = [str(Path(sys.executable).with_name("wavebook"))]
    start = time.perf_counter()
    subprocess.run([*command, "run", str(spec), "--restage", "--quiet"], check=True)
    run = time.perf_counter() - start
    start = time.perf_counter()
    subprocess.run([*command, "book", str(spec), "--quiet"], check=True)
    return run, time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tables", type=int, default=500)
    parser.add_argument("--waves", type=int, default=3)
    parser.add_argument("--columns", type=int, default=25, help="banner columns, the Total included")
    parser.add_argument("--run-rows", type=int, help="time a whole `wavebook run` of the benchmark study of N rows")
    parser.add_argument("--run-seconds", type=float, help="the time of a whole run measured before")
    parser.add_argument("--demo", action="store_true", help="also time the demo run end to end")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="wavebook-bench-book-") as tmp:
        folder = Path(tmp)
        start = time.perf_counter()
        study, cells = synthetic(folder, args.tables, args.waves, args.columns)
        print(f"{args.tables} tables x {args.waves} waves x {args.columns} columns: {cells.height:,} cells "
              f"(made in {time.perf_counter() - start:.1f} s)")
        renders = {}
        for label, single in (("default", None), ("folder", False)):
            start = time.perf_counter()
            path = render_book(study, cells, out_path=folder / label / "study.html", single_file=single)
            renders[label] = seconds = time.perf_counter() - start
            count, largest, size = _largest(path, path.name != "index.html")
            form = "one file" if path.name != "index.html" else "folder"
            print(f"{label:8s}: render {seconds:6.2f} s as {form}, {count} page(s), largest {largest.name} "
                  f"{size / 1e6:.2f} MB ({size / PAGE_TARGET:.2f} x the 2 MB target)")
        for few in (10, 40):
            small_study, small = synthetic(folder / f"small{few}", few, args.waves, args.columns)
            path = render_book(small_study, small, out_path=folder / f"small{few}" / "study.html")
            count, largest, size = _largest(path, path.name != "index.html")
            print(f"{few} tables by default: {'one file' if count == 1 else f'a folder of {count} pages'}, "
                  f"largest page {size / 1e6:.2f} MB")
        run = args.run_seconds
        if args.run_rows:
            run, own = _timed_run(args.run_rows, folder / "run")
            print(f"whole `wavebook run` of the {args.run_rows:,}-respondent study: {run:.1f} s "
                  f"(re-rendering its own book: {own:.1f} s)")
        if run:
            share = renders["default"] / run
            print(f"500-table render / whole run: {100 * share:.1f}% ({share / SHARE_TARGET:.2f} x the 10% target)")
        if args.demo:
            from pipeline.commands.demo import DEMO_SPEC, copy_demo
            from pipeline.runner import rebuild_book, run_study

            demo = copy_demo(folder / "demo")
            start = time.perf_counter()
            run_study(demo / DEMO_SPEC, quiet=True)
            whole = time.perf_counter() - start
            start = time.perf_counter()
            rebuild_book(demo / DEMO_SPEC, quiet=True)
            render = time.perf_counter() - start
            print(f"demo: whole run {whole:.2f} s, book render {render:.2f} s = {100 * render / whole:.1f}% of the run")


if __name__ == "__main__":
    main()
