"""A questionnaire that changes between waves: per-wave questions and items, a renamed column,
a recode, a routed question; restaging when the spec changes."""

from __future__ import annotations

from pathlib import Path

import polars as pl
import pytest
from polars.testing import assert_frame_equal

from conftest import TRACKER_SPEC, Tracker, tracker_rows
from pipeline.cli import main
from pipeline.errors import SpecError
from pipeline.runner import stage_reasons, variance_options, weigh_and_estimate
from pipeline.staging.database import open_database
from pipeline.staging.stage import check_wave, stage_wave
from pipeline.tables.topline import unweighted_toplines

W3 = '''
[waves.W3]
label = "Wave 3 (September 2026)"
file = "waves/wave3.csv"
'''

TRUST = '''
[variables.trust]
label = "Trust in the brand"
type = "single"
values = { 1 = "Trust", 2 = "Distrust" }
waves = ["W3"]
'''


def changing_spec(*, renamed: bool = True) -> str:
    """W2 names satisfaction 'sat_w2' (renamed), W3 adds trust and the item aware_nimbus, spend is
    asked_if age_band != 3, and W1's file codes age band 55+ as 4 (recoded to 3)."""
    spec = TRACKER_SPEC.replace('[design]', W3.strip() + "\n\n[design]")
    spec = spec.replace(
        'values = { 1 = "18-34", 2 = "35-54", 3 = "55+" }\n',
        'values = { 1 = "18-34", 2 = "35-54", 3 = "55+" }\nrecode = { W1 = { 4 = 3 } }\n',
    )
    spec = spec.replace(
        'items = { aware_kestrel = "Kestrel", aware_lumen = "Lumen" }\n',
        'items = { aware_kestrel = "Kestrel", aware_lumen = "Lumen", aware_nimbus = { label = "Nimbus", waves = ["W3"] } }\n',
    )
    if renamed:
        spec = spec.replace('exclude_from_statistics = [99]\n', 'exclude_from_statistics = [99]\ncolumn = { W2 = "sat_w2" }\n')
    spec = spec.replace('minimum = 0\nmaximum = 5000\n', 'minimum = 0\nmaximum = 5000\nasked_if = "age_band != 3"\n')
    return spec + TRUST


def wave_rows(wave: str, n: int, *, renamed: bool = True) -> list[dict[str, str]]:
    rows = tracker_rows(n, prefix=wave.lower())
    for i, row in enumerate(rows):
        if row["age_band"] == "3":
            row["spend"] = ""
            if wave == "W1":
                row["age_band"] = "4"
        if wave == "W2" and renamed:
            row["sat_w2"] = row.pop("satisfaction")
        if wave == "W3":
            row["trust"] = str(1 + i % 2)
            row["aware_nimbus"] = str(int(i % 3 == 0))
    return rows


def build(folder: Path, *, renamed: bool = True) -> Tracker:
    folder.mkdir(parents=True, exist_ok=True)
    t = Tracker(folder, changing_spec(renamed=renamed))
    for wave, n in (("W1", 36), ("W2", 30), ("W3", 42)):
        t.write_wave(f"wave{wave[1]}.csv", wave_rows(wave, n, renamed=renamed))
    return t


@pytest.fixture
def changing(tmp_path: Path) -> Tracker:
    return build(tmp_path)


def _cells(t: Tracker) -> pl.DataFrame:
    study = t.study()
    for w in study.waves:
        stage_wave(study, w.id, quiet=True)
    con = open_database(study, read_only=True)
    try:
        cells = unweighted_toplines(con, study)
    finally:
        con.close()
    estimated, *_ = weigh_and_estimate(study, cells, variance_options(study), quiet=True)
    return estimated


def _row(cells: pl.DataFrame, wave: str, variable: str, kind: str, code: str | None = None) -> dict:
    mask = (pl.col("wave") == wave) & (pl.col("variable") == variable) & (pl.col("row_kind") == kind)
    if code is not None:
        mask &= pl.col("code") == code
    return cells.filter(mask).row(0, named=True)


def test_check_and_run_succeed(changing: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(changing.spec_path)]) == 0
    out = capsys.readouterr()
    assert "missing-column" not in out.out + out.err
    assert main(["run", str(changing.spec_path), "--quiet"]) == 0
    html = (changing.folder / "book" / "study.html").read_text(encoding="utf-8")
    assert "not asked in this wave" in html


