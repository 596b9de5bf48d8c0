"""Targets by wave: a `wave` column in the targets CSV, or one targets file per wave."""

from __future__ import annotations

from pathlib import Path

import polars as pl
import pytest

from conftest import TRACKER_SPEC, Tracker, tracker_rows
from pipeline.cli import main
from pipeline.errors import SpecError
from pipeline.staging.database import open_database
from pipeline.staging.stage import check_wave, stage_wave
from pipeline.weighting.store import fit_wave

RAKE = '\n[[weighting]]\nstep = "rake"\nmargins = ["region", "age_band"]\ntargets = {targets}\n'
AGE = "age_band,1,0.3\nage_band,2,0.3\nage_band,3,0.4\n"


def _study(tmp_path: Path, targets: str, files: dict[str, str]) -> Tracker:
    t = Tracker(tmp_path, TRACKER_SPEC + RAKE.format(targets=targets))
    for name, text in files.items():
        (tmp_path / name).write_text(text, encoding="utf-8")
    t.write_wave("wave1.csv", tracker_rows(48, prefix="a"))
    t.write_wave("wave2.csv", tracker_rows(36, prefix="b"))
    return t


def _region_shares(t: Tracker, wave: str) -> dict[int, float]:
    study = t.study()
    stage_wave(study, wave, quiet=True)
    con = open_database(study)
    try:
        recipe, _ = fit_wave(study, wave, con=con)
    finally:
        con.close()
    rows = pl.DataFrame(tracker_rows(48 if wave == "W1" else 36, prefix="a" if wave == "W1" else "b"))
    frame = pl.DataFrame({"resp_id": recipe.ids.cast(pl.String), "w": recipe.weights}).join(rows, on="resp_id")
    shares = frame.group_by("region").agg(pl.col("w").sum()).with_columns(pl.col("w") / pl.col("w").sum())
    return {int(r): s for r, s in shares.iter_rows()}


def test_a_wave_column_gives_each_wave_its_targets(tmp_path: Path) -> None:
    csv = "variable,category,target,wave\nregion,1,0.5,W1\nregion,2,0.5,W1\nregion,1,0.7,W2\nregion,2,0.3,W2\n"
    csv += "".join(f"{line},\n" for line in AGE.splitlines())  # rows without a wave: every wave
    t = _study(tmp_path, '"margins.csv"', {"margins.csv": csv})
    assert _region_shares(t, "W1") == pytest.approx({1: 0.5, 2: 0.5}, abs=1e-6)
    assert _region_shares(t, "W2") == pytest.approx({1: 0.7, 2: 0.3}, abs=1e-6)


def test_one_targets_file_per_wave(tmp_path: Path) -> None:
    header = "variable,category,target\n"
    t = _study(tmp_path, '{ W1 = "m1.csv", W2 = "m2.csv" }', {
        "m1.csv": header + "region,1,0.45\nregion,2,0.55\n" + AGE,
        "m2.csv": header + "region,1,0.6\nregion,2,0.4\n" + AGE,
    })
    assert _region_shares(t, "W1") == pytest.approx({1: 0.45, 2: 0.55}, abs=1e-6)
    assert _region_shares(t, "W2") == pytest.approx({1: 0.6, 2: 0.4}, abs=1e-6)


def test_check_reports_a_wave_without_targets(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    t = _study(tmp_path, '{ W1 = "m1.csv" }', {"m1.csv": "variable,category,target\nregion,1,0.5\nregion,2,0.5\n" + AGE})
    study = t.study()
    assert [p for p in check_wave(study, "W1") if p.severity == "error"] == []
    problems = [p for p in check_wave(study, "W2") if p.severity == "error"]
    assert [(p.rule, p.value) for p in problems] == [("wave-without-targets", "W2")]
    assert main(["check", str(t.spec_path)]) == 1
    assert "wave-without-targets" in capsys.readouterr().out


@pytest.mark.parametrize(
    ("targets", "files", "fragment"),
    [
        ('{ W9 = "m1.csv" }', {"m1.csv": "variable,category,target\nregion,1,1\n"}, "targets.W9: 'W9' is not a wave"),
        ('"m.csv"', {"m.csv": "variable,category,target,wave\nregion,1,1,W7\n"}, "has rows for wave 'W7'"),
    ],
)
def test_unknown_waves_in_targets_are_spec_errors(tmp_path: Path, targets: str, files: dict[str, str], fragment: str) -> None:
    t = _study(tmp_path, targets, files)
    with pytest.raises(SpecError) as exc:
        t.study()
    assert fragment in exc.value.render()
