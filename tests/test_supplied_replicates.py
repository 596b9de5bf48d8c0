"""Supplied replicate weights: the method sets the multiplier and df; bad or inapplicable options are errors."""

from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline.cli import main
from pipeline.errors import SpecError
from pipeline.estimation import estimate
from pipeline.estimation.replicates import make_replicates

H = 6  # strata of 2 PSUs each


def _paired(seed: int = 2) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    h = np.repeat(np.arange(H), 20)
    j = np.tile(np.repeat([0, 1], 10), H)
    return pl.DataFrame({"h": h, "j": j, "w": rng.uniform(1, 3, len(h)), "y": rng.normal(5, 2, len(h)) + h * 0.3})


def _with_replicates(frame: pl.DataFrame, method: str, fay: float = 0.0) -> tuple[pl.DataFrame, int]:
    """The generated replicate weights written out as columns rep1..repR (PSU index 2h + j, the layout's order)."""
    psu_stratum = np.repeat(np.arange(H), 2)
    rf = make_replicates(method, psu_stratum, fay=fay, stratum_labels=[str(k) for k in range(H)])
    psu = (frame["h"] * 2 + frame["j"]).to_numpy()
    cols = {f"rep{r + 1}": frame["w"].to_numpy() * rf.factors[r, psu] for r in range(rf.factors.shape[0])}
    return frame.with_columns(**{k: pl.Series(v) for k, v in cols.items()}), rf.factors.shape[0]


@pytest.mark.parametrize(("method", "fay"), [("brr", 0.0), ("fay", 0.5)])
def test_supplied_brr_and_fay_use_the_default_multiplier_and_the_pairs_as_df(method: str, fay: float) -> None:
    frame, r = _with_replicates(_paired(), method, fay)
    generated = estimate(frame, weight="w", strata="h", psu="j", mean="y", variance=method, fay=fay).row(0, named=True)
    assert generated["df"] == H  # BRR and Fay: the number of half-sample pairs (Wolter 2007 section 3.5, from memory)
    supplied = estimate(frame, weight="w", mean="y", variance="supplied", replicate_cols=r"rep\d+",
                        replicate_method=method, fay=fay, replicate_df=H).row(0, named=True)
    # default multiplier 1/R (brr) or 1/(R (1 - rho)^2) (fay) (Wolter 2007 section 3.3 / Fay 1989): the same
    # variance as the generated replicates (identity: the same weights)
    assert supplied["se"] == pytest.approx(generated["se"], rel=1e-10)
    assert supplied["df"] == H and r > H  # not R - 1
    with pytest.raises(SpecError, match="invalid") as info:
        estimate(frame, weight="w", mean="y", variance="supplied", replicate_cols=r"rep\d+", replicate_method=method,
                 fay=fay)
    assert any("half-sample pairs" in p.message for p in info.value.problems)


def test_pattern_matching_the_full_sample_weight_is_an_error(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    frame, _ = _with_replicates(_paired(), "brr")
    frame = frame.rename({"w": "rep0"})
    path = tmp_path / "wave.csv"
    frame.write_csv(path)
    code = main(["estimate", str(path), "--weight", "rep0", "--mean", "y", "--variance", "supplied",
                 "--replicate-cols", r"rep\d+", "--replicate-method", "brr", "--replicate-df", str(H)])
    err = capsys.readouterr().err
    assert code == 1 and "also matches the full-sample weight column 'rep0'" in err


@pytest.mark.parametrize(
    ("extra", "named"),
    [
        (["--variance", "supplied", "--replicate-cols", r"rep\d+", "--fay", "0.3"], "fay applies to the fay method"),
        (["--variance", "supplied", "--replicate-cols", r"rep\d+", "--seed", "3"], "seed applies to"),
        (["--replicate-method", "sdr"], "replicate_method applies to"),
        (["--variance", "stratified-jackknife", "--replicates", "50"], "replicates applies to"),
    ],
)
def test_options_that_do_not_apply_are_errors(tmp_path: Path, capsys: pytest.CaptureFixture[str], extra: list[str],
                                              named: str) -> None:
    frame, _ = _with_replicates(_paired(), "brr")
    path = tmp_path / "wave.csv"
    frame.write_csv(path)
    code = main(["estimate", str(path), "--weight", "w", "--strata", "h", "--psu", "j", "--mean", "y", *extra])
    assert code == 1 and named in capsys.readouterr().err


def test_replicate_method_default_is_sdr_in_help_and_in_use(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        main(["estimate", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "(default sdr)" in text and "sdr 4/R" in text and "jackknife (R-1)/R" in text
    frame, r = _with_replicates(_paired(), "brr")
    path = tmp_path / "wave.csv"
    frame.write_csv(path)
    assert main(["estimate", str(path), "--weight", "w", "--mean", "y", "--variance", "supplied",
                 "--replicate-cols", r"rep\d+"]) == 0
    (row,) = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    sdr = estimate(frame, weight="w", mean="y", variance="supplied", replicate_cols=r"rep\d+",
                   replicate_multiplier=4 / r).row(0, named=True)
    assert float(row["se"]) == pytest.approx(sdr["se"], rel=1e-9)  # SDR multiplier 4/R (Fay & Train 1995)
    assert float(row["df"]) == r - 1
