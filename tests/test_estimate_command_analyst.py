"""`wavebook estimate` as an analyst uses it: optional weight, counts, repeated requests, strata
with the plain jackknife, reasons for empty design effects, CSV digits."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline.cli import main
from pipeline.estimation import estimate


def _file(tmp_path: Path) -> Path:
    rng = np.random.default_rng(8)
    n = 90
    frame = pl.DataFrame({"h": rng.integers(0, 3, n), "j": rng.integers(0, 4, n), "w": rng.uniform(1, 4, n),
                          "y": rng.normal(3, 1, n), "q": rng.choice(["a", "b", "c"], n)})
    path = tmp_path / "wave.csv"
    frame.write_csv(path)
    return path


def _rows(capsys: pytest.CaptureFixture[str]) -> list[dict]:
    return list(csv.DictReader(io.StringIO(capsys.readouterr().out)))


def test_weight_is_optional_and_means_equal_weights(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = _file(tmp_path)
    assert main(["estimate", str(path), "--mean", "y", "--digits", "all"]) == 0
    (row,) = _rows(capsys)
    y = pl.read_csv(path)["y"].to_numpy()
    # equal weights, each row its own PSU: the sample mean and s / sqrt(n) (textbook SRS formula, no FPC)
    assert float(row["estimate"]) == pytest.approx(y.mean(), rel=1e-12)
    assert float(row["se"]) == pytest.approx(y.std(ddof=1) / np.sqrt(len(y)), rel=1e-10)


def test_count_gives_weighted_category_counts_with_se(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = _file(tmp_path)
    assert main(["estimate", str(path), "--weight", "w", "--strata", "h", "--psu", "j", "--count", "q",
                 "--digits", "all"]) == 0
    rows = {r["category"]: r for r in _rows(capsys) if r["statistic"] == "count"}
    frame = pl.read_csv(path)
    for cat in ("a", "b", "c"):
        flag = frame.with_columns(x=(pl.col("q") == cat).cast(pl.Float64))
        total = estimate(flag, weight="w", strata="h", psu="j", total="x").row(0, named=True)
        # identity: the weighted count of a category is the total of its indicator
        assert float(rows[cat]["estimate"]) == pytest.approx(total["estimate"], rel=1e-12)
        assert float(rows[cat]["se"]) == pytest.approx(total["se"], rel=1e-10)


def test_repeated_requests_are_estimated_once(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = _file(tmp_path)
    assert main(["estimate", str(path), "--weight", "w", "--mean", "y", "--mean", "y", "--proportion", "q",
                 "--proportion", "q"]) == 0
    rows = _rows(capsys)
    assert [r["statistic"] for r in rows] == ["mean", "proportion", "proportion", "proportion"]


def test_plain_jackknife_with_strata_says_they_are_ignored(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = _file(tmp_path)
    assert main(["estimate", str(path), "--weight", "w", "--strata", "h", "--psu", "j", "--mean", "y",
                 "--variance", "jackknife"]) == 0
    assert "ignores --strata" in capsys.readouterr().err


def test_empty_deff_always_has_a_reason(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = _file(tmp_path)
    assert main(["estimate", str(path), "--weight", "w", "--strata", "h", "--psu", "j", "--mean", "y",
                 "--quantile", "y", "0.5", "--proportion", "q", "--by", "q", "--format", "json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    empty = [r for r in rows if r["deff"] is None]
    assert empty and all(r["reason"] for r in empty)


def test_csv_rounds_to_ten_significant_digits_and_json_keeps_full_precision(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = _file(tmp_path)
    args = ["estimate", str(path), "--weight", "w", "--strata", "h", "--psu", "j", "--mean", "y"]
    assert main([*args, "--format", "json"]) == 0
    (full,) = json.loads(capsys.readouterr().out)
    assert main(args) == 0
    (row,) = _rows(capsys)
    assert float(row["se"]) == float(f"{full['se']:.10g}") and float(row["se"]) != full["se"]
    assert main([*args, "--digits", "all"]) == 0
    (exact,) = _rows(capsys)
    assert float(exact["se"]) == full["se"]  # round-trip floats
    assert main([*args, "--digits", "4"]) == 0
    assert float(_rows(capsys)[0]["se"]) == float(f"{full['se']:.4g}")
