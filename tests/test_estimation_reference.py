"""Estimates and Taylor SEs against the Lohr 3rd ed. companion data (../shared/reference/lohr_sda3).

Each expected value is read from that folder's check_values.csv, whose `status` column says where
it comes from (see its SOURCE.md); the comment beside each assertion repeats it.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline.estimation import estimate

LOHR = Path(__file__).resolve().parents[1].parent / "shared" / "reference" / "lohr_sda3"
pytestmark = pytest.mark.skipif(not LOHR.is_dir(), reason=f"reference folder {LOHR} is absent")


def check(check_id: str) -> dict[str, float]:
    with open(LOHR / "check_values.csv", newline="") as fh:
        for row in csv.DictReader(fh):
            if row["check_id"] == check_id:
                return {"estimate": float(row["estimate"]), "se": float(row["se"]) if row["se"] else np.nan}
    raise KeyError(check_id)


def one(frame: pl.DataFrame, **filters: str) -> dict:
    for key, value in filters.items():
        frame = frame.filter(pl.col(key) == value)
    assert frame.height == 1
    return frame.row(0, named=True)


@pytest.fixture(scope="module")
def agsrs() -> pl.DataFrame:
    return pl.read_csv(LOHR / "agsrs.csv").with_columns(
        w=pl.lit(3078 / 300), N=pl.lit(3078.0), small=(pl.col("acres92") < 200_000).cast(pl.Int64)
    )


def test_agsrs_mean_total_proportion_with_fpc(agsrs: pl.DataFrame) -> None:
    out = estimate(agsrs, weight="w", population_size="N", mean="acres92", total="acres92", proportion="small")
    mean, total = one(out, statistic="mean"), one(out, statistic="total")
    prop = one(out, statistic="proportion", category="1")
    # Lohr, Sampling: Design and Analysis, 3rd ed., ch. 2 SRS agsrs example (check_values agsrs_mean_acres92,
    # textbook_from_memory+reproduced): 297,897.05 / 18,898.43
    exp = check("agsrs_mean_acres92")
    assert mean["estimate"] == pytest.approx(exp["estimate"], rel=1e-9)
    assert mean["se"] == pytest.approx(exp["se"], rel=1e-7)
    # same example, t_299 interval 260,706.26 - 335,087.84 (check_values source_note)
    assert (mean["ci_low"], mean["ci_high"]) == pytest.approx((260706.26, 335087.84), abs=0.01)
    # check_values agsrs_total_acres92 (textbook_from_memory+reproduced): 916,927,110 / 58,169,381
    exp = check("agsrs_total_acres92")
    assert total["estimate"] == pytest.approx(exp["estimate"], rel=1e-8)
    assert total["se"] == pytest.approx(exp["se"], rel=1e-7)
    # check_values agsrs_prop_lt200k (textbook_from_memory+reproduced): 0.51 / 0.027465
    exp = check("agsrs_prop_lt200k")
    assert prop["estimate"] == pytest.approx(exp["estimate"], abs=1e-12)
    assert prop["se"] == pytest.approx(exp["se"], rel=1e-4)
    # SRS with weights N/n: the design effect of every estimate is 1 (mathematical identity)
    assert out["deff"].to_numpy() == pytest.approx(np.ones(out.height), rel=1e-9)


def test_agstrat_mean_total_with_stratum_fpc() -> None:
    sizes = {"NC": 1054, "NE": 220, "S": 1382, "W": 422}  # Lohr 3rd ed. Example 3.2 (SOURCE.md table)
    frame = pl.read_csv(LOHR / "agstrat.csv").with_columns(N=pl.col("region").replace_strict(sizes).cast(pl.Float64))
    out = estimate(frame, weight="strwt", strata="region", population_size="N", mean="acres92", total="acres92", by="region")
    # Lohr 3rd ed. Example 3.2 (check_values agstrat_mean_acres92 / agstrat_total_acres92, textbook_from_memory+reproduced)
    exp = check("agstrat_mean_acres92")
    mean = one(out, statistic="mean", domain="")
    assert mean["estimate"] == pytest.approx(exp["estimate"], rel=1e-9)
    assert mean["se"] == pytest.approx(exp["se"], rel=1e-7)
    exp = check("agstrat_total_acres92")
    total = one(out, statistic="total", domain="")
    assert total["estimate"] == pytest.approx(exp["estimate"], rel=1e-10)
    assert total["se"] == pytest.approx(exp["se"], rel=1e-9)
    assert mean["df"] == 300 - 4  # PSUs minus strata
    # stratum means, Example 3.2 table (check_values agstrat_stratum_*, from memory + reproduced)
    for region in sizes:
        exp = check(f"agstrat_stratum_{region}")
        assert one(out, statistic="mean", domain=f"region={region}")["estimate"] == pytest.approx(exp["estimate"], rel=1e-9)


def test_agstrat_fpc_as_sampling_fraction_equals_population_count() -> None:
    sizes = {"NC": 1054, "NE": 220, "S": 1382, "W": 422}
    n_h = {"NC": 103, "NE": 21, "S": 135, "W": 41}
    frame = pl.read_csv(LOHR / "agstrat.csv")
    by_count = estimate(frame, weight="strwt", strata="region", population_size={k: float(v) for k, v in sizes.items()}, mean="acres92")
    by_fraction = estimate(frame, weight="strwt", strata="region", sampling_fraction={k: n_h[k] / sizes[k] for k in sizes}, mean="acres92")
    # f_h = n_h / N_h: the two spellings of the FPC are the same design (identity)
    assert by_fraction["se"][0] == pytest.approx(by_count["se"][0], rel=1e-12)


@pytest.mark.parametrize(
    ("check_id", "file", "options"),
    [
        # one-stage cluster samples with FPC on PSUs; values "computed_here" in check_values (regression values only)
        # (whole PSUs taken: second_stage_fraction = 1, so no within-PSU term)
        ("gpa_cluster_mean", "gpa.csv", {"weight": "wt", "psu": "suite", "population_size": {"all": 100.0}, "mean": "gpa",
                                         "second_stage_fraction": 1.0}),
        ("algebra_cluster_ratio_mean", "algebra.csv", {"weight": "w", "psu": "class", "population_size": {"all": 187.0},
                                                       "mean": "score", "second_stage_fraction": 1.0}),
        # stratified multistage, with replacement, no FPC: computed_here
        ("syc_mean_age", "syc.csv", {"weight": "finalwt", "strata": "stratum", "psu": "psu", "mean": "age"}),
    ],
)
def test_cluster_designs_regression_values(check_id: str, file: str, options: dict) -> None:
    frame = pl.read_csv(LOHR / file).with_columns(w=pl.lit(187 / 12))
    row = estimate(frame, **options).row(0, named=True)
    exp = check(check_id)  # status computed_here: regression values, not independent evidence
    assert row["estimate"] == pytest.approx(exp["estimate"], rel=1e-6)
    assert row["se"] == pytest.approx(exp["se"], rel=1e-5)


def test_schools_two_stage_one_term_variance() -> None:
    frame = pl.read_csv(LOHR / "schools.csv")
    row = estimate(frame, weight="finalwt", psu="schoolid", population_size={"all": 75.0}, mean="math",
                   second_stage_fraction=1.0).row(0, named=True)
    # check_values schools_twostage_ratio_mean_math (computed_here): mean 33.122948; the one-term
    # (PSU totals only, first-stage FPC) SE is 1.638372 -- what f_2 = 1 (no within-PSU term) gives;
    # the two-term default is tested in test_estimation_two_stage.py
    assert row["estimate"] == pytest.approx(check("schools_twostage_ratio_mean_math")["estimate"], rel=1e-7)
    assert row["se"] == pytest.approx(1.638372, rel=1e-6)


def test_nhanes_obesity_proportion() -> None:
    frame = (
        pl.read_csv(LOHR / "nhanes.csv")
        .filter(pl.col("ridageyr") >= 20)
        .with_columns(obese=pl.when(pl.col("bmxbmi").is_null()).then(None).otherwise((pl.col("bmxbmi") >= 30).cast(pl.Int64)))
    )
    row = one(estimate(frame, weight="wtmec2yr", strata="sdmvstra", psu="sdmvpsu", proportion="obese"), category="1")
    exp = check("nhanes_adult_obesity_crude")  # computed_here (regression value)
    assert row["estimate"] == pytest.approx(exp["estimate"], rel=1e-5)
    assert row["se"] == pytest.approx(exp["se"], rel=1e-4)
    assert row["df"] == 15  # 30 PSUs - 15 strata
    # respondents without a BMI are out of the base, and counted out of n (not silently kept)
    assert row["n"] == frame["bmxbmi"].is_not_null().sum()


def test_cluster_mean_se_equals_statsmodels_cluster_robust_se() -> None:
    import statsmodels.api as sm

    frame = pl.read_csv(LOHR / "algebra.csv").with_columns(w=(pl.col("Mi") / 3.0))
    ours = estimate(frame, weight="w", psu="class", mean="score").row(0, named=True)
    y, w, g = frame["score"].to_numpy(), frame["w"].to_numpy(), frame["class"].to_numpy().astype(int)
    x = np.ones((len(y), 1))
    raw = sm.WLS(y, x, weights=w).fit(cov_type="cluster", cov_kwds={"groups": g, "use_correction": False})
    corrected = sm.WLS(y, x, weights=w).fit(cov_type="cluster", cov_kwds={"groups": g})
    n_psu, n, k = len(np.unique(g)), len(y), 1
    # statsmodels (RegressionResults.get_robustcov_results, cov_type "cluster", use_correction):
    # the uncorrected sandwich is sum_g (sum_i w_i e_i)^2 / (sum w)^2; our with-replacement PSU
    # variance is G/(G-1) times it (mathematical identity)
    assert ours["estimate"] == pytest.approx(raw.params[0], rel=1e-12)
    assert ours["se"] ** 2 == pytest.approx(raw.cov_params()[0, 0] * n_psu / (n_psu - 1), rel=1e-10)
    # statsmodels' default small-sample correction is G/(G-1) * (N-1)/(N-K) (factor from memory;
    # its docs only say "small sample correction"): so ours = corrected * (N-K)/(N-1)
    assert ours["se"] ** 2 == pytest.approx(corrected.cov_params()[0, 0] * (n - k) / (n - 1), rel=1e-10)


def test_design_effects_follow_the_srs_variance_definition() -> None:
    sizes = {"NC": 1054, "NE": 220, "S": 1382, "W": 422}
    frame = pl.read_csv(LOHR / "agstrat.csv").with_columns(
        N=pl.col("region").replace_strict(sizes).cast(pl.Float64), big=(pl.col("acres92") > 500_000).cast(pl.Int64)
    )
    out = estimate(frame, weight="strwt", strata="region", population_size="N", mean="acres92", total="acres92", proportion="big")
    w, y = frame["strwt"].to_numpy(), frame["acres92"].to_numpy()
    n, big_n = len(y), w.sum()
    ybar = (w * y).sum() / big_n
    # Kish 1965 section 8.2 / Lohr 3rd ed. section 7.5 (from memory): v_srs of a mean = (1 - n/N) s_w^2 / n,
    # s_w^2 = n/(n-1) sum w (y - ybar)^2 / sum w; of a total N^2 times that; deff = v_design / v_srs
    s2 = n / (n - 1) * (w * (y - ybar) ** 2).sum() / big_n
    v_srs = (1 - n / big_n) * s2 / n
    mean, total = one(out, statistic="mean"), one(out, statistic="total")
    assert mean["deff"] == pytest.approx(mean["se"] ** 2 / v_srs, rel=1e-10)
    assert total["deff"] == pytest.approx(total["se"] ** 2 / (big_n**2 * v_srs), rel=1e-10)
    assert mean["n_eff"] == pytest.approx(n / mean["deff"], rel=1e-12)
    # a proportion: v_srs = (1 - n/N) p(1-p) n/(n-1) / n
    prop = one(out, statistic="proportion", category="1")
    p = prop["estimate"]
    assert prop["deff"] == pytest.approx(prop["se"] ** 2 / ((1 - n / big_n) * p * (1 - p) / (n - 1)), rel=1e-10)
    # proportional allocation with a stratifier related to y: stratification helps (deff < 1; Lohr ch. 3)
    assert mean["deff"] < 1
