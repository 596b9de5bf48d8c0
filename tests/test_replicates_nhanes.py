"""NHANES 2015-16 (15 pseudo-strata x 2 pseudo-PSUs): replicate SEs against Taylor linearization.

Data: Lohr, Sampling: Design and Analysis, 3rd ed., companion data `nhanes.csv`
(`../shared/reference/lohr_sda3/`, see its SOURCE.md). These checks are CROSS-METHOD CONSISTENCY,
not a published check: BRR, Fay and the stratified jackknife are different estimators of the same
variance, equal to the Taylor with-replacement variance for linear statistics and close to it for
smooth ratios with many PSUs (Rust & Rao 1996 section 4; Wolter 2007 chapters 3-4, from memory).
The Taylor side is `pipeline.estimation.taylor.taylor_variance`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline.estimation.design import PsuLayout
from pipeline.estimation.estimands import Ratios
from pipeline.estimation.replicate_variance import replicate_variance
from pipeline.estimation.replicates import make_replicates, replicate_totals
from pipeline.estimation.taylor import taylor_variance
from pipeline.estimation.totals import group_totals

FILE = Path(__file__).resolve().parents[1].parent / "shared" / "reference" / "lohr_sda3" / "nhanes.csv"

pytestmark = pytest.mark.skipif(not FILE.exists(), reason=f"reference folder {FILE.parent} is absent")


@pytest.fixture(scope="module")
def nhanes():
    frame = pl.read_csv(FILE, infer_schema_length=None)
    adult = (pl.col("ridageyr") >= 20).cast(pl.Float64)
    has_bmi = pl.col("bmxbmi").is_not_null().cast(pl.Float64)
    quantities = {
        "bmi": pl.col("bmxbmi").fill_null(0.0),
        "bmi_answered": has_bmi,
        "obese_adult": (pl.col("bmxbmi") >= 30).fill_null(False).cast(pl.Float64) * adult,
        "bmi_answered_adult": has_bmi * adult,
        "sbp": pl.col("sbp").fill_null(0.0),
        "sbp_answered": pl.col("sbp").is_not_null().cast(pl.Float64),
    }
    gt = group_totals(frame, quantities, weight="wtmec2yr", strata="sdmvstra", psu="sdmvpsu")
    estimands = Ratios([0, 2, 4], [1, 3, 5])  # mean BMI, adult obesity share, mean systolic pressure
    layout = PsuLayout(
        psu_stratum=gt.psu_stratum, stratum_labels=gt.stratum_labels, fraction=np.zeros(gt.n_strata), single_psu="error"
    )
    theta, v_taylor = taylor_variance(gt, estimands, layout)
    return gt, estimands, theta, np.sqrt(v_taylor)


@pytest.mark.parametrize(("method", "rho"), [("brr", 0.0), ("fay", 0.5), ("stratified-jackknife", 0.0), ("jackknife", 0.0)])
def test_replicate_se_close_to_taylor(nhanes, method, rho):
    gt, estimands, theta, se_taylor = nhanes
    assert gt.n_strata == 15 and gt.n_psus == 30
    rf = make_replicates(method, gt.psu_stratum, fay=rho)
    se = np.sqrt(replicate_variance(theta, estimands.value(replicate_totals(gt, rf)), rf))
    # cross-method consistency (not a published check): within 5% of the Taylor SE for BRR/Fay/stratified jackknife;
    # the unstratified jackknife ignores the pairing in strata, so it only agrees to within 25% here
    np.testing.assert_allclose(se, se_taylor, rtol=0.25 if method == "jackknife" else 0.05)
    assert np.all(se > 0)
