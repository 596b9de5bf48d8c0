"""The within-PSU term of differences in a two-stage design with a first-stage FPC (pipeline.tables.within)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
from tables_helpers import cluster_sample, layout_rows

from pipeline.estimation.options import VarianceOptions
from pipeline.staging.spec import Design, Study, Variable
from pipeline.tables import Tabulation
from pipeline.tables.spec import BannerSpec, TablesSpec
from pipeline.weighting import fit_recipe

N_H = {"0": 10, "1": 12}  # first-stage population of PSUs per stratum (4 sampled in each)


def _study() -> Study:
    return Study(
        path=Path("/nonexistent/within.toml"), title="t", respondent_id="id", waves=(),
        design=Design(strata="h", psu="psu", population=N_H),
        variables={
            "y": Variable("y", "single", "Y", values={1: "a", 2: "b", 3: "c"}),
            "g": Variable("g", "single", "G", values={1: "g1", 2: "g2", 3: "g3"},
                          nets={"g1 or g2": (1, 2), "g2 or g3": (2, 3)}),
            "m": Variable("m", "multi", "M", items={"m1": "one", "m2": "two"}),
            "x": Variable("x", "numeric", "X"),
        },
    )


def _frame() -> pl.DataFrame:
    rng = np.random.default_rng(21)
    frame = cluster_sample(rng, strata=2, psus=4, per_psu=14, categories=3, groups=3)
    n = frame.height
    return frame.with_columns(m1=pl.Series(rng.integers(0, 2, n)), m2=pl.Series(rng.integers(0, 2, n)))


def _direct(frame: pl.DataFrame, y: np.ndarray, da: np.ndarray, db: np.ndarray) -> float:
    """Two-stage variance of p_a - p_b written out per respondent (Cochran 1977 section 11.9, from memory):
    z_i = da_i (y_i - p_a)/W_a - db_i (y_i - p_b)/W_b, u_i = w_i z_i, U_hj = sum_{i in hj} u_i;
    v = sum_h (1 - f_h) n_h/(n_h-1) sum_j (U_hj - Ubar_h)^2 + sum_h f_h sum_j m_j/(m_j-1) [sum u^2 - U_hj^2/m_j]."""
    w = frame["w"].to_numpy()

    def z(d: np.ndarray) -> np.ndarray:
        if not d.any():  # no second estimate: the variance of p_a alone
            return np.zeros(len(d))
        p = (w * y * d).sum() / (w * d).sum()
        return d * (y - p) / (w * d).sum()

    u = w * (z(da) - z(db))
    h, psu = frame["h"].to_numpy(), frame["psu"].to_numpy()
    v = 0.0
    for s in np.unique(h):
        f = 4 / N_H[s]
        totals, within = [], 0.0
        for j in np.unique(psu[h == s]):
            uj = u[(h == s) & (psu == j)]
            totals.append(uj.sum())
            within += len(uj) / (len(uj) - 1) * ((uj**2).sum() - uj.sum() ** 2 / len(uj))
        totals = np.array(totals)
        v += (1 - f) * len(totals) / (len(totals) - 1) * ((totals - totals.mean()) ** 2).sum() + f * within
    return v


def test_difference_variances_add_the_within_psu_covariance():
    frame = _frame()
    study = _study()
    spec = TablesSpec(low_base=0, suppress_below=0, banners={"default": BannerSpec("default", ("g", "m"))})
    tab = Tabulation(study, spec, VarianceOptions())
    assert tab.within_applies
    recipe = fit_recipe(frame, [], base_weights=frame["w"].to_numpy())
    tab.add_wave("W1", frame, recipe, layout_rows(study))
    result = tab.finish()
    g, y = frame["g"].to_numpy(), frame["y"].to_numpy()
    m1, m2 = frame["m1"].to_numpy(), frame["m2"].to_numpy()
    domains = {"total": np.ones(len(g)), "g=1": g == 1, "g=2": g == 2, "g:g1 or g2": g <= 2, "g:g2 or g3": g >= 2,
               "m=m1": m1 == 1, "m=m2": m2 == 1}
    cases = [("total", "g=1", "total"), ("columns", "g=1", "g=2"), ("columns", "g=1", "g:g1 or g2"),
             ("columns", "g:g1 or g2", "g:g2 or g3"), ("columns", "m=m1", "m=m2"), ("total", "m=m2", "total")]
    for comparison, a, b in cases:
        got = result.tests.filter((pl.col("comparison") == comparison) & (pl.col("variable") == "y")
                                  & (pl.col("row") == 2) & (pl.col("column_a") == a) & (pl.col("column_b") == b))
        assert got.height == 1, (a, b)
        direct = _direct(frame, (y == 2).astype(float), domains[a].astype(float), domains[b].astype(float))
        np.testing.assert_allclose(got["se_difference"][0], 100 * np.sqrt(direct), rtol=1e-9, err_msg=f"{a} - {b}")
    cell = result.cells.filter((pl.col("variable") == "y") & (pl.col("row") == 2) & (pl.col("column") == "g=2"))
    zero = np.zeros(len(g))
    np.testing.assert_allclose(cell["se"][0], 100 * np.sqrt(_direct(frame, (y == 2).astype(float),
                                                                    (g == 2).astype(float), zero)), rtol=1e-9)


def test_joint_covariance_outer_product_form_equals_the_general_cross_moments():
    """`joint_covariance_terms` (outer-product form for disjoint numerators over one joint base) equals
    `covariance_terms` on the products named by `WavePlan.joint_cross`, pair by pair (an algebraic identity)."""
    from pipeline.tables.tabulation import design_inputs, wave_frame
    from pipeline.tables.banners import build_banner
    from pipeline.tables.cells import plan_wave
    from pipeline.tables.fit import fit_wave

    frame = _frame()
    study = _study()
    spec = TablesSpec(low_base=0, suppress_below=0, banners={"default": BannerSpec("default", ("g",))})
    recipe = fit_recipe(frame, [], base_weights=frame["w"].to_numpy())
    wp = plan_wave(study, spec, {"default": build_banner(study, spec.banners["default"])}, layout_rows(study),
                   cross_cells=True)
    rows = wave_frame(frame, recipe).with_columns(list(wp.derived.values()))
    state = fit_wave(rows, wp.plan, wp.medians, design_inputs(study, recipe, VarianceOptions()), weight="__base_weight")
    (_, _, idx), = [v for k, v in wp.joints.items() if k[0] == "y"]
    flat = idx.ravel()
    k = len(flat)
    general = state.within.covariance_terms(np.repeat(flat, k), np.tile(flat, k), state.cross(wp.joint_cross(flat)))
    outer = state.within.joint_covariance_terms(flat).reshape(-1, k * k)
    np.testing.assert_allclose(outer, general, rtol=1e-10, atol=1e-18)
