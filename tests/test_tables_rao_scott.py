"""Rao-Scott second-order corrected test of independence, F form (pipeline.tables.rao_scott)."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from scipy import stats
from tables_helpers import cluster_sample, make_study, tabulate

from pipeline.staging.spec import Variable
from pipeline.tables.rao_scott import rao_scott

VARIABLES = {
    "y": Variable("y", "single", "Y", values={1: "a", 2: "b", 3: "c", 4: "d"}),
    "g": Variable("g", "single", "G", values={1: "g1", 2: "g2", 3: "g3"}),
}


def _independence(tests: pl.DataFrame) -> dict:
    got = tests.filter((pl.col("comparison") == "independence") & (pl.col("variable") == "y"))
    assert got.height == 1
    return got.row(0, named=True)


def test_srs_equal_weights_factor_is_one_and_statistic_is_pearsons_chi_square():
    """Under SRS with equal weights every generalized design effect is 1 (a2 = 0), so F * k is Pearson's
    chi-square of the counts: scipy.stats.chi2_contingency(correction=False) is the reference."""
    rng = np.random.default_rng(4)
    n = 800
    g = rng.integers(1, 4, n)
    y = np.where(rng.random(n) < 0.2 + 0.1 * g, 1, rng.integers(2, 5, n))
    frame = pl.DataFrame({"respondent_id": [f"r{i}" for i in range(n)], "w": np.full(n, 2.5), "g": g, "y": y})
    tests = tabulate(frame, make_study(VARIABLES, strata=None, psu=None), ("g",)).finish().tests
    got = _independence(tests)
    counts = np.array([[np.sum((y == a) & (g == b)) for b in (1, 2, 3)] for a in (1, 2, 3, 4)])
    chi2, p, dof, _ = stats.chi2_contingency(counts, correction=False)
    k = (4 - 1) * (3 - 1)
    np.testing.assert_allclose(got["df_num"], k, rtol=1e-9)  # nu = k / (1 + a2) with a2 = 0
    np.testing.assert_allclose(got["statistic"] * k, chi2, rtol=1e-9)
    np.testing.assert_allclose(got["df_den"], k * (n - 1), rtol=1e-9)  # design df of an SRS: n - 1


def test_mean_design_effect_and_a2_on_srs_matrices():
    """Directly: V = P gives delta = 1 and a2 = 0; V = 2P gives delta = 2, F = X2 / (2k) (the definition)."""
    p = np.array([[0.1, 0.2], [0.3, 0.4]])
    flat = p.ravel()
    n = 200
    srs = (np.diag(flat) - np.outer(flat, flat)) / (n - 1)
    one = rao_scott(p, srs, n, 50.0)
    two = rao_scott(p, 2 * srs, n, 50.0)
    assert one is not None and two is not None
    np.testing.assert_allclose([one.mean_deff, one.a2, two.mean_deff, two.a2], [1.0, 0.0, 2.0, 0.0], atol=1e-12)
    np.testing.assert_allclose(two.statistic, one.pearson / 2, rtol=1e-12)


def test_clustered_design_corrects_the_statistic_downwards():
    """Both variables clustered by PSU: the mean generalized design effect exceeds 1, so F < X2 / k, with X2
    Pearson's statistic on the weighted proportions (module docstring) computed here directly."""
    frame = cluster_sample(np.random.default_rng(2), strata=2, psus=6, per_psu=25, categories=4, groups=3)
    frame = frame.with_columns(g=pl.when(pl.col("psu").cast(pl.Int64) % 3 == 0).then(1).otherwise(pl.col("g")))
    tests = tabulate(frame, make_study(VARIABLES), ("g",)).finish().tests
    got = _independence(tests)
    w, y, g = frame["w"].to_numpy(), frame["y"].to_numpy(), frame["g"].to_numpy()
    p = np.array([[w[(y == a) & (g == b)].sum() for b in (1, 2, 3)] for a in (1, 2, 3, 4)]) / w.sum()
    p = p[p.sum(axis=1) > 0]
    expected = np.outer(p.sum(axis=1), p.sum(axis=0))
    pearson = frame.height * ((p - expected) ** 2 / expected).sum()
    k = (p.shape[0] - 1) * (p.shape[1] - 1)
    assert got["statistic"] * k < 0.9 * pearson
    assert 0 < got["df_num"] <= k


def test_empty_cells_leave_the_srs_design_effects_at_one():
    """Two empty cells inside a 3 x 4 table make H P H' singular; with V = P (SRS, equal weights) every
    generalized design effect of the contrasts P identifies is still exactly 1 (an identity), so the
    statistic is Pearson's X2 over their number, never noise amplified by a singular solve."""
    p = np.array([[0.10, 0.0, 0.08, 0.12], [0.05, 0.15, 0.0, 0.10], [0.10, 0.05, 0.12, 0.13]])
    n = 400
    flat = p.ravel()
    result = rao_scott(p, (np.diag(flat) - np.outer(flat, flat)) / (n - 1), n, 30.0)
    assert result is not None
    assert result.mean_deff == pytest.approx(1.0, rel=1e-9) and result.a2 == pytest.approx(0.0, abs=1e-9)
    expected = np.outer(p.sum(axis=1), p.sum(axis=0))
    pearson = n * ((p - expected) ** 2 / expected).sum()
    assert result.pearson == pytest.approx(pearson, rel=1e-12)
    assert 1 <= result.df_num <= 6 and result.statistic == pytest.approx(pearson / result.df_num, rel=1e-9)
