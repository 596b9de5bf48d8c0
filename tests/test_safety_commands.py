"""Issue 8, item 12: small command defects (weigh without a database, row numbers called ids,
quoted column names, step numbers), each reproduced first.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

import pytest
from conftest import TRACKER_SPEC, Tracker, tracker_rows, write_csv
from safety_support import AGE_TARGETS, fingerprint, wavebook


def test_weigh_without_a_database_is_an_error(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    before = fingerprint(tracker.folder)
    code, out, err = wavebook(["weigh", str(tracker.spec_path), "--quiet"], capsys)
    assert (code, out, "[database-missing]" in err) == (1, "", True)
    assert fingerprint(tracker.folder) == before  # and no empty database left behind


def test_rake_names_row_numbers_as_rows_not_ids(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rows = tracker_rows(12)
    rows[7]["p_select"] = "-1"
    data = write_csv(tmp_path / "data.csv", rows)
    (tmp_path / "targets.csv").write_text(AGE_TARGETS, encoding="utf-8")
    code, _, err = wavebook(["rake", str(data), "--targets", str(tmp_path / "targets.csv"), "--weight", "p_select"], capsys)
    assert code == 1
    assert "e.g. rows 8" in err and "ids 8" not in err


QUOTED = 'rec"om'


def _quoted_file(tmp_path: Path) -> Path:
    rows = [{**row, QUOTED: row["spend"] or "0"} for row in tracker_rows(12)]
    return write_csv(tmp_path / "data.csv", rows)


def test_estimate_reads_a_column_name_with_a_quote(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = _quoted_file(tmp_path)
    code, out, err = wavebook(["estimate", str(data), "--weight", "area", "--mean", QUOTED, "--quiet",
                                  "--digits", "all"], capsys)  # full precision, compared at 1e-12
    assert code == 0, err
    (row,) = list(csv.DictReader(io.StringIO(out)))
    assert row["variable"] == QUOTED
    spends = [float(r["spend"] or 0) for r in tracker_rows(12)]
    weights = [float(r["area"]) for r in tracker_rows(12)]
    expected = sum(w * y for w, y in zip(weights, spends, strict=True)) / sum(weights)  # weighted mean, by definition
    assert float(row["estimate"]) == pytest.approx(expected, rel=1e-12)


def test_rake_reads_a_column_name_with_a_quote(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = _quoted_file(tmp_path)
    targets = tmp_path / "targets.csv"
    targets.write_text(f'variable,category,target\n"{QUOTED.replace(chr(34), chr(34) * 2)}",0,1\n', encoding="utf-8")
    rows = [{**row, QUOTED: "0"} for row in tracker_rows(12)]
    write_csv(data, rows)
    code, _, err = wavebook(["rake", str(data), "--targets", str(targets), "--quiet"], capsys)
    assert code == 0, err


def test_weighting_steps_are_numbered_from_one(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    tracker.write_spec(TRACKER_SPEC + '\n[[weighting]]\nstep = "rake"\nmargins = ["age_band"]\ntotals = { age_band = { 1 = 1 } }\n'
                       '\n[[weighting]]\nstep = "trim"\nupper = "high"\n')
    code, _, err = wavebook(["check", str(tracker.spec_path)], capsys)
    assert code == 1
    assert "weighting step 2, upper" in err and "weighting[1]" not in err


def _rake_study(tracker: Tracker, targets: str) -> None:
    tracker.write_spec(TRACKER_SPEC + '\n[[weighting]]\nstep = "rake"\nmargins = ["age_band", "channel"]\ntargets = "targets.csv"\n')
    (tracker.folder / "targets.csv").write_text(targets, encoding="utf-8")


def test_check_finds_a_misspelled_margin_in_the_targets_file(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    _rake_study(tracker, AGE_TARGETS.replace("age_band", "age_bnd") + "channel,shop,0.5\nchannel,web,0.5\n")
    code, _, err = wavebook(["check", str(tracker.spec_path)], capsys)
    assert code == 1
    assert "'age_bnd' is not a codebook variable; did you mean 'age_band'?" in err


def test_check_rehearses_the_weighting_run_would_do(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    """A target category the data and codebook lack ('phone') only shows once the data is read:
    `check` fits the weighting in memory as `run` does, and fails where `run` would."""
    _rake_study(tracker, AGE_TARGETS + "channel,shop,0.5\nchannel,web,0.3\nchannel,phone,0.2\n")
    before = fingerprint(tracker.folder)
    code, out, _ = wavebook(["check", str(tracker.spec_path)], capsys)
    assert code == 1
    assert "[target-unknown-category]" in out and "'phone'" in out
    assert fingerprint(tracker.folder) == before  # check writes nothing
    code_run, _, err_run = wavebook(["run", str(tracker.spec_path), "--quiet"], capsys)
    assert code_run == 1 and "[target-unknown-category]" in err_run
    _rake_study(tracker, AGE_TARGETS + "channel,shop,0.5\nchannel,web,0.5\n")
    assert wavebook(["check", str(tracker.spec_path)], capsys)[0] == 0


def test_check_finds_a_target_category_without_respondents(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    tracker.write_wave("wave1.csv", [r for r in tracker_rows(12, prefix="a") if r["age_band"] != "3"])
    tracker.write_spec(TRACKER_SPEC + '\n[[weighting]]\nstep = "rake"\nmargins = ["age_band"]\ntargets = "targets.csv"\n')
    (tracker.folder / "targets.csv").write_text(AGE_TARGETS, encoding="utf-8")
    code, out, _ = wavebook(["check", str(tracker.spec_path), "--wave", "W1"], capsys)
    assert code == 1
    assert "[target-empty-cell]" in out and "category '3' of margin 'age_band'" in out


TRIM_CASES = {
    "upper, mean": {"upper": 3.0},
    "upper and lower, mean": {"upper": 3.0, "lower": 0.3},
    "upper, median": {"upper": 3.0, "relative_to": "median"},
    "upper, absolute": {"upper": 8.0, "relative_to": "absolute"},
    "lower only": {"lower": 0.5},
}


@pytest.mark.parametrize("after_rake", [False, True], ids=["trim only", "rake then trim"])
@pytest.mark.parametrize("bounds", list(TRIM_CASES.values()), ids=list(TRIM_CASES))
def test_trim_counts_every_weight_at_a_bound(bounds: dict, after_rake: bool) -> None:
    """The trim step's 'weights at a bound' equals the weights lying on a bound (within 1e-9 relative)."""
    import numpy as np
    import polars as pl

    from pipeline.weighting.recipe import fit_recipe
    from pipeline.weighting.steps import RakeStep, TrimStep
    from pipeline.weighting.targets import TargetTable

    rng = np.random.default_rng(20260301)
    n = 500
    data = pl.DataFrame({"id": [str(i) for i in range(n)], "g": rng.choice(["1", "2", "3"], n).tolist()})
    base = rng.lognormal(0.0, 1.0, n)
    targets = TargetTable({"g": {("1",): 0.3, ("2",): 0.3, ("3",): 0.4}}, source="test")
    steps = [RakeStep(0, (("g",),), targets), TrimStep(1, **bounds)] if after_rake else [TrimStep(0, **bounds)]
    recipe = fit_recipe(data, steps, base_weights=base, id_column="id")
    (report,) = [r for r in recipe.reports if r.kind == "trim"]
    lower, upper = report.bounds
    w = recipe.weights
    on_bound = np.isclose(w, upper, rtol=1e-9, atol=0) | np.isclose(w, lower, rtol=1e-9, atol=0)
    assert report.trimmed == int(on_bound.sum()) > 0


