"""Supplied replicate weights in a study (`[variance] method = "supplied"`): staged, estimated, described.

The numeric checks: a study run equals `wavebook estimate --variance supplied` on the same file (a
mathematical identity: the same replicate formula on the same weights); the Census Bureau's
published verification table (ACS 2017-2021 PUMS, successive-difference replication, 80 replicates)
reproduced from a study spec; a BRR design's df equals its number of half-sample pairs.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline.cli import main
from pipeline.errors import DataError, SpecError
from pipeline.estimation import estimate_table
from pipeline.estimation.replicates import make_replicates
from pipeline.runner import run_study, variance_options
from pipeline.staging.database import load_responses, open_database, table_columns
from pipeline.staging.replicate_columns import staged_columns
from pipeline.staging.spec import load_spec
from pipeline.staging.stage import check_wave, stage_wave
from pipeline.tables.weighted_cells import variance_arguments
from pipeline.weighting.store import fit_wave, weighting_columns

PSUS = 12  # jackknife: one replicate per PSU
H = 6  # BRR: strata of 2 PSUs each

SPEC = """\
title = "Supplied replicates"
respondent_id = "id"

[waves.W1]
label = "Wave 1"
file = "w1.csv"

[design]
base_weight = "wt"

[variables.q1]
label = "Channel"
type = "single"
values = {{ 1 = "Shop", 2 = "Web", 3 = "Phone" }}

[variables.region]
label = "Region"
type = "single"
values = {{ 1 = "North", 2 = "South" }}

[variables.spend]
label = "Spend"
type = "numeric"
{tables}
[variance]
method = "supplied"
replicate_columns = 'rw\\d+'
{variance}
"""


def _respondents(n_psus: int, per_psu: int = 15, seed: int = 11) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    psu = np.repeat(np.arange(n_psus), per_psu)
    n = len(psu)
    return pl.DataFrame({
        "id": [f"r{i:04d}" for i in range(n)],
        "psu": psu,
        "wt": rng.uniform(20, 60, n).round(3),
        "q1": rng.choice([1, 2, 3], n, p=[0.5, 0.3, 0.2]),
        "region": np.where(psu % 2 == 0, 1, 2),
        "spend": (rng.gamma(2.0, 15.0, n) + psu).round(2),
    })


def _with_replicates(frame: pl.DataFrame, method: str, psu_stratum: np.ndarray) -> tuple[pl.DataFrame, int]:
    """Replicate weights rw1..rwR = wt * a_r(psu) from the generated factors of `method`."""
    rf = make_replicates(method, psu_stratum, stratum_labels=[str(h) for h in range(int(psu_stratum.max()) + 1)])
    psu = frame["psu"].to_numpy()
    w = frame["wt"].to_numpy()
    reps = {f"rw{r + 1}": w * rf.factors[r, psu] for r in range(rf.n_replicates)}
    return frame.with_columns(**{k: pl.Series(v) for k, v in reps.items()}), rf.n_replicates


def _study(tmp_path: Path, frame: pl.DataFrame, *, variance: str, tables: str = "") -> Path:
    frame.drop("psu").write_csv(tmp_path / "w1.csv")
    spec = tmp_path / "study.toml"
    spec.write_text(SPEC.format(variance=variance, tables=tables), encoding="utf-8")
    return spec


def _banner_cells(book: Path) -> pl.DataFrame:
    """The banner cells of a run as shares 0-1: the banner export, or the unified cells export's banner rows."""
    separate = book.parent / f"{book.stem}_banner_cells.parquet"
    if separate.exists():  # percentages on the 0-100 scale there
        frame = pl.read_parquet(separate).filter(pl.col("statistic") == "percent")
        return frame.with_columns(pl.col("estimate") / 100, pl.col("se") / 100)
    frame = pl.read_parquet(book.parent / f"{book.stem}_cells.parquet")
    return frame.filter((pl.col("banner") != "total") & (pl.col("statistic") == "percent"))


def _cli(path: Path, capsys: pytest.CaptureFixture[str], *args: str) -> pl.DataFrame:
    capsys.readouterr()
    assert main(["estimate", str(path), "--weight", "wt", "--variance", "supplied", "--replicate-cols", r"rw\d+",
                 "--format", "json", "--quiet", *args]) == 0
    return pl.DataFrame(json.loads(capsys.readouterr().out))


