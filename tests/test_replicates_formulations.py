"""The exact formulations of re-weighted replicate totals agree to floating-point rounding.

`replicate_totals(..., how=...)` computes t_rk = sum_g a_r(j_g) f_r(c_g) Y[g, k] by a sparse
correction, by the (PSU, class) layout product or by the (R, G) group product. The reference here
is that definition written out directly over groups (one einsum); the respondent-level reference
(replicate raking row by row) is in tests/test_replicates_reweight.py.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.estimation.replicates import (
    FORMULATIONS,
    _class_by_psu,
    _psu_class_layout,
    make_replicates,
    replicate_totals,
)
from pipeline.estimation.totals import group_totals

QUANTITIES = {
    "one": pl.lit(1.0),
    "y": pl.col("y"),
    "centred": pl.col("y") - 3.0,  # signed, so totals can be small next to their terms
    "q": pl.col("q"),
}


def make_frame(sizes: list[list[int]], n_classes: int, seed: int) -> pl.DataFrame:
    """Invented respondents: sizes[h][j] respondents in PSU j of stratum h, classes 0..n_classes-1."""
    rng = np.random.default_rng(seed)
    stratum = np.repeat(np.arange(len(sizes)), [sum(s) for s in sizes])
    psu = np.concatenate([np.repeat(np.arange(len(s)), s) for s in sizes])
    n = len(psu)
    return pl.DataFrame(
        {
            "stratum": stratum,
            "psu": psu,
            "w0": rng.uniform(1.0, 9.0, n),
            "cls": rng.integers(0, n_classes, n),
            "y": rng.gamma(2.0, 1.5, n),
            "q": (rng.random(n) < 0.4).astype(np.float64),
        }
    )


def smooth_reweight(b: np.ndarray) -> np.ndarray:
    """A replicate-specific class factor that is finite for empty classes: (R, C) -> (R, C)."""
    return 1.0 + b / (1.0 + b.sum(axis=1, keepdims=True)) + 0.01 * np.sin(b)


def direct_totals(gt, factors: np.ndarray) -> np.ndarray:
    """The definition, summed over groups: t_rk = sum_g a_r(j_g) f_r(c_g) Y[g, k]."""
    f = smooth_reweight(factors @ _class_by_psu(gt, gt.totals[:, gt.column("one")]))
    return np.einsum("rg,rg,gk->rk", factors[:, gt.psu], f[:, gt.cls], gt.totals)


def close(actual: np.ndarray, expected: np.ndarray) -> None:
    # floating-point rounding only: 1e-12 relative to the largest total of each quantity
    scale = np.abs(expected).max(axis=0, keepdims=True)
    error = np.abs(actual - expected)
    assert np.all(error <= 1e-12 * scale), f"largest error {error.max():.3g}, scales {scale.ravel()}"


@settings(max_examples=60, deadline=None)
@given(
    sizes=st.lists(st.lists(st.integers(1, 25), min_size=2, max_size=4), min_size=1, max_size=5),
    n_classes=st.integers(1, 7),
    method=st.sampled_from(["stratified-jackknife", "jackknife", "bootstrap", "brr", "fay"]),
    seed=st.integers(0, 2**16),
)
def test_every_formulation_equals_the_group_sum(sizes, n_classes, method, seed):
    if method in ("brr", "fay"):
        sizes = [s[:2] for s in sizes]  # BRR needs exactly 2 PSUs per stratum
    frame = make_frame(sizes, n_classes, seed)
    gt = group_totals(frame, QUANTITIES, weight="w0", strata="stratum", psu="psu", classes="cls")
    rf = make_replicates(method, gt.psu_stratum, replicates=40, seed=seed, fay=0.3 if method == "fay" else 0.0)
    expected = direct_totals(gt, rf.factors)
    # identity: each formulation is an exact rearrangement of the group sum (replicate_totals docstring)
    for how in ("auto", *FORMULATIONS):
        close(replicate_totals(gt, rf, reweight=smooth_reweight, base="one", how=how), expected)
    # one replicate per chunk: chunking changes nothing
    for how in ("layout", "groups"):
        close(replicate_totals(gt, rf, reweight=smooth_reweight, base="one", how=how, chunk_bytes=1), expected)


def test_layout_is_a_view_of_a_full_grid_and_fills_zeros_otherwise():
    full = group_totals(make_frame([[60, 70], [65, 80]], 3, seed=1), QUANTITIES, weight="w0",
                        strata="stratum", psu="psu", classes="cls")
    assert len(full.psu) == full.n_psus * full.n_classes  # 60+ respondents over 3 classes: every cell is filled
    layout = _psu_class_layout(full, full.n_classes)
    assert np.shares_memory(layout, full.totals)
    # identity: row j, block c of the layout is the group (j, c)
    np.testing.assert_array_equal(layout.reshape(full.n_psus, full.n_classes, -1)[full.psu, full.cls], full.totals)

    sparse = group_totals(make_frame([[2, 3], [1, 2]], 6, seed=2), QUANTITIES, weight="w0",
                          strata="stratum", psu="psu", classes="cls")
    layout = _psu_class_layout(sparse, 6).reshape(sparse.n_psus, 6, -1)
    filled = np.zeros((sparse.n_psus, 6), dtype=bool)
    filled[sparse.psu, sparse.cls] = True
    assert not filled.all()
    np.testing.assert_array_equal(layout[sparse.psu, sparse.cls], sparse.totals)
    assert not layout[~filled].any()


@pytest.mark.parametrize("how", ["sparse", "layout", "groups"])
def test_repeated_groups_are_summed(how):
    # a GroupTotals built elsewhere may repeat a (PSU, class) group, in any order
    gt = group_totals(make_frame([[30, 25], [28, 33, 20]], 4, seed=5), QUANTITIES, weight="w0",
                      strata="stratum", psu="psu", classes="cls")
    twice = replace(
        gt,
        stratum=np.r_[gt.stratum, gt.stratum[::-1]],
        psu=np.r_[gt.psu, gt.psu[::-1]],
        cls=np.r_[gt.cls, gt.cls[::-1]],
        totals=np.r_[gt.totals, gt.totals[::-1]],
        counts=np.r_[gt.counts, gt.counts[::-1]],
    )
    rf = make_replicates("bootstrap", gt.psu_stratum, replicates=30, seed=2)

    def halved(b: np.ndarray) -> np.ndarray:
        return smooth_reweight(b / 2.0)  # the class factors of the single groups

    # identity: the totals are linear in Y, so doubling every group doubles every replicate total
    close(replicate_totals(twice, rf, reweight=halved, base="one", how=how) / 2.0, direct_totals(gt, rf.factors))


def test_unknown_formulation_is_refused():
    frame = make_frame([[5, 6], [4, 7]], 2, seed=3)
    gt = group_totals(frame, QUANTITIES, weight="w0", strata="stratum", psu="psu", classes="cls")
    rf = make_replicates("stratified-jackknife", gt.psu_stratum)
    with pytest.raises(ValueError, match="'dense'"):
        replicate_totals(gt, rf, reweight=smooth_reweight, base="one", how="dense")
