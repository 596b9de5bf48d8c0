"""Column and Total tests (pipeline.tables.significance): the core's contrast, textbook reductions, marks."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests
from tables_helpers import cluster_sample, make_study, tabulate

from pipeline.estimation import Ratios, SampleDesign, group_totals, taylor_variance
from pipeline.estimation.options import VarianceOptions
from pipeline.staging.spec import Variable
from pipeline.tables.banners import letter

STUDY = make_study({
    "y": Variable("y", "single", "Y", values={1: "a", 2: "b", 3: "c"}),
    "g": Variable("g", "single", "G", values={1: "g1", 2: "g2", 3: "g3"}),
    "x": Variable("x", "numeric", "X"),
})


def _test(tests: pl.DataFrame, comparison: str, row: int, a: str, b: str, variable: str = "y") -> dict:
    got = tests.filter((pl.col("comparison") == comparison) & (pl.col("variable") == variable)
                       & (pl.col("row") == row) & (pl.col("column_a") == a) & (pl.col("column_b") == b))
    assert got.height == 1
    return got.row(0, named=True)


def test_pair_test_equals_the_cores_linearized_contrast():
    """se of p(y=1 | g=1) - p(y=1 | g=2) equals taylor_variance of the core's Contrast on its own group totals."""
    frame = cluster_sample(np.random.default_rng(11), strata=3, psus=4, per_psu=15, categories=3, groups=3)
    tests = tabulate(frame, STUDY, ("g",)).finish().tests
    quantities = {
        "n1": ((pl.col("y") == 1) & (pl.col("g") == 1)).cast(pl.Float64), "d1": (pl.col("g") == 1).cast(pl.Float64),
        "n2": ((pl.col("y") == 1) & (pl.col("g") == 2)).cast(pl.Float64), "d2": (pl.col("g") == 2).cast(pl.Float64),
        "n0": (pl.col("y") == 1).cast(pl.Float64), "d0": pl.lit(1.0),
    }
    gt = group_totals(frame, quantities, weight="w", strata="h", psu="psu")
    ratios = Ratios(num=[0, 2, 4], den=[1, 3, 5])
    layout = SampleDesign(weight="w", strata="h", psu="psu").layout(gt)
    for row, (i, j), a, b in ((1, (0, 1), "g=1", "g=2"), (1, (0, 2), "g=1", "total")):
        contrast = np.zeros((1, 3))
        contrast[0, i], contrast[0, j] = 1.0, -1.0
        theta, v = taylor_variance(gt, ratios.contrast(contrast), layout)
        got = _test(tests, "columns" if b != "total" else "total", row, a, b)
        np.testing.assert_allclose(got["difference"], 100 * theta[0], rtol=1e-10)
        np.testing.assert_allclose(got["se_difference"], 100 * np.sqrt(v[0]), rtol=1e-9)
        t = theta[0] / np.sqrt(v[0])
        np.testing.assert_allclose(got["statistic"], t, rtol=1e-9)
        np.testing.assert_allclose(got["p_value"], 2 * stats.t.sf(abs(t), got["df_den"]), rtol=1e-9)


def _srs(n: int, seed: int) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    return pl.DataFrame({
        "respondent_id": [f"r{i}" for i in range(n)], "w": np.full(n, 3.0),
        "g": rng.integers(1, 4, n), "y": rng.integers(1, 4, n), "x": rng.normal(10, 2, n),
    })


SRS = make_study(dict(STUDY.variables), strata=None, psu=None)


def test_srs_pair_test_is_the_two_sample_test_of_proportions():
    """SRS, equal weights, two columns with no respondent in common: the design variance of p_a - p_b is

        n/(n-1) [p_a (1 - p_a) / n_a + p_b (1 - p_b) / n_b],

    the unpooled (Wald) variance of the difference of two independent proportions (Fleiss, Levin and Paik
    2003, Statistical Methods for Rates and Proportions, 3rd ed., section 2.5, from memory) times the
    with-replacement factor n/(n-1) of the design formula with every respondent its own PSU: z_i =
    d_ai (y_i - p_a)/n_a - d_bi (y_i - p_b)/n_b sums to 0, and sum z_i^2 is the bracket, the cross term
    vanishing because d_a d_b = 0."""
    frame = _srs(600, 2)
    tests = tabulate(frame, SRS, ("g",)).finish().tests
    y, g, n = frame["y"].to_numpy(), frame["g"].to_numpy(), frame.height
    pa, pb = (y[g == 1] == 2).mean(), (y[g == 3] == 2).mean()
    na, nb = (g == 1).sum(), (g == 3).sum()
    var = n / (n - 1) * (pa * (1 - pa) / na + pb * (1 - pb) / nb)
    got = _test(tests, "columns", 2, "g=1", "g=3")
    np.testing.assert_allclose(got["difference"], 100 * (pa - pb), rtol=1e-12)
    np.testing.assert_allclose(got["se_difference"], 100 * np.sqrt(var), rtol=1e-10)


