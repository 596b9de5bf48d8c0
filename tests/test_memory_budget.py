"""The memory budget (`pipeline.memory`): sizes, batches of variables, and results that do not depend on them."""

from __future__ import annotations

import argparse
import subprocess
import sys
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from polars.testing import assert_frame_equal

from pipeline.commands.demo import DEMO_SPEC, copy_demo
from pipeline.memory import BYTES_PER_VALUE, DEFAULT_BUDGET, parse_size, variable_batches
from pipeline.runner import run_study
from pipeline.staging.spec import load_spec
from pipeline.tables.weighted_cells import RememberedReplay


@pytest.mark.parametrize(
    ("text", "size"),
    [("2GB", 2 * 2**30), ("512MB", 512 * 2**20), ("1.5G", int(1.5 * 2**30)), ("64k", 64 * 2**10), ("3000", 3000)],
)
def test_sizes_are_read_in_binary_units(text: str, size: int) -> None:
    assert parse_size(text) == size


@pytest.mark.parametrize("text", ["", "abc", "0", "-1GB", "2TB", "GB"])
def test_a_size_that_is_not_one_is_refused(text: str) -> None:
    with pytest.raises(argparse.ArgumentTypeError, match="is not a size"):
        parse_size(text)


def test_default_budget_is_two_gigabytes() -> None:
    assert DEFAULT_BUDGET == 2 * 2**30


def _study() -> object:
    folder = Path(__file__).resolve().parents[1] / "sample_data"
    return load_spec(folder / DEMO_SPEC)


def test_batches_hold_every_variable_once_in_spec_order_within_the_budget() -> None:
    study = _study()
    names = list(study.variables)
    assert variable_batches(study, 1_000, DEFAULT_BUDGET) == [names]  # a small wave: one batch
    assert variable_batches(study, 1_000, 1) == [[n] for n in names]  # no room: one variable per batch
    rows = 100_000
    budget = 12 * rows * BYTES_PER_VALUE  # room for about 12 columns
    batches = variable_batches(study, rows, budget)
    assert [n for b in batches for n in b] == names and 1 < len(batches) < len(names)
    for batch in batches:
        width = sum(len(study.variables[n].columns) + 2 * (study.variables[n].type in ("numeric", "rating"))
                    for n in batch)
        assert len(batch) == 1 or width * rows * BYTES_PER_VALUE <= budget
    # columns held for the whole wave come off the budget first: more, smaller batches
    assert len(variable_batches(study, rows, budget, held_columns=6)) > len(batches)


def test_a_variables_extra_bytes_come_off_its_batch() -> None:
    """The banner fit's working set of a stub (`Tabulation.batch_bytes`) counts like its columns."""
    study = _study()
    names = list(study.variables)
    assert variable_batches(study, 1_000, DEFAULT_BUDGET, extra={names[0]: DEFAULT_BUDGET}) == [[names[0]], names[1:]]
    half = {n: DEFAULT_BUDGET // 2 - 10**6 for n in names}  # two variables per batch
    assert variable_batches(study, 1_000, DEFAULT_BUDGET, extra=half) == [names[i:i + 2] for i in range(0, len(names), 2)]


def test_demo_results_do_not_depend_on_the_batching(tmp_path: Path) -> None:
    """One variable per batch (a 1-byte budget) gives the figures of one batch for everything: each
    estimate reads only its own quantities (rel 1e-12: the same sums; nothing is reordered across batches)."""
    exports = []
    for name, budget in (("one", DEFAULT_BUDGET), ("many", 1)):
        folder = copy_demo(tmp_path / name)
        book = run_study(folder / DEMO_SPEC, quiet=True, memory_budget=budget)
        exports.append(pl.read_parquet(book.parent / "study_cells.parquet"))
    assert_frame_equal(exports[0], exports[1], check_exact=False, rel_tol=1e-12, abs_tol=1e-15)


def test_run_refuses_a_bad_memory_budget_as_a_usage_error(tmp_path: Path) -> None:
    wavebook = Path(sys.executable).with_name("wavebook")
    result = subprocess.run([str(wavebook), "run", str(tmp_path / "study.toml"), "--memory-budget", "lots"],
                            capture_output=True, text=True)
    assert result.returncode == 2
    assert "is not a size such as 2GB" in result.stderr


def test_remembered_replay_computes_each_input_once_and_returns_its_result() -> None:
    calls: list[np.ndarray] = []

    def replay(totals: np.ndarray) -> np.ndarray:
        calls.append(totals.copy())
        return totals / totals.sum(axis=1, keepdims=True)

    remembered = RememberedReplay(replay)
    a = np.array([[1.0, 3.0], [2.0, 2.0]])
    first = remembered(a)
    first[0, 0] = 99.0  # a caller changing its copy changes nothing remembered
    np.testing.assert_array_equal(remembered(a.copy()), [[0.25, 0.75], [0.5, 0.5]])
    np.testing.assert_array_equal(remembered(a[:1]), [[0.25, 0.75]])
    assert len(calls) == 2  # a, then its first row (another input); the repeat of a was remembered
