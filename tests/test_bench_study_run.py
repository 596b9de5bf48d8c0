"""Smoke test of bench/bench_study_run.py at a small size: every step runs and reports (no timing asserted)."""

from __future__ import annotations

import importlib
import sys
from pathlib import Path
from types import ModuleType

import polars as pl

BENCH = Path(__file__).resolve().parents[1] / "bench" / "bench_study_run.py"


def _bench() -> ModuleType:
    """The benchmark imported by name (its child processes import it again by that name)."""
    if str(BENCH.parent) not in sys.path:
        sys.path.insert(0, str(BENCH.parent))
    return importlib.import_module(BENCH.stem)


def test_study_run_benchmark_runs_every_step_on_a_small_study(tmp_path: Path) -> None:
    bench = _bench()
    spec_path = bench.write_run_study(tmp_path, 400, 2, variance="taylor")
    figures = bench.measure(spec_path)
    assert list(figures) == ["duckdb load", "stage", "weigh", "estimates", "book", "run"]
    assert all(seconds > 0 and peak > 0 for seconds, peak in figures.values())
    text = bench.report(figures)
    assert text.splitlines()[1].startswith("duckdb load") and " 1.00 " in text.splitlines()[1]
    export = pl.read_parquet(tmp_path / "book" / "study_cells.parquet")
    assert set(export["wave"].unique()) == {"W1", "W2"}
    # 56 codebook variables: 30 single, 10 ratings, 2 multi-response sets, 6 numeric, region
    assert export["variable"].n_unique() == 49
    weights = export.filter((pl.col("variable") == "region") & (pl.col("statistic") == "percent"))
    assert (weights.filter(pl.col("row_label") != "No answer")["estimate"] - 0.1).abs().max() < 1e-6  # raked to 10%
