"""Issue 8, item 8: extreme design weights are caught at staging, and `estimate` refuses all-zero
weights and warns when one weight holds most of the total.
"""

from __future__ import annotations

from pathlib import Path

import polars as pl
import pytest
from conftest import TRACKER_SPEC, Tracker, tracker_rows
from safety_support import fingerprint, wavebook

from pipeline.staging.stage import check_wave


def _wave_with(tracker: Tracker, p_select: dict[int, str]) -> None:
    rows = tracker_rows(12, prefix="a")
    for index, value in p_select.items():
        rows[index]["p_select"] = value
    tracker.write_wave("wave1.csv", rows)


@pytest.mark.parametrize("value", ["1e-300", "1e-320"])
def test_a_weight_too_large_to_compute_with_is_an_error(
    tracker: Tracker, value: str, capsys: pytest.CaptureFixture[str]
) -> None:
    _wave_with(tracker, {0: value})
    problems = [p for p in check_wave(tracker.study(), "W1") if p.severity == "error"]
    assert [(p.rule, p.column, p.examples) for p in problems] == [("weight-out-of-range", "p_select", ("a001",))]
    before = fingerprint(tracker.folder)
    code, _, err = wavebook(["run", str(tracker.spec_path), "--quiet"], capsys)
    assert (code, "[weight-out-of-range]" in err, "Traceback" in err) == (1, True, False)
    assert fingerprint(tracker.folder) == before  # nothing staged, so later runs are not poisoned


def test_a_weight_far_above_the_median_is_a_warning_naming_the_ids(tracker: Tracker) -> None:
    # median weight 1 / 0.01 = 100 (half the rows 0.01, half 0.02); 1 / 1e-6 = 1e6 is 10,000 times it
    _wave_with(tracker, {2: "1e-6", 4: "1e-7"})
    problems = check_wave(tracker.study(), "W1")
    assert [(p.rule, p.severity, p.examples) for p in problems] == [("extreme-weight", "warning", ("a003", "a005"))]
    assert "1000 times the median" in problems[0].message


def test_the_ratio_can_be_declared(tracker: Tracker) -> None:
    tracker.write_spec(TRACKER_SPEC.replace('[design]\n', '[design]\nextreme_weight_ratio = 50000\n'))
    _wave_with(tracker, {2: "1e-6"})  # 1e6 / 75 (the median of 50 and 100 weights) is about 13,000
    assert check_wave(tracker.study(), "W1") == []


def _estimate_file(tmp_path: Path, weights: list[float]) -> Path:
    path = tmp_path / "wave.csv"
    pl.DataFrame({"w": weights, "y": [float(i % 3) for i in range(len(weights))]}).write_csv(path)
    return path


def test_estimate_refuses_all_zero_weights(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = _estimate_file(tmp_path, [0.0] * 10)
    code, out, err = wavebook(["estimate", str(path), "--weight", "w", "--mean", "y", "--quiet"], capsys)
    assert (code, out, "[all-weights-zero]" in err) == (1, "", True)


def test_estimate_warns_when_one_weight_dominates(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    weights = [1.0] * 9 + [1e12]
    path = _estimate_file(tmp_path, weights)
    code, out, err = wavebook(["estimate", str(path), "--weight", "w", "--mean", "y", "--quiet"], capsys)
    assert code == 0 and out.startswith("statistic")
    n_eff = sum(weights) ** 2 / sum(w * w for w in weights)  # Kish's effective n (a mathematical identity)
    assert "[dominant-weight]" in err and f"effective sample size is {n_eff:.1f} of 10" in err
    code, _, err = wavebook(["estimate", str(_estimate_file(tmp_path, [1.0] * 10)), "--weight", "w", "--mean", "y",
                             "--quiet"], capsys)
    assert (code, err) == (0, "")
