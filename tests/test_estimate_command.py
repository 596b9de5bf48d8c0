"""`wavebook estimate`: output rows and formats, replicate options, exit codes for bad input."""

from __future__ import annotations

import csv
import io
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline.cli import main
from pipeline.estimation import estimate

ROOT = Path(__file__).resolve().parents[1]
LOHR = ROOT.parent / "shared" / "reference" / "lohr_sda3"


def invented(seed: int = 1, n: int = 120) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    h = rng.integers(0, 3, n)
    return pl.DataFrame(
        {
            "region": np.array(["north", "south", "west"])[h],
            "area": h * 10 + rng.integers(0, 4, n),  # unique across regions
            "local": rng.integers(0, 4, n),  # restarts within each region (within-stratum ids)
            "wt": rng.uniform(1, 3, n),
            "spend": rng.gamma(2, 20, n).round(2),
            "visits": rng.integers(1, 6, n),
            "brand": rng.choice(["Alder", "Birch", "Cedar"], n),
        }
    )


def run_cli(args: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    # full-precision CSV (the default rounds to 10 significant digits), compared with the API at 1e-12
    code = main(["estimate", *args, *([] if "--digits" in args else ["--digits", "all"])])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_csv_rows_match_the_api(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    frame = invented()
    path = tmp_path / "wave.csv"
    frame.write_csv(path)
    code, out, _ = run_cli(
        [str(path), "--weight", "wt", "--strata", "region", "--psu", "area", "--mean", "spend",
         "--proportion", "brand", "--ratio", "spend", "visits", "--by", "region", "--level", "0.9"],
        capsys,
    )
    assert code == 0
    rows = list(csv.DictReader(io.StringIO(out)))
    # the columns the command promises (README, `wavebook estimate --help`), plus the NA reason
    assert tuple(rows[0]) == ("statistic", "variable", "category", "domain", "estimate", "se", "ci_low", "ci_high",
                              "df", "deff", "n", "n_eff", "reason")
    api = estimate(frame, weight="wt", strata="region", psu="area", mean="spend", proportion="brand",
                   ratio=("spend", "visits"), by="region", level=0.9)
    assert len(rows) == api.height == (1 + 3 + 1) * 4
    for row, expected in zip(rows, api.iter_rows(named=True), strict=True):
        assert row["domain"] == expected["domain"] and row["category"] == expected["category"]
        for col in ("estimate", "se", "ci_low", "ci_high", "deff", "n_eff"):
            assert float(row[col]) == pytest.approx(expected[col], rel=1e-12)
    assert {r["domain"] for r in rows} == {"", "region=north", "region=south", "region=west"}
    assert {r["category"] for r in rows if r["statistic"] == "proportion"} == {"Alder", "Birch", "Cedar"}
    assert all(r["category"] == "" for r in rows if r["statistic"] != "proportion")


@pytest.mark.skipif(not LOHR.is_dir(), reason=f"reference folder {LOHR} is absent")
def test_json_output_on_parquet_with_fpc(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    frame = pl.read_csv(LOHR / "agsrs.csv").with_columns(w=pl.lit(3078 / 300), N=pl.lit(3078))
    path = tmp_path / "agsrs.parquet"
    frame.write_parquet(path)
    code, out, _ = run_cli([str(path), "--weight", "w", "--population-size", "N", "--mean", "acres92", "--format", "json"], capsys)
    assert code == 0
    (row,) = json.loads(out)
    # Lohr, Sampling: Design and Analysis, 3rd ed., ch. 2 agsrs example (check_values agsrs_mean_acres92)
    assert row["estimate"] == pytest.approx(297897.0467, abs=1e-4)
    assert row["se"] == pytest.approx(18898.4344, abs=1e-4)
    assert row["df"] == 299 and row["n"] == 300 and row["category"] == "" and row["domain"] == ""


def test_supplied_jackknife_weights_equal_generated_jackknife(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    frame = invented(3)
    psus = frame["area"].unique().sort().to_list()
    r = len(psus)
    # delete-one-PSU jackknife weights written out by hand (Wolter 2007 section 4.2, from memory)
    rep = {f"rw{k + 1}": pl.when(pl.col("area") == p).then(0.0).otherwise(pl.col("wt") * r / (r - 1)) for k, p in enumerate(psus)}
    path = tmp_path / "wave.csv"
    frame.with_columns(**rep, rw1x=pl.lit(1.0)).write_csv(path)
    code, out, _ = run_cli(
        [str(path), "--weight", "wt", "--mean", "spend", "--variance", "supplied",
         "--replicate-cols", r"rw\d+", "--replicate-multiplier", str((r - 1) / r)],
        capsys,
    )
    assert code == 0
    (row,) = list(csv.DictReader(io.StringIO(out)))
    generated = estimate(frame, weight="wt", psu="area", mean="spend", variance="jackknife").row(0, named=True)
    # the same replicates: identical variance (identity); rw1x is not matched (whole-name match)
    assert float(row["se"]) == pytest.approx(generated["se"], rel=1e-10)
    assert float(row["df"]) == r - 1


def test_quantile_and_replicate_method(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "wave.csv"
    invented(4).write_csv(path)
    code, out, _ = run_cli(
        [str(path), "--weight", "wt", "--strata", "region", "--psu", "area", "--quantile", "spend", "0.5",
         "--variance", "bootstrap", "--replicates", "50", "--seed", "7"],
        capsys,
    )
    assert code == 0
    (row,) = list(csv.DictReader(io.StringIO(out)))
    assert row["statistic"] == "quantile" and row["category"] == "0.5"
    assert float(row["ci_low"]) <= float(row["estimate"]) <= float(row["ci_high"])


def test_bad_input_exits_1_with_every_problem(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "wave.csv"
    invented().write_csv(path)
    code, _, err = run_cli([str(path), "--weight", "weight", "--mean", "nope", "--by", "age"], capsys)
    assert code == 1
    assert all(f"column '{c}'" in err for c in ("weight", "nope", "age")) and str(path) in err
    code, _, err = run_cli([str(tmp_path / "absent.csv"), "--weight", "wt", "--mean", "spend"], capsys)
    assert code == 1 and "absent.csv" in err
    other = tmp_path / "wave.xlsx"
    other.write_text("x")
    code, _, err = run_cli([str(other), "--weight", "wt", "--mean", "spend"], capsys)
    assert code == 1 and ".csv or .parquet" in err
    code, _, err = run_cli([str(path), "--weight", "wt", "--strata", "region", "--mean", "spend", "--psu", "local",
                            "--psu-ids", "unique"], capsys)
    assert code == 1 and "psu-in-several-strata" in err and "within-stratum" in err
    code, _, err = run_cli([str(path), "--weight", "wt", "--quantile", "spend", "half", "--level", "95"], capsys)
    assert code == 2 and "not a number" in err and "--level" in err  # option values: a usage error


def test_command_module_imports_no_heavy_library() -> None:
    probe = "import sys, pipeline.commands.estimate; print(sorted(m for m in ('polars', 'numpy', 'scipy', 'duckdb') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, cwd=ROOT, check=True).stdout
    assert out.strip() == "[]"


def test_command_choices_are_the_library_choices() -> None:
    from pipeline.commands import estimate as command
    from pipeline.estimation.api import VARIANCE_METHODS
    from pipeline.estimation.design import SINGLE_PSU_POLICIES

    assert command.VARIANCE_METHODS == VARIANCE_METHODS
    assert command.SINGLE_PSU_POLICIES == SINGLE_PSU_POLICIES


def _se(out: str) -> float:
    (row,) = list(csv.DictReader(io.StringIO(out)))
    return float(row["se"])


def test_sampling_fraction_as_number_or_column_and_population_size(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Without --psu each respondent is a PSU, so an FPC multiplies every stratum's variance by
    (1 - f_h): with one f for all strata the SE is sqrt(1 - f) times the with-replacement SE (identity)."""
    frame = invented(5).with_columns(f=pl.lit(0.1), N=pl.lit(1000))
    path = tmp_path / "wave.csv"
    frame.write_csv(path)
    common = [str(path), "--weight", "wt", "--strata", "region", "--mean", "spend"]
    code, plain, _ = run_cli(common, capsys)
    assert code == 0
    code, by_number, _ = run_cli([*common, "--sampling-fraction", "0.1"], capsys)
    assert code == 0
    code, by_column, _ = run_cli([*common, "--sampling-fraction", "f"], capsys)
    assert code == 0
    assert _se(by_number) == pytest.approx(np.sqrt(0.9) * _se(plain), rel=1e-12)
    assert _se(by_column) == pytest.approx(_se(by_number), rel=1e-12)
    one_stratum = [str(path), "--weight", "wt", "--mean", "spend"]
    code, plain, _ = run_cli(one_stratum, capsys)
    code, by_size, _ = run_cli([*one_stratum, "--population-size", "1000"], capsys)
    assert code == 0
    code, by_size_column, _ = run_cli([*one_stratum, "--population-size", "N"], capsys)
    assert code == 0
    assert _se(by_size) == pytest.approx(np.sqrt(1 - frame.height / 1000) * _se(plain), rel=1e-12)
    assert _se(by_size_column) == pytest.approx(_se(by_size), rel=1e-12)
    code, _, err = run_cli([*common, "--population-size", "1000"], capsys)
    assert code == 1 and "one per stratum" in err
    with pytest.raises(SystemExit) as info:
        main(["estimate", *common, "--population-size", "N", "--sampling-fraction", "f"])
    assert info.value.code == 2
    assert "not allowed with argument" in capsys.readouterr().err


def test_single_psu_collapse_with_partner_strata(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    frame = invented(6)
    lone = frame.filter(pl.col("region") == "west")["area"].min()
    frame = frame.filter((pl.col("region") != "west") | (pl.col("area") == lone))  # west keeps one PSU
    path = tmp_path / "wave.csv"
    frame.write_csv(path)
    common = [str(path), "--weight", "wt", "--strata", "region", "--psu", "area", "--total", "spend"]
    code, _, err = run_cli(common, capsys)
    assert code == 1 and "single-psu" in err and "collapse" in err
    code, out, _ = run_cli([*common, "--single-psu", "collapse", "--collapse-with", "west=south"], capsys)
    assert code == 0
    api = estimate(frame, weight="wt", strata="region", psu="area", total="spend", single_psu="collapse",
                   collapse_with={"west": "south"}).row(0, named=True)
    assert _se(out) == pytest.approx(api["se"], rel=1e-12)
    code, _, err = run_cli([*common, "--single-psu", "grand-mean"], capsys)
    assert code == 0
    code, _, err = run_cli([*common, "--collapse-with", "west=south"], capsys)
    assert code == 2 and "--collapse-with needs --single-psu collapse" in err  # contradicting options: usage
    code, _, err = run_cli([*common, "--single-psu", "collapse", "--collapse-with", "west"], capsys)
    assert code == 2 and "STRATUM=PARTNER" in err  # a malformed option value: usage