def test_study_run_equals_the_estimate_command_on_the_same_file(tmp_path: Path,
                                                                capsys: pytest.CaptureFixture[str]) -> None:
    frame, r = _with_replicates(_respondents(PSUS), "jackknife", np.zeros(PSUS, dtype=np.int64))
    spec = _study(tmp_path, frame, variance='replicate_method = "jackknife"',
                  tables='\n[tables]\nbanner = ["region"]\n')
    book = run_study(spec, quiet=True)
    cells = pl.read_parquet(book.parent / "study_cells.parquet")  # percentages as shares 0-1
    cli = _cli(tmp_path / "w1.csv", capsys, "--replicate-method", "jackknife", "--proportion", "q1",
               "--by", "region", "--mean", "spend")
    codes = {"Shop": "1", "Web": "2", "Phone": "3"}
    total = cells.filter((pl.col("banner") == "total") & (pl.col("variable") == "q1")
                         & pl.col("row_label").is_in(list(codes)) & (pl.col("statistic") == "percent"))
    assert total.height == 3
    for row in total.iter_rows(named=True):
        want = cli.filter((pl.col("statistic") == "proportion") & (pl.col("category") == codes[row["row_label"]])
                          & (pl.col("domain") == "")).row(0, named=True)
        # identity: the same replicate formula, (R-1)/R sum (theta_r - theta)^2, on the same weights
        assert row["estimate"] == pytest.approx(want["estimate"], rel=1e-10)
        assert row["se"] == pytest.approx(want["se"], rel=1e-10)
        assert row["df"] == r - 1 == want["df"]
    mean = cells.filter((pl.col("banner") == "total") & (pl.col("variable") == "spend")
                        & (pl.col("statistic") == "mean")).row(0, named=True)
    want = cli.filter((pl.col("statistic") == "mean") & (pl.col("domain") == "")).row(0, named=True)
    assert mean["se"] == pytest.approx(want["se"], rel=1e-10)  # identity, as above
    # banner columns (pipeline.tables) use the same supplied replicates: a column is a domain of `--by`
    banner = _banner_cells(book).filter((pl.col("variable") == "q1") & pl.col("row_label").is_in(list(codes))
                                        & pl.col("column_label").is_in(["North", "South"]))
    assert banner.height == 6
    for row in banner.iter_rows(named=True):
        region = {"North": 1, "South": 2}[row["column_label"]]
        want = cli.filter((pl.col("statistic") == "proportion") & (pl.col("category") == codes[row["row_label"]])
                          & (pl.col("domain") == f"region={region}")).row(0, named=True)
        assert row["se"] == pytest.approx(want["se"], rel=1e-10)  # identity, as above
    html = book.read_text(encoding="utf-8")
    assert f"the {r} replicate weights supplied with the data (delete-one jackknife)" in html
    assert f"(R-1)/R = {(r - 1) / r:.6g}" in html and f"Degrees of freedom: {r - 1}" in html
    assert "the data&#39;s own weight (wt)" in html or "the data's own weight (wt)" in html