def test_srs_column_against_total_is_the_part_whole_formula():
    """SRS, equal weights, column a inside the Total T (n_a of n respondents). With z_i = d_i (y_i - p_a)/n_a -
    (y_i - p_T)/n (sum 0):

        sum_i z_i^2 = sum_{i in a} (y_i - p_a)^2 / n_a^2 - 2/(n_a n) sum_{i in a} (y_i - p_a)(y_i - p_T)
                      + sum_i (y_i - p_T)^2 / n^2
                    = p_a q_a / n_a - 2 p_a q_a / n + p_T q_T / n,

    since sum_{i in a} (y_i - p_a)(y_i - p_T) = sum_{i in a} (y_i - p_a)^2 = n_a p_a q_a (the (p_a - p_T) part
    sums to 0 over a). So v(p_a - p_T) = n/(n-1) [p_a q_a (1/n_a - 2/n) + p_T q_T / n]: the part-whole
    variance, smaller than the independent-samples p_a q_a / n_a + p_T q_T / n (a mathematical identity)."""
    frame = _srs(500, 4)
    tests = tabulate(frame, SRS, ("g",)).finish().tests
    y, g, n = frame["y"].to_numpy(), frame["g"].to_numpy(), frame.height
    pa, pt, na = (y[g == 2] == 1).mean(), (y == 1).mean(), (g == 2).sum()
    var = n / (n - 1) * (pa * (1 - pa) * (1 / na - 2 / n) + pt * (1 - pt) / n)
    got = _test(tests, "total", 1, "g=2", "total")
    np.testing.assert_allclose(got["difference"], 100 * (pa - pt), rtol=1e-12)
    np.testing.assert_allclose(got["se_difference"], 100 * np.sqrt(var), rtol=1e-10)


def test_replicate_pair_test_uses_the_replicate_differences():
    """Stratified jackknife: the variance of a difference is the replicate variance of the differences, not v_a + v_b."""
    frame = cluster_sample(np.random.default_rng(5), strata=3, psus=3, per_psu=12, categories=3, groups=3)
    options = VarianceOptions(method="stratified-jackknife")
    result = tabulate(frame, STUDY, ("g",), options=options).finish()
    got = _test(result.tests, "total", 1, "g=1", "total")
    cells = result.cells.filter((pl.col("variable") == "y") & (pl.col("row") == 1))
    se = dict(cells.select("column", "se").iter_rows())
    independent = np.hypot(se["g=1"], se["total"])
    assert got["se_difference"] < independent  # the Total contains the column: positive covariance
    taylor = _test(tabulate(frame, STUDY, ("g",)).finish().tests, "total", 1, "g=1", "total")
    # jackknife and Taylor agree to first order (Wolter 2007 section 4.6, from memory): within 15% here
    np.testing.assert_allclose(got["se_difference"], taylor["se_difference"], rtol=0.15)


def test_letters_mark_the_columns_a_cell_is_higher_than():
    frame = _srs(900, 6).with_columns(
        y=pl.when(pl.col("g") == 1).then(1).otherwise(pl.col("y")))  # g=1 all answer 1
    result = tabulate(frame, SRS, ("g",), low_base=30).finish()
    cells = result.cells.filter((pl.col("variable") == "y") & (pl.col("row") == 1))
    marks = dict(cells.select("column", "sig_higher_than").iter_rows())
    letters = dict(cells.select("column", "letter").iter_rows())
    assert letters == {"total": "", "g=1": "A", "g=2": "B", "g=3": "C"}
    assert marks["g=1"] == "BC"
    assert marks["g=2"] == "" and marks["g=3"] == ""
    assert dict(cells.select("column", "vs_total").iter_rows())["g=1"] == "higher"


def test_letters_are_never_reused_across_breaks():
    assert [letter(i) for i in (0, 1, 25, 26, 27, 51, 52)] == ["A", "B", "Z", "AA", "AB", "AZ", "BA"]
    frame = _srs(300, 1)
    cells = tabulate(frame, SRS, ("g", "y")).finish().cells
    per_column = cells.filter(pl.col("variable") == "x").select("column", "letter").unique()
    lettered = per_column.filter(pl.col("letter") != "")
    assert lettered["letter"].n_unique() == lettered.height == 6


def test_low_base_columns_are_not_tested():
    frame = _srs(200, 3)
    tests = tabulate(frame, SRS, ("g",), low_base=10_000).finish().tests
    assert tests.filter(pl.col("comparison").is_in(["columns", "total"])).height == 0


@pytest.mark.parametrize(("adjust", "method"), [("holm", "holm"), ("bh", "fdr_bh")])
def test_adjusted_p_values_within_a_row_match_statsmodels(adjust, method):
    """Holm (1979) and Benjamini-Hochberg (1995) adjusted p-values equal statsmodels' multipletests, row by row."""
    frame = cluster_sample(np.random.default_rng(9), strata=2, psus=4, per_psu=20, categories=3, groups=3)
    tests = tabulate(frame, STUDY, ("g",), adjust=adjust).finish().tests
    within = tests.filter(pl.col("comparison").is_in(["columns", "total"]) & pl.col("p_value").is_not_null())
    assert within.height
    for _, group in within.group_by(["table", "row"]):
        expected = multipletests(group["p_value"].to_numpy(), method=method)[1]
        np.testing.assert_allclose(group["p_adjusted"].to_numpy(), expected, rtol=1e-12)


def test_two_levels_give_a_lighter_mark():
    frame = cluster_sample(np.random.default_rng(9), strata=2, psus=4, per_psu=20, categories=3, groups=3)
    tests = tabulate(frame, STUDY, ("g",), levels=(0.05, 0.10)).finish().tests
    t = tests.filter(pl.col("p_value").is_not_null())
    assert (t["significant"] == (t["p_adjusted"] < 0.05)).all()
    assert (t["significant_lighter"] == ((t["p_adjusted"] >= 0.05) & (t["p_adjusted"] < 0.10))).all()
