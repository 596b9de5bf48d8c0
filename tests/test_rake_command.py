"""`wavebook rake`: ad-hoc raking of one file to a long targets CSV."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline.cli import main

TARGETS = "variable,category,target\nregion,N,0.6\nregion,S,0.4\nage x sex,1 x 1,0.2\nage x sex,1 x 2,0.2\nage x sex,2 x 1,0.3\nage x sex,2 x 2,0.3\n"


def _write(tmp_path: Path, n: int = 400) -> tuple[Path, Path, pl.DataFrame]:
    rng = np.random.default_rng(4)
    frame = pl.DataFrame({
        "id": [f"p{i:04d}" for i in range(n)],
        "age": rng.integers(1, 3, n),
        "note": ["a,b"] * n,
        "region": rng.choice(["N", "S"], n, p=[0.3, 0.7]),
        "sex": rng.integers(1, 3, n),
        "dw": np.round(rng.uniform(1, 3, n), 3),
    })
    data = tmp_path / "data.csv"
    frame.write_csv(data)
    targets = tmp_path / "targets.csv"
    targets.write_text(TARGETS)
    return data, targets, frame


def test_rake_writes_every_column_plus_weight_in_input_order(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data, targets, frame = _write(tmp_path)
    out = tmp_path / "out.csv"
    assert main(["rake", str(data), "--targets", str(targets), "--weight", "dw", "--trim-max", "3", "--out", str(out)]) == 0
    result = pl.read_csv(out)
    assert result.columns == [*frame.columns, "weight"]
    assert result["id"].to_list() == frame["id"].to_list() and result["note"][0] == "a,b"
    w = result["weight"].to_numpy()
    total = frame["dw"].sum()
    # proportions are scaled to the sum of the starting weights; margins met (identity)
    assert w[(result["region"] == "N").to_numpy()].sum() == pytest.approx(0.6 * total, rel=1e-5)
    assert w[((result["age"] == 2) & (result["sex"] == 1)).to_numpy()].sum() == pytest.approx(0.3 * total, rel=1e-5)
    assert w.max() <= 3 * w.mean() * (1 + 1e-6)
    text = capsys.readouterr().out
    assert "step 1 (rake)" in text and "region" in text and "deff" in text
    assert not list(tmp_path.glob(".*.tmp"))


def test_rake_parquet_out_and_equal_start(tmp_path: Path) -> None:
    data, targets, frame = _write(tmp_path)
    parquet = tmp_path / "data.parquet"
    frame.write_parquet(parquet)
    out = tmp_path / "out.parquet"
    assert main(["rake", str(parquet), "--targets", str(targets), "--out", str(out), "--quiet"]) == 0
    result = pl.read_parquet(out)
    assert result.drop("weight").equals(frame)
    assert result["weight"].sum() == pytest.approx(frame.height, rel=1e-9)  # equal start: total = n


def test_rake_reports_problems_and_writes_nothing(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data, targets, _ = _write(tmp_path)
    targets.write_text("variable,category,target\nregion,N,0.6\nregion,E,0.4\nincome,1,1\n")
    out = tmp_path / "out.csv"
    assert main(["rake", str(data), "--targets", str(targets), "--out", str(out)]) == 1
    err = capsys.readouterr().err
    assert "income" in err  # missing column named
    targets.write_text("variable,category,target\nregion,N,0.6\nregion,E,0.4\n")
    assert main(["rake", str(data), "--targets", str(targets), "--out", str(out)]) == 1
    err = capsys.readouterr().err
    assert "'E'" in err and "'S'" in err  # unknown target category and data category without target, together
    assert not out.exists()
    assert main(["rake", str(data), "--targets", str(targets), "--trim-max", "0.5"]) == 2  # a usage error
    assert "--trim-max" in capsys.readouterr().err
