"""Banner cells (pipeline.tables.cells) against an independent numpy computation of domain estimates."""

from __future__ import annotations

import numpy as np
import polars as pl
from hypothesis import given, settings
from hypothesis import strategies as st
from tables_helpers import cluster_sample, make_study, tabulate

from pipeline.staging.spec import Variable


def _numpy_domain(frame: pl.DataFrame, y: np.ndarray, d: np.ndarray) -> tuple[float, float]:
    """Domain ratio R = sum w y d / sum w d and its with-replacement linearization variance, written out directly:
    z_i = d_i (y_i - R) / sum w d, PSU totals z_hj = sum w_i z_i, v = sum_h n_h/(n_h-1) sum_j (z_hj - zbar_h)^2
    (Lohr 2022, Sampling: Design and Analysis, 3rd ed., section 9.1 with domains as in section 4.3, from memory)."""
    w = frame["w"].to_numpy()
    den = (w * d).sum()
    r = (w * y * d).sum() / den
    z = w * d * (y - r) / den
    psu = (frame["h"] + "/" + frame["psu"]).to_numpy()
    h_of = dict(zip(psu, frame["h"].to_numpy(), strict=True))
    labels, inv = np.unique(psu, return_inverse=True)
    zt = np.bincount(inv, weights=z)
    strata = np.array([h_of[p] for p in labels])
    v = 0.0
    for h in np.unique(strata):
        zh = zt[strata == h]
        v += len(zh) / (len(zh) - 1) * ((zh - zh.mean()) ** 2).sum()
    return r, v


STUDY = make_study({
    "y": Variable("y", "single", "Y", values={1: "a", 2: "b", 3: "c", 4: "d"}),
    "g": Variable("g", "single", "G", values={1: "g1", 2: "g2", 3: "g3"}, nets={"g1 or g2": (1, 2)}),
    "x": Variable("x", "numeric", "X"),
})


@settings(max_examples=6, deadline=None)
@given(seed=st.integers(0, 10_000), strata=st.integers(2, 3), psus=st.integers(2, 4))
def test_cells_equal_an_independent_numpy_domain_computation(seed, strata, psus):
    rng = np.random.default_rng(seed)
    frame = cluster_sample(rng, strata=strata, psus=psus, per_psu=12, categories=4, groups=3)
    cells = tabulate(frame, STUDY, ("g",)).finish().cells
    g = frame["g"].to_numpy()
    domains = {"total": np.ones(frame.height), "g=1": g == 1, "g=2": g == 2, "g=3": g == 3,
               "g:g1 or g2": (g == 1) | (g == 2)}
    y = frame["y"].to_numpy()
    x = frame["x"].to_numpy()
    for column, d in domains.items():
        d = d.astype(float)
        for code in (1, 2, 3, 4):
            r, v = _numpy_domain(frame, (y == code).astype(float), d)
            row = cells.filter((pl.col("variable") == "y") & (pl.col("column") == column) & (pl.col("row") == code))
            np.testing.assert_allclose(row["estimate"][0], 100 * r, rtol=1e-10, atol=1e-10)
            np.testing.assert_allclose(row["se"][0], 100 * np.sqrt(v), rtol=1e-8, atol=1e-10)
        r, v = _numpy_domain(frame, x, d)
        row = cells.filter((pl.col("variable") == "x") & (pl.col("column") == column) & (pl.col("statistic") == "mean"))
        np.testing.assert_allclose(row["estimate"][0], r, rtol=1e-10)
        np.testing.assert_allclose(row["se"][0], np.sqrt(v), rtol=1e-8)
        base = cells.filter((pl.col("variable") == "y") & (pl.col("column") == column) & (pl.col("row") == 1))
        assert base["base_unweighted"][0] == int(d.sum())
        np.testing.assert_allclose(base["base_weighted"][0], (frame["w"].to_numpy() * d).sum(), rtol=1e-12)


def test_domain_df_counts_psus_and_strata_with_members():
    """A column living in one stratum's PSUs gets PSUs-with-members minus strata-with-members (at least 1)."""
    rng = np.random.default_rng(3)
    frame = cluster_sample(rng, strata=3, psus=4, per_psu=10, categories=4, groups=3)
    frame = frame.with_columns(g=pl.when(pl.col("h") == "0").then(1).otherwise(pl.col("g").clip(2, 3)))
    cells = tabulate(frame, STUDY, ("g",)).finish().cells
    df = dict(cells.filter((pl.col("variable") == "y") & (pl.col("row") == 1)).select("column", "df").iter_rows())
    assert df["total"] == 12 - 3  # design df: PSUs minus strata
    assert df["g=1"] == 4 - 1  # only stratum 0's four PSUs
    assert df["g=2"] == 8 - 2


def test_empty_banner_column_is_an_empty_column_with_a_note():
    rng = np.random.default_rng(5)
    frame = cluster_sample(rng, strata=2, psus=3, per_psu=10, categories=4, groups=2)  # nobody in g=3
    tab = tabulate(frame, STUDY, ("g",), low_base=5, suppress_below=2)
    cells = tab.finish().cells
    empty = cells.filter(pl.col("column") == "g=3")
    assert empty.height > 0
    assert empty["estimate"].null_count() == empty.height
    assert set(empty["flags"]) == {"empty-column"}
    assert set(empty["note"]) == {"no respondents in this column"}


def test_suppressed_and_low_base_flags():
    rng = np.random.default_rng(8)
    frame = cluster_sample(rng, strata=2, psus=3, per_psu=20, categories=4, groups=3)
    cells = tabulate(frame, STUDY, ("g",), low_base=60, suppress_below=30).finish().cells
    rows = cells.filter((pl.col("variable") == "y") & (pl.col("row") == 1))
    for n, flags, est in rows.select("base_unweighted", "flags", "estimate").iter_rows():
        if n is None:
            assert "suppressed" in flags and est is None
        else:
            assert ("low-base" in flags) == (n < 60)
            assert n >= 30
    numbers = ["estimate", "se", "ci_low", "ci_high", "df", "deff", "base_unweighted", "base_weighted",
               "base_effective"]
    hidden = cells.filter(pl.col("flags").str.contains("suppressed"))
    assert hidden.height > 0
    assert hidden.select(pl.sum_horizontal(pl.col(numbers).is_not_null())).to_series().sum() == 0


def test_own_break_is_dropped_from_a_variables_table():
    rng = np.random.default_rng(1)
    frame = cluster_sample(rng, strata=2, psus=3, per_psu=10, categories=4, groups=3)
    cells = tabulate(frame, STUDY, ("g", "y")).finish().cells
    assert not cells.filter((pl.col("variable") == "g") & (pl.col("break_variable") == "g")).height
    assert cells.filter((pl.col("variable") == "g") & (pl.col("break_variable") == "y")).height