def test_brr_design_df_is_its_number_of_pairs(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    frame, r = _with_replicates(_respondents(2 * H), "brr", np.repeat(np.arange(H), 2))
    assert r > H  # a Hadamard order above H: R - 1 would be the wrong df
    spec = _study(tmp_path, frame, variance=f'replicate_method = "brr"\ndf = {H}')
    book = run_study(spec, quiet=True)
    cells = pl.read_parquet(book.parent / "study_cells.parquet").filter(pl.col("se").is_not_null())
    assert cells.height > 0 and set(cells["df"].to_list()) == {H}  # Wolter 2007 section 3.5 (from memory): pairs
    cli = _cli(tmp_path / "w1.csv", capsys, "--replicate-method", "brr", "--replicate-df", str(H), "--mean", "spend")
    mean = cells.filter((pl.col("variable") == "spend") & (pl.col("statistic") == "mean")).row(0, named=True)
    assert mean["se"] == pytest.approx(cli["se"][0], rel=1e-10)  # identity: BRR multiplier 1/R on the same weights
    spec.write_text(spec.read_text().replace(f"df = {H}\n", ""), encoding="utf-8")
    with pytest.raises(SpecError) as info:
        load_spec(spec)
    assert any(p.message.startswith("variance.df:") and "half-sample pairs" in p.message for p in info.value.problems)


@pytest.mark.parametrize(
    ("variance", "key"),
    [
        ('replicate_method = "sdr"\nfay = 0.5', "fay"),
        ('replicate_method = "fay"', "fay"),
        ('replicate_method = "fay"\nfay = 0.5', "df"),
        ('replicate_method = "sdr"\nmultipliers = [0.5, 0.5]', "multipliers"),
        ('replicate_method = "stratified-jackknife"', "multipliers"),
        ('replicate_method = "sdr"\nmultiplier = -1', "multiplier"),
        ('replicate_method = "sdr"\ncentre = "median"', "centre"),
        ('replicate_method = "stratified-jackknife"\nmultipliers = [0.5, 0.5]\ncentre = "replicate-mean"', "centre"),
        ('replicate_method = "sdr"\ndf = 0', "df"),
        ('replicate_method = "sdr"\nseed = 3', "seed"),
        ('replicate_method = "sdr"\nreplicates = 40', "replicates"),
        ('replicate_method = "half-samples"', "replicate_method"),
        ("", "replicate_method"),
    ],
)
def test_each_refused_option_is_an_error_naming_its_key(tmp_path: Path, variance: str, key: str) -> None:
    frame, _ = _with_replicates(_respondents(PSUS), "jackknife", np.zeros(PSUS, dtype=np.int64))
    spec = _study(tmp_path, frame, variance=variance)
    with pytest.raises(SpecError) as info:
        load_spec(spec)
    assert any(p.message.startswith(f"variance.{key}:") for p in info.value.problems), info.value.render()


def test_pattern_matching_a_spec_column_and_options_of_other_methods_are_refused(tmp_path: Path) -> None:
    frame, _ = _with_replicates(_respondents(PSUS), "jackknife", np.zeros(PSUS, dtype=np.int64))
    spec = _study(tmp_path, frame.rename({"wt": "rw0"}), variance='replicate_method = "jackknife"')
    spec.write_text(spec.read_text().replace('base_weight = "wt"', 'base_weight = "rw0"'), encoding="utf-8")
    with pytest.raises(SpecError) as info:
        load_spec(spec)
    (problem,) = [p for p in info.value.problems if p.message.startswith("variance.replicate_columns:")]
    assert "'rw0' (design.base_weight)" in problem.message
    spec.write_text(spec.read_text().replace('method = "supplied"', 'method = "taylor"'), encoding="utf-8")
    with pytest.raises(SpecError) as info:
        load_spec(spec)
    keys = {p.message.split(":")[0] for p in info.value.problems}
    assert keys == {"variance.replicate_columns", "variance.replicate_method"}


def test_check_reports_replicate_column_problems(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    frame, r = _with_replicates(_respondents(PSUS), "jackknife", np.zeros(PSUS, dtype=np.int64))
    text = frame.with_columns(pl.col(c).cast(pl.String) for c in frame.columns if c.startswith("rw"))
    text = text.with_columns(
        pl.when(pl.int_range(pl.len()) == 4).then(None).otherwise(pl.col("rw3")).alias("rw3"),
        pl.when(pl.int_range(pl.len()) == 7).then(pl.lit("lots")).otherwise(pl.col("rw5")).alias("rw5"),
        pl.when(pl.int_range(pl.len()) == 9).then(pl.lit("-2.5")).otherwise(pl.col("rw2")).alias("rw2"),
    )
    spec = _study(tmp_path, text, variance='replicate_method = "jackknife"')
    problems = {(p.rule, p.column): p for p in check_wave(load_spec(spec), "W1")}
    missing = problems[("bad-replicate-weight", "rw3")]
    assert missing.severity == "error" and missing.line == 6 and missing.examples == ("r0004",)
    assert "missing replicate weights" in missing.message
    number = problems[("bad-replicate-weight", "rw5")]
    assert number.value == "lots" and number.line == 9 and number.examples == ("r0007",)
    negative = problems[("negative-replicate-weight", "rw2")]
    assert negative.severity == "warning" and negative.value == "-2.5" and negative.count == 1
    assert main(["check", str(spec)]) == 1
    err = capsys.readouterr()
    assert "bad-replicate-weight" in err.out + err.err and "rw5" in err.out + err.err
    with pytest.raises(DataError):
        stage_wave(load_spec(spec), "W1", quiet=True)
    assert not (tmp_path / "study.duckdb").exists()  # nothing staged


def test_replicate_counts_must_agree_across_waves_and_the_pattern_must_match(tmp_path: Path) -> None:
    frame, r = _with_replicates(_respondents(PSUS), "jackknife", np.zeros(PSUS, dtype=np.int64))
    spec = _study(tmp_path, frame, variance='replicate_method = "jackknife"')
    frame.drop("psu", "rw12").write_csv(tmp_path / "w2.csv")
    frame.drop("psu").rename({f"rw{k}": f"x{k}" for k in range(1, r + 1)}).write_csv(tmp_path / "w3.csv")
    spec.write_text(spec.read_text().replace('[design]', '[waves.W2]\nlabel = "Wave 2"\nfile = "w2.csv"\n\n'
                                             '[waves.W3]\nlabel = "Wave 3"\nfile = "w3.csv"\n\n[design]'),
                    encoding="utf-8")
    study = load_spec(spec)
    rules = {p.rule: p for p in check_wave(study, "W2")}
    assert "replicate-count-differs" in rules and "W1: 12" in rules["replicate-count-differs"].message
    (none,) = [p for p in check_wave(study, "W3") if p.rule == "no-replicate-columns"]
    assert none.file == str(tmp_path / "w3.csv")


def test_staged_replicates_are_double_design_columns(tmp_path: Path) -> None:
    frame, r = _with_replicates(_respondents(PSUS), "jackknife", np.zeros(PSUS, dtype=np.int64))
    study = load_spec(_study(tmp_path, frame, variance='replicate_method = "jackknife"'))
    stage_wave(study, "W1", quiet=True)
    con = open_database(study, read_only=True)
    try:
        types = table_columns(con, "responses")
        staged = load_responses(con, study, ["W1"], columns=staged_columns(study))
    finally:
        con.close()
    assert staged_columns(study) == [f"replicate_weight_{k}" for k in range(1, r + 1)]
    assert all(types[c] == "DOUBLE" for c in staged_columns(study))
    np.testing.assert_array_equal(staged["replicate_weight_5"].to_numpy(), frame["rw5"].to_numpy())


# The Census Bureau's "PUMS Estimates for User Verification", ACS 2017-2021 5-year, reproduced from a
# study spec: the same characteristics and rounding as tests/test_acs_pums.py (command-line engine).
from test_acs_pums import FOLDER, STATES, characteristic, half_up  # noqa: E402

ACS_SPEC = """\
title = "ACS verification"
respondent_id = "rid"

{waves}
[design]
base_weight = "PWGTP"

[variables.SEX]
label = "Sex"
type = "single"
values = {{ 1 = "Male", 2 = "Female" }}

[variables.AGEP]
label = "Age"
type = "numeric"

[variance]
method = "supplied"
replicate_columns = 'PWGTP\\d+'
replicate_method = "sdr"
"""


@pytest.mark.skipif(not FOLDER.is_dir(), reason=f"reference folder {FOLDER} is absent")
def test_acs_verification_table_from_a_study_spec(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    waves = ""
    for state in sorted(STATES):
        persons = pl.read_csv(FOLDER / f"acs_pums_2017_2021_5yr_person_{state}.csv", infer_schema_length=None)
        persons.with_row_index("rid").write_csv(tmp_path / f"{state}.csv")  # a copy with a row id (the file has none)
        waves += f'[waves.{state}]\nlabel = "{state}"\nfile = "{state}.csv"\n\n'
    spec = tmp_path / "acs.toml"
    spec.write_text(ACS_SPEC.format(waves=waves), encoding="utf-8")
    study = load_spec(spec)
    options = variance_options(study)
    published = pl.read_csv(FOLDER / "pums_estimates_17_21.csv", schema_overrides={"ST": pl.Utf8})
    checked = mismatched = 0
    for state, code in sorted(STATES.items()):
        report = stage_wave(study, state, quiet=True)
        negative = [p for p in report.warnings if p.rule == "negative-replicate-weight"]
        assert bool(negative) == (state in ("VT", "DC"))  # VT and DC files carry negative replicate weights
        con = open_database(study)
        try:
            held = load_responses(con, study, [state],
                                  columns=[*weighting_columns(study), *staged_columns(study), "AGEP", "SEX"])
            recipe, _ = fit_wave(study, state, con=con, data=held)
        finally:
            con.close()
        rows = published.filter(pl.col("ST") == code)
        wanted = {r["CHARACTERISTIC"]: e for r in rows.iter_rows(named=True)
                  if (e := characteristic(r["CHARACTERISTIC"])) is not None}
        frame = held.with_columns(pl.Series("__w", recipe.weights),
                                  *(e.alias(f"c{k}") for k, e in enumerate(wanted.values())))
        table = estimate_table(frame, weight="__w", total=[f"c{k}" for k in range(len(wanted))],
                               **variance_arguments(study, options)).frame
        for k, name in enumerate(wanted):
            row = rows.filter(pl.col("CHARACTERISTIC") == name).row(0, named=True)
            got = table.filter(pl.col("variable") == f"c{k}").row(0, named=True)
            checked += 1
            mismatched += (half_up(got["estimate"]), half_up(got["se"])) != (row["PUMS_EST_17_TO_21"],
                                                                             row["PUMS_SE_17_TO_21"])
    # Census "PUMS Estimates for User Verification" 2017-2021: estimate and SE equal after rounding, 48 of 48
    assert (checked, mismatched) == (48, 0)
    # the run's book numbers on the same staged waves equal `estimate` on the file (identity: the same formula)
    book = run_study(spec, quiet=True)
    cells = pl.read_parquet(book.parent / "acs_cells.parquet").filter(
        (pl.col("banner") == "total") & (pl.col("variable") == "SEX") & (pl.col("statistic") == "percent")
        & pl.col("row_label").is_in(["Male", "Female"]))
    assert cells.height == 2 * len(STATES)
    for state in STATES:
        capsys.readouterr()
        assert main(["estimate", str(tmp_path / f"{state}.csv"), "--weight", "PWGTP", "--proportion", "SEX",
                     "--variance", "supplied", "--replicate-cols", r"PWGTP\d+", "--format", "json", "--quiet"]) == 0
        cli = {r["category"]: r for r in json.loads(capsys.readouterr().out)}
        for row in cells.filter(pl.col("wave") == state).iter_rows(named=True):
            want = cli["1" if row["row_label"] == "Male" else "2"]
            assert row["se"] == pytest.approx(want["se"], rel=1e-10) and row["df"] == 79 == want["df"]


RAKE = '''
[[weighting]]
step = "rake"
margins = ["region"]
totals = { region = { 1 = 0.7, 2 = 0.3 } }
'''


def test_weighting_that_moves_the_supplied_weight_is_flagged(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    frame, r = _with_replicates(_respondents(PSUS), "jackknife", np.zeros(PSUS, dtype=np.int64))
    spec = _study(tmp_path, frame, variance='replicate_method = "jackknife"')
    spec.write_text(spec.read_text().replace("[variance]", RAKE + "\n[variance]"), encoding="utf-8")
    capsys.readouterr()
    book = run_study(spec, quiet=True)
    err = capsys.readouterr().err
    assert "[supplied-replicates-weighting]" in err
    study = load_spec(spec)
    con = open_database(study, read_only=True)
    try:
        final = con.sql("select respondent_id, weight from weights order by respondent_id").pl()
    finally:
        con.close()
    # the largest relative change, computed here from the stored final weights and the file's weight column
    joined = final.join(frame.select(pl.col("id").alias("respondent_id"), "wt"), on="respondent_id")
    change = float((joined["weight"] / joined["wt"] - 1).abs().max())
    assert change > 0.01
    html = " ".join(book.read_text(encoding="utf-8").split())
    assert "Caution: the full-sample weight is the study" in html and f"by up to {100 * change:.3g}% (wave W1)" in html


def test_methodology_says_which_weight_the_supplied_replicates_describe(tmp_path: Path) -> None:
    from pipeline.book.weighting import SuppliedWave, variance_lines

    frame, _ = _with_replicates(_respondents(PSUS), "jackknife", np.zeros(PSUS, dtype=np.int64))
    spec = _study(tmp_path, frame, variance='replicate_method = "fay"\nfay = 0.5\ndf = 40\ncentre = "replicate-mean"')
    study = load_spec(spec)
    text = " ".join(variance_lines(variance_options(study), study, calibrated=False,
                                   supplied={"W1": SuppliedWave(replicates=80, weight_change=0.0)}))
    # Fay 1989: multiplier 1/(R (1-rho)^2) = 1/(80 * 0.25) = 0.05
    assert "the 80 replicate weights supplied with the data (balanced repeated replication with Fay's coefficient 0.5)" in text
    assert "the fay multiplier 1/(R (1-rho)^2) = 0.05" in text and "the mean of the replicate estimates" in text
    assert "Degrees of freedom: 40, as declared (the number of half-sample pairs)" in text
    assert "the study adds no weighting of its own" in text
    spec.write_text(spec.read_text().replace("[variance]", RAKE + "\n[variance]"), encoding="utf-8")
    study = load_spec(spec)
    text = " ".join(variance_lines(variance_options(study), study, calibrated=True,
                                   supplied={"W1": SuppliedWave(replicates=80, weight_change=0.004)}))
    assert "changes that weight by at most 0.4% for any respondent" in text and "Caution" not in text
    assert "Every replicate repeats" not in text


def test_stratified_jackknife_with_its_multipliers_equals_the_generated_one(tmp_path: Path,
                                                                          capsys: pytest.CaptureFixture[str]) -> None:
    from pipeline.estimation import estimate

    psu_stratum = np.repeat(np.arange(4), 3)  # 4 strata of 3 PSUs
    frame, r = _with_replicates(_respondents(PSUS), "stratified-jackknife", psu_stratum)
    frame = frame.with_columns(pl.Series("stratum", psu_stratum[frame["psu"].to_numpy()]))
    generated = estimate(frame, weight="wt", strata="stratum", psu="psu", mean="spend",
                         variance="stratified-jackknife").row(0, named=True)
    multipliers = ", ".join(["0.6666666666666666"] * r)  # (n_h - 1)/n_h = 2/3 (Wolter 2007 section 4.5)
    spec = _study(tmp_path, frame.drop("stratum"),
                  variance=f'replicate_method = "stratified-jackknife"\nmultipliers = [{multipliers}]\ndf = 8')
    book = run_study(spec, quiet=True)
    mean = pl.read_parquet(book.parent / "study_cells.parquet").filter(
        (pl.col("variable") == "spend") & (pl.col("statistic") == "mean")).row(0, named=True)
    # identity: the supplied columns are the generated replicates, with the generated multipliers
    assert mean["se"] == pytest.approx(generated["se"], rel=1e-10) and mean["df"] == 8 == generated["df"]
    cli = _cli(tmp_path / "w1.csv", capsys, "--replicate-method", "stratified-jackknife", "--replicate-df", "8",
               "--replicate-multipliers", ",".join(["0.6666666666666666"] * r), "--mean", "spend")
    assert cli["se"][0] == pytest.approx(generated["se"], rel=1e-10)


def test_help_and_readme_state_each_default(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        main(["estimate", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    for default in ("(default sdr)", "sdr 4/R", "jackknife (R-1)/R", "brr 1/R", "fay 1/(R (1-RHO)^2",
                    "bootstrap 1/R", "stratified-jackknife 1 with --replicate-multipliers",
                    "(default R - 1; brr and fay need it: the number of half-sample pairs",
                    "(full-sample, default)"):
        assert default in text, default
    readme = " ".join((Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8").split())
    for default in ('method = "supplied"', "sdr 4/R, jackknife (R-1)/R,", "default R - 1; brr and fay must give it",
                    'centre = "full-sample"', "required: sdr, jackknife"):
        assert default in readme, default


def test_supplied_replicate_totals_in_blocks_equal_one_product() -> None:
    from pipeline.estimation.replicates import supplied_replicate_totals

    frame, r = _with_replicates(_respondents(PSUS), "jackknife", np.zeros(PSUS, dtype=np.int64))
    quantities = {f"q{k}": (pl.col("spend") * (pl.col("q1") == 1 + k % 3)) for k in range(7)}
    weights = [f"rw{k}" for k in range(1, r + 1)]
    blocks = supplied_replicate_totals(frame, quantities, weights, chunk_bytes=8 * frame.height * 2)  # 2 per block
    direct = frame.select(weights).to_numpy().T @ frame.select(**quantities).cast(pl.Float64).to_numpy()
    np.testing.assert_allclose(blocks, direct, rtol=1e-12)  # identity: the same sums, blocked by quantity


def test_a_finite_population_correction_beside_supplied_replicates_is_refused(tmp_path: Path) -> None:
    frame, _ = _with_replicates(_respondents(PSUS), "jackknife", np.zeros(PSUS, dtype=np.int64))
    spec = _study(tmp_path, frame, variance='replicate_method = "jackknife"')
    spec.write_text(spec.read_text().replace('base_weight = "wt"', 'base_weight = "wt"\npopulation = { all = 5000 }'),
                    encoding="utf-8")
    with pytest.raises(SpecError) as info:
        load_spec(spec)
    assert [p.message.split(":")[0] for p in info.value.problems] == ["design.population"]