def test_check_warns_of_a_weighting_category_inside_one_psu(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    rows = tracker_rows(12, prefix="a")
    for row in rows:  # age band 3 only in region 1, area 1
        row["age_band"] = "3" if (row["region"], row["area"]) == ("1", "1") else str(1 + int(row["resp_id"][1:]) % 2)
    tracker.write_wave("wave1.csv", rows)
    step = '\n[[weighting]]\nstep = "rake"\nmargins = ["age_band"]\ntargets = "targets.csv"\n'
    (tracker.folder / "targets.csv").write_text(AGE_TARGETS, encoding="utf-8")
    for method, warned in (("jackknife", True), ("taylor", False)):
        tracker.write_spec(TRACKER_SPEC + f'\n[variance]\nmethod = "{method}"\n' + step)
        code, out, _ = wavebook(["check", str(tracker.spec_path), "--wave", "W1"], capsys)
        assert code == 0, out
        assert ("[category-in-one-psu]" in out and "category '3' of margin 'age_band'" in out) == warned, method


def test_check_warns_of_a_weighting_category_in_one_psu_of_a_stratum(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    """Age band 3 lies in both areas of region 2 but in only area 1 of region 1 (3 PSUs overall, so
    category-in-one-psu stays silent); every other (region, band) cell spans both areas."""
    rows = tracker_rows(12, prefix="a")
    region1_bands = {0: "3", 2: "1", 4: "1", 6: "2", 8: "2", 10: "1"}
    for i, row in enumerate(rows):
        if row["region"] == "1":
            row["age_band"] = region1_bands[i]
    tracker.write_wave("wave1.csv", rows)
    step = '\n[[weighting]]\nstep = "rake"\nmargins = ["age_band"]\ntargets = "targets.csv"\n'
    (tracker.folder / "targets.csv").write_text(AGE_TARGETS, encoding="utf-8")
    for method, warned in (("jackknife", True), ("stratified-jackknife", True), ("taylor", False)):
        tracker.write_spec(TRACKER_SPEC + f'\n[variance]\nmethod = "{method}"\n' + step)
        code, out, _ = wavebook(["check", str(tracker.spec_path), "--wave", "W1"], capsys)
        assert code == 0, out
        assert "[category-in-one-psu]" not in out, out
        thin = [line for line in out.splitlines() if "[category-thin-in-stratum]" in line]
        if not warned:
            assert thin == [], method
            continue
        (line,) = thin
        assert "wave W1, weighting step 1: category '3' of margin 'age_band'" in line, line
        assert "lies in 1 of the 2 PSUs of stratum '1' (region)" in line, line
        assert "W1: ok, 1 warning" in out, out
