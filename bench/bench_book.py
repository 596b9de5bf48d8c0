"""Benchmark: render a large result book and report render time and the largest page.

Usage: python bench/bench_book.py [--tables 500] [--waves 3] [--demo]

Builds an invented study of `--tables` single-choice variables (8 categories and a net each)
with weighted cells for `--waves` waves (aggregates made up from a seeded generator: no
respondents are involved, so this times the book alone), renders it as a folder book and as one
file, and prints the render times and the largest page in bytes against the 2 MB target.
With --demo it also runs the invented demo study end to end and prints the share of the whole
run spent rendering (target: at most 10%). Prints figures only; nothing is asserted.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

from pipeline.book import render_book
from pipeline.staging.spec import Design, Study, Variable, Wave

CATEGORIES = 8
PAGE_TARGET = 2 * 1024 * 1024


def synthetic(folder: Path, tables: int, waves: int, *, seed: int = 20261202) -> tuple[Study, pl.DataFrame]:
    """An invented study and its weighted cells (estimates, intervals, SEs, deffs made up)."""
    rng = np.random.default_rng(seed)
    variables = {
        f"q{i:04d}": Variable(
            name=f"q{i:04d}", type="single", label=f"Invented question {i} about grocery habits",
            values={c: f"Answer {c}" for c in range(1, CATEGORIES + 1)},
        )
        for i in range(1, tables + 1)
    }
    study = Study(
        path=folder / "study.toml", title="Invented benchmark book", respondent_id="id",
        waves=tuple(Wave(f"W{w}", f"Wave {w}", folder / f"w{w}.csv") for w in range(1, waves + 1)),
        design=Design(kind="probability"), variables=variables,
    )
    rows = []
    for name in variables:
        for w in range(1, waves + 1):
            base = 1000 + int(rng.integers(0, 500))
            shares = rng.dirichlet(np.ones(CATEGORIES))
            rows.append((f"W{w}", name, "base", 0, "Base: answered", None, base, base, None))
            for c, share in enumerate(shares, start=1):
                rows.append((f"W{w}", name, "category", c, f"Answer {c}", str(c), int(share * base), base, 100 * share))
            top = float(shares[:2].sum())
            rows.append((f"W{w}", name, "net", CATEGORIES + 1, "Top two", None, int(top * base), base, 100 * top))
            rows.append((f"W{w}", name, "missing", CATEGORIES + 2, "No answer", None, 0, base, 0.0))
    frame = pl.DataFrame(
        rows, orient="row",
        schema=["wave", "variable", "row_kind", "row_order", "row_label", "code", "count", "base", "percent"],
    ).with_columns(pl.col("row_order").cast(pl.Int32), pl.lit(None, pl.Float64).alias("value"), pl.lit(None, pl.String).alias("note"))
    se = (pl.col("percent") * (100 - pl.col("percent")) / pl.col("base")).sqrt() * 1.2
    frame = frame.with_columns(
        pl.when(pl.col("row_kind") != "base").then(pl.col("percent")).alias("estimate"), se.alias("se"),
    ).with_columns(
        (pl.col("estimate") - 1.96 * pl.col("se")).clip(0, 100).alias("ci_low"),
        (pl.col("estimate") + 1.96 * pl.col("se")).clip(0, 100).alias("ci_high"),
        pl.lit(1.44).alias("deff"),
    )
    return study, frame


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tables", type=int, default=500)
    parser.add_argument("--waves", type=int, default=3)
    parser.add_argument("--demo", action="store_true", help="also time the demo run end to end")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="wavebook-bench-book-") as tmp:
        folder = Path(tmp)
        study, cells = synthetic(folder, args.tables, args.waves)
        print(f"{args.tables} tables x {args.waves} waves: {cells.height:,} cells")
        for single in (False, True):
            start = time.perf_counter()
            path = render_book(study, cells, out_path=folder / "book" / "study.html", single_file=single)
            seconds = time.perf_counter() - start
            pages = [path] if single else sorted(path.parent.glob("*.html"))
            largest = max(pages, key=lambda p: p.stat().st_size)
            size = largest.stat().st_size
            print(
                f"{'one file' if single else 'folder  '}: render {seconds:6.2f} s, {len(pages)} page(s), "
                f"largest {largest.name} {size / 1e6:.2f} MB ({size / PAGE_TARGET:.2f} x the 2 MB target)"
            )
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