def test_bases_equal_a_direct_count_in_every_wave(changing: Tracker) -> None:
    cells = _cells(changing)
    for wave in ("W1", "W2", "W3"):
        raw = pl.read_csv(changing.folder / "waves" / f"wave{wave[1]}.csv", infer_schema=False)
        satisfaction = "sat_w2" if wave == "W2" else "satisfaction"
        age = raw["age_band"].cast(pl.Int64).replace({4: 3})
        asked = age != 3
        answered_spend = raw["spend"].is_not_null() & asked
        assert _row(cells, wave, "spend", "base")["count"] == answered_spend.sum()
        assert _row(cells, wave, "spend", "not-asked")["count"] == (~asked).sum()
        assert _row(cells, wave, "satisfaction", "base")["count"] == raw[satisfaction].is_not_null().sum()
        assert _row(cells, wave, "age_band", "category", "3")["count"] == (age == 3).sum()
        if wave == "W3":
            assert _row(cells, wave, "trust", "base")["count"] == raw["trust"].is_not_null().sum()
            nimbus = _row(cells, wave, "aware", "item", "aware_nimbus")
            assert (nimbus["count"], nimbus["base"]) == ((raw["aware_nimbus"] == "1").sum(), raw.height)
        else:
            assert cells.filter((pl.col("wave") == wave) & (pl.col("variable") == "trust")).height == 0
            assert cells.filter((pl.col("wave") == wave) & (pl.col("code") == "aware_nimbus")).height == 0


def test_renamed_column_estimates_equal_those_under_the_new_name(tmp_path: Path) -> None:
    renamed = _cells(build(tmp_path / "renamed"))
    plain = _cells(build(tmp_path / "plain", renamed=False))
    columns = ["row_order", "row_label", "count", "base", "estimate", "se", "ci_low", "ci_high"]
    pick = (pl.col("variable") == "satisfaction") & (pl.col("wave") == "W2")
    assert renamed.filter(pick).height > 5 and renamed.filter(pick)["estimate"].is_not_null().sum() > 5
    assert_frame_equal(renamed.filter(pick).select(columns), plain.filter(pick).select(columns))


def test_recode_happens_before_the_checks(changing: Tracker) -> None:
    study = changing.study()
    assert [p.rule for p in check_wave(study, "W1") if p.severity == "error"] == []
    rows = wave_rows("W1", 36)
    rows[0]["age_band"] = "5"
    changing.write_wave("wave1.csv", rows)
    errors = [p for p in check_wave(study, "W1") if p.severity == "error"]
    assert [(p.rule, p.value) for p in errors] == [("code-outside-codebook", "5")]


def test_a_wave_missing_a_question_it_asked_is_still_an_error(changing: Tracker) -> None:
    rows = wave_rows("W3", 42)
    for row in rows:
        del row["trust"]
    changing.write_wave("wave3.csv", rows)
    problems = check_wave(changing.study(), "W3")
    assert [(p.rule, p.column) for p in problems if p.severity == "error"] == [("missing-column", "trust")]
    rows = wave_rows("W2", 30)
    for row in rows:
        row["satisfaction"] = row.pop("sat_w2")
    changing.write_wave("wave2.csv", rows)
    problems = check_wave(changing.study(), "W2")
    assert ("missing-column", "sat_w2") in [(p.rule, p.column) for p in problems]


@pytest.mark.parametrize(
    ("old", "new", "fragment"),
    [
        ('waves = ["W3"]', 'waves = ["W9"]', "variables.trust.waves: 'W9' is not a wave"),
        ('column = { W2 = "sat_w2" }', 'column = { W7 = "sat_w2" }', "variables.satisfaction.column.W7"),
        ("recode = { W1 = { 4 = 3 } }", "recode = { W1 = { 4 = 8 } }", "variables.age_band.recode.W1.4"),
        ('column = { W2 = "sat_w2" }', 'column = { W2 = "channel" }',
         "variables.satisfaction.column.W2: wave W2's column 'channel' is already read by variables.channel"),
    ],
)
def test_per_wave_keys_are_checked(tmp_path: Path, old: str, new: str, fragment: str) -> None:
    spec = changing_spec()
    assert old in spec
    with pytest.raises(SpecError) as exc:
        Tracker(tmp_path, spec.replace(old, new)).study()
    assert fragment in exc.value.render()


def test_run_restages_when_the_spec_changes_and_says_so(changing: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["run", str(changing.spec_path), "--quiet"]) == 0
    assert stage_reasons(changing.study()) == {}
    spec = changing.spec_path.read_text(encoding="utf-8")
    without = spec.replace(TRUST, "")
    changing.write_spec(without)
    assert set(stage_reasons(changing.study())) == {"W3"}  # only W3 held trust
    capsys.readouterr()
    assert main(["run", str(changing.spec_path), "--quiet"]) == 0
    err = capsys.readouterr().err
    assert "wave W3: the spec changed" in err and "restaging" in err
    changing.write_spec(spec)  # the variable comes back, files unchanged
    assert main(["run", str(changing.spec_path), "--quiet"]) == 0
    assert "Trust in the brand" in (changing.folder / "book" / "study.html").read_text(encoding="utf-8")
    changing.write_spec(spec.replace("recode = { W1 = { 4 = 3 } }", "recode = { W1 = { 4 = 3, 2 = 1 } }"))
    assert set(stage_reasons(changing.study())) == {"W1"}
