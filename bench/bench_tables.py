"""Benchmark: banner tables with every test against the same study's weighted topline without a banner.

Data (invented, seeded): `--rows` respondents (default 1,000,000) split evenly over two waves, in
20 strata x 20 PSUs (400 PSUs), unequal base weights, no weighting steps (one weighting class);
60 single-choice stubs of 5 categories and 5 break variables of 5 categories: a banner of 25
columns plus the Total. Per wave: 60 x (5 categories + "no answer") rows x 21-26 columns (a
break's own table drops its break), every pair of columns within each break, every column
against the Total, a Rao-Scott test per stub and break; across the two waves, every cell's change.

What each timing counts (per variance method, Taylor and the stratified jackknife, whose 400
PSUs in 20 strata give 400 replicates):
  topline   `pipeline.tables.weighted_cells.wave_estimates` for both waves: the 60 stubs' weighted rows
            with standard errors, intervals and design effects, one grouped pass per wave;
  tables    `pipeline.tables.Tabulation` for both waves, as the runner uses it: the same topline
            estimates and the banner cells (two grouped passes per wave), the tests, and `finish`
            (wave-over-wave tests of the Total and of every cell, chance marks); so the ratio is the
            run with banner tables against the run without.
Each method runs in its own process; the tables run first, so the peak resident set size after
them is theirs (with the generated data, also reported alone), then the topline's. Figures and ratios are printed; nothing is asserted. The
target of issue 12: tables at most 3x the topline's time, peak RSS at most 4 GB.

    python bench/bench_tables.py [--rows 1000000] [--method taylor|stratified-jackknife]
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import polars as pl

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from pipeline.estimation.options import VarianceOptions  # noqa: E402
from pipeline.staging.spec import Design, Study, Variable, Wave  # noqa: E402
from pipeline.tables import Tabulation  # noqa: E402
from pipeline.tables.spec import BannerSpec, TablesSpec  # noqa: E402
from pipeline.tables.topline import CELL_SCHEMA  # noqa: E402
from pipeline.tables.weighted_cells import wave_estimates  # noqa: E402
from pipeline.weighting import fit_recipe  # noqa: E402

STUBS, BREAKS, CATEGORIES, STRATA, PSUS = 60, 5, 5, 20, 20
METHODS = ("taylor", "stratified-jackknife")


def _study() -> Study:
    values = {c: f"code {c}" for c in range(1, CATEGORIES + 1)}
    names = [f"q{i:02d}" for i in range(STUBS)] + [f"b{i}" for i in range(BREAKS)]
    variables = {n: Variable(n, "single", n, values=dict(values)) for n in names}
    waves = (Wave("W1", "W1", Path("w1.csv")), Wave("W2", "W2", Path("w2.csv")))
    return Study(path=ROOT / "bench" / "tables.toml", title="bench", respondent_id="id", waves=waves,
                 design=Design(strata="h", psu="psu"), variables=variables)


def _layout(study: Study, wave: str) -> pl.DataFrame:
    """Topline layout rows: base, the categories, "no answer" (as `pipeline.tables.topline` orders them)."""
    records = []
    for name, v in study.variables.items():
        rows = [("base", "Base", None)] + [("category", label, str(c)) for c, label in v.values.items()]
        rows.append(("missing", "No answer", None))
        records += [(wave, name, kind, k, label, code, None, None, None, None, None)
                    for k, (kind, label, code) in enumerate(rows)]
    return pl.DataFrame(records, schema=CELL_SCHEMA, orient="row")


def _wave(rng: np.random.Generator, n: int, prefix: str) -> pl.DataFrame:
    h = rng.integers(0, STRATA, n)
    psu = rng.integers(0, PSUS, n)
    effect = rng.normal(0, 0.4, (STRATA, PSUS))[h, psu]
    cols: dict[str, np.ndarray] = {
        "respondent_id": np.char.add(prefix, np.arange(n).astype(str)),
        "h": h.astype(np.int64), "psu": psu.astype(np.int64), "w": rng.uniform(0.5, 3.0, n),
    }
    for i in range(BREAKS):
        cols[f"b{i}"] = rng.integers(1, CATEGORIES + 1, n).astype(np.int64)
    for i in range(STUBS):
        latent = rng.normal(0, 1, n) + effect + 0.2 * (cols[f"b{i % BREAKS}"] - 3)
        answer = np.clip(np.round(latent + 3), 1, CATEGORIES).astype(np.int64)
        cols[f"q{i:02d}"] = np.where(rng.random(n) < 0.03, -1, answer)
    frame = pl.DataFrame(cols)
    return frame.with_columns(pl.when(pl.col(f"q{i:02d}") < 0).then(None).otherwise(pl.col(f"q{i:02d}"))
                              .alias(f"q{i:02d}") for i in range(STUBS))


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def run_one(rows: int, method: str) -> dict:
    study = _study()
    rng = np.random.default_rng(20261202)
    waves = {w: _wave(rng, rows // 2, w) for w in ("W1", "W2")}
    recipes = {w: fit_recipe(f, [], base_weights=f["w"].to_numpy()) for w, f in waves.items()}
    options = VarianceOptions(method=method)
    spec = TablesSpec(levels=(0.05,), banners={"default": BannerSpec("default", tuple(f"b{i}" for i in range(BREAKS)))})
    data_mb = _peak_mb()
    t0 = time.perf_counter()
    tab = Tabulation(study, spec, options)
    for w, frame in waves.items():
        tab.add_wave(w, frame, recipes[w], _layout(study, w))
    result = tab.finish()
    tables = time.perf_counter() - t0
    tables_mb = _peak_mb()
    t0 = time.perf_counter()
    for w, frame in waves.items():
        wave_estimates(frame, study, recipes[w], _layout(study, w), options, wave=w)
    topline = time.perf_counter() - t0
    counts = dict(result.tests.group_by("comparison").len().iter_rows())
    return {"method": method, "rows": rows, "topline_s": topline, "tables_s": tables, "peak_mb": _peak_mb(),
            "data_mb": data_mb, "tables_mb": tables_mb,
            "cells": result.cells.height, "tests": counts}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--method", choices=METHODS)
    parser.add_argument("--methods", nargs="+", choices=METHODS, default=list(METHODS), help="methods to run in turn")
    args = parser.parse_args()
    if args.method:
        print(json.dumps(run_one(args.rows, args.method)))
        return
    for method in args.methods:  # one process per method, one after the other
        out = subprocess.run([sys.executable, __file__, "--rows", str(args.rows), "--method", method],
                             check=True, capture_output=True, text=True).stdout
        r = json.loads(out.strip().splitlines()[-1])
        ratio = r["tables_s"] / r["topline_s"]
        print(f"{method:>22}: {r['rows']:,} respondents, {r['cells']:,} cells, tests {r['tests']}")
        print(f"{'':>22}  topline {r['topline_s']:.1f} s, tables {r['tables_s']:.1f} s, ratio {ratio:.2f} "
              f"(target <= 3)")
        print(f"{'':>22}  peak RSS: data {r['data_mb'] / 1024:.2f} GB, after the tables {r['tables_mb'] / 1024:.2f} GB "
              f"(target <= 4), after the topline {r['peak_mb'] / 1024:.2f} GB")


if __name__ == "__main__":
    main()
