"""The grouped pass (`group_totals`) against the direct per-respondent sum it replaces.

`group_totals` sums weights per distinct value combination and multiplies by matrices
(`pipeline.estimation.totals` module docstring). The reference here is the direct definition
Y[g, k] = sum_{i in g} w_i y_ik: every quantity materialised for every respondent, then one polars
group_by over (stratum, PSU, class) sorted by those values. The two must agree to rounding
(rtol 1e-12 against the sum of |w_i y_ik| in the group: the matrix path only reorders a sum of
positive-coefficient terms, mathematical identity), with equal counts, indices and labels.
"""

from __future__ import annotations

from unittest import mock

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.errors import DataError
from pipeline.estimation import totals as totals_module
from pipeline.estimation.totals import group_totals


def direct_totals(
    frame: pl.DataFrame, quantities: dict[str, pl.Expr], *, weight: str, strata: str | None, psu: str | None,
    classes: str | None,
) -> tuple[pl.DataFrame, list[str]]:
    """The definition, row by row: materialise every y_ik, then sum w_i y_ik and |w_i y_ik| per sorted group."""
    names = [f"__q{k}" for k in range(len(quantities))]
    rows = frame.select(
        (pl.col(strata) if strata else pl.lit("all")).alias("s"),
        (pl.col(psu) if psu else pl.int_range(pl.len(), dtype=pl.Int64)).alias("p"),
        (pl.col(classes) if classes else pl.lit(0)).alias("c"),
        pl.col(weight).cast(pl.Float64).alias("w"),
        *[e.cast(pl.Float64).alias(q) for e, q in zip(quantities.values(), names, strict=True)],
    )
    grouped = rows.group_by("s", "p", "c").agg(
        *[(pl.col("w") * pl.col(q)).sum().alias(q) for q in names],
        *[(pl.col("w") * pl.col(q)).abs().sum().alias(q + "_abs") for q in names],
        *[((pl.col("w") != 0) & (pl.col(q) != 0)).sum().alias(q + "_n") for q in names],
    )
    return grouped.sort("s", "p", "c"), names


def assert_same_as_direct(frame: pl.DataFrame, quantities: dict[str, pl.Expr], **design: str | None) -> None:
    gt = group_totals(frame, quantities, weight="w", **design)
    ref, names = direct_totals(frame, quantities, weight="w", **design)
    assert gt.totals.shape == (ref.height, len(names))
    # C order, as the replicate layout product's view of the totals expects (replicates._psu_class_layout)
    assert gt.totals.flags.c_contiguous and gt.counts.flags.c_contiguous and gt.counts.dtype == np.int64
    scale = ref.select([q + "_abs" for q in names]).to_numpy()
    np.testing.assert_array_less(np.abs(gt.totals - ref.select(names).to_numpy()), 1e-12 * scale + 1e-300)
    np.testing.assert_array_equal(gt.counts, ref.select([q + "_n" for q in names]).to_numpy())
    # indices: a new stratum / PSU wherever the sorted keys change (GroupTotals' documented layout)
    s_new = np.r_[True, ref["s"].to_numpy()[1:] != ref["s"].to_numpy()[:-1]] if ref.height else np.zeros(0, bool)
    p_new = s_new | (np.r_[True, ref["p"].to_numpy()[1:] != ref["p"].to_numpy()[:-1]] if ref.height else s_new)
    np.testing.assert_array_equal(gt.stratum, np.cumsum(s_new) - 1)
    np.testing.assert_array_equal(gt.psu, np.cumsum(p_new) - 1)
    np.testing.assert_array_equal(gt.psu_stratum, (np.cumsum(s_new) - 1)[p_new])
    assert gt.stratum_labels == tuple(str(v) for v in ref["s"].filter(pl.Series(s_new)).to_list())
    assert gt.psu_labels == tuple(str(v) for v in ref["p"].filter(pl.Series(p_new)).to_list())
    classes = design.get("classes")
    expected_cls = ref["c"].to_numpy() if classes is None or ref["c"].dtype.is_integer() else ref["c"].rank("dense").to_numpy() - 1
    np.testing.assert_array_equal(gt.cls, expected_cls)
    # the squared-weight sums of the within-PSU term come from the same pass: sum_{i in g} w_i^2 y_ik,
    # against the direct sum with w^2 as the weight; the totals and counts are unchanged by asking for them
    with_squares = group_totals(frame, quantities, weight="w", squared=True, **design)
    assert gt.squared is None
    np.testing.assert_array_equal(with_squares.totals, gt.totals)
    np.testing.assert_array_equal(with_squares.counts, gt.counts)
    squared, _ = direct_totals(frame.with_columns(pl.col("w").cast(pl.Float64) ** 2), quantities, weight="w", **design)
    square_scale = squared.select([q + "_abs" for q in names]).to_numpy()
    np.testing.assert_array_less(np.abs(with_squares.squared - squared.select(names).to_numpy()),
                                 1e-12 * square_scale + 1e-300)


def invented_sample(seed: int, n: int) -> pl.DataFrame:
    """Invented respondents: string strata, PSU ids restarting within strata, string classes, zero weights, nulls, -0.0, Int8 extremes."""
    rng = np.random.default_rng(seed)
    y = rng.normal(3.0, 2.0, n).round(1)
    y[rng.random(n) < 0.1] = -0.0
    return pl.DataFrame(
        {
            "h": rng.choice(["north", "south", "east"], n),
            "j": rng.integers(1, 4, n),
            "c": rng.choice(["a", "b", "c", "d"], n),
            "ci": rng.integers(0, 5, n),
            "w": np.where(rng.random(n) < 0.1, 0.0, rng.uniform(0.5, 3.0, n)),
            "q": pl.Series(rng.integers(1, 5, n)).scatter(rng.integers(0, n, n // 8), None),
            "seg": rng.choice(["x", "y"], n),
            "y": y,
            "flag": rng.random(n) < 0.3,
            "tiny": pl.Series(rng.choice([-128, 0, 127], n), dtype=pl.Int8).scatter(rng.integers(0, n, n // 5), None),
        }
    )


QUANTITIES = {
    "one": pl.lit(1.0),
    "seg=x": (pl.col("seg") == "x").cast(pl.Float64),
    "q=2|seg=y": (pl.col("q").eq(2).fill_null(False) & (pl.col("seg") == "y")).cast(pl.Float64),
    "answered": pl.col("q").is_not_null().cast(pl.Float64),
    "y": pl.col("y"),
    "y2|flag": pl.col("y") * pl.col("y") * pl.col("flag").cast(pl.Float64),
    "q in 1,3": pl.col("q").is_in([1, 3]).fill_null(False).cast(pl.Float64),
    # one answer each, beside quantities of the same column that are not: copied rows, one of them scaled
    "q=1": (pl.col("q") == 1).fill_null(False).cast(pl.Float64),
    "-2.5 if q=4": (pl.col("q") == 4).fill_null(False).cast(pl.Float64) * -2.5,
    "1/y": pl.when(pl.col("y") != 0).then(1.0 / pl.col("y")).otherwise(0.0),
    "centred y": pl.col("y") - pl.col("y").mean(),  # not row-wise: evaluated on the full frame
    "previous y": pl.col("y").shift(1).fill_null(0.0),  # not row-wise either
    "centred q": pl.col("q").fill_null(0) - pl.col("q").fill_null(0).mean(),  # ... of a column with few values
    "previous seg=x": (pl.col("seg") == "x").shift(1).fill_null(False).cast(pl.Float64),
    "tiny at its extremes or missing": (pl.col("tiny").cast(pl.Int16).abs() > 100).fill_null(True).cast(pl.Float64),
}

DESIGNS = [
    {"strata": "h", "psu": "j", "classes": "c"},
    {"strata": "h", "psu": "j", "classes": "ci"},
    {"strata": None, "psu": "j", "classes": None},
    {"strata": "h", "psu": None, "classes": None},
]


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 100_000),
    n=st.integers(1, 120),
    design=st.sampled_from(DESIGNS),
    dense_cells=st.sampled_from([totals_module.DENSE_CELLS, 0]),
    sparse_share=st.sampled_from([totals_module.SPARSE_SHARE, 0.0, 1.0]),
    batch_cells=st.sampled_from([totals_module.BATCH_CELLS, 1]),
    max_combinations=st.sampled_from([totals_module.MAX_COMBINATIONS, 0]),
)
def test_group_totals_equal_the_direct_sum(
    seed: int, n: int, design: dict, dense_cells: int, sparse_share: float, batch_cells: int, max_combinations: int
) -> None:
    # every internal route: combinations or rows, dense or sparse weight matrix, dense or sparse
    # quantity values, batches of one column
    with (
        mock.patch.object(totals_module, "DENSE_CELLS", dense_cells),
        mock.patch.object(totals_module, "SPARSE_SHARE", sparse_share),
        mock.patch.object(totals_module, "BATCH_CELLS", batch_cells),
        mock.patch.object(totals_module, "MAX_COMBINATIONS", max_combinations),
    ):
        assert_same_as_direct(invented_sample(seed, n), QUANTITIES, **design)


def test_group_totals_equal_the_direct_sum_at_a_larger_size() -> None:
    # 20,000 rows: the sample that picks the route is a strict subset; y has too many values to combine
    frame = invented_sample(3, 20_000).with_columns(y=pl.col("y") + pl.Series(np.linspace(0.0, 1.0, 20_000)))
    assert_same_as_direct(frame, QUANTITIES, strata="h", psu="j", classes="c")


def test_float_values_that_compare_equal_stay_distinct() -> None:
    # -0.0 == 0.0 but 1/-0.0 = -inf: a quantity may tell them apart, so they are distinct combinations
    frame = pl.DataFrame({"w": [1.0, 2.0], "x": [0.0, -0.0]})
    gt = group_totals(frame, {"sign": pl.col("x").cast(pl.String).eq("-0.0").cast(pl.Float64)}, weight="w",
                      strata=None, psu=None)
    assert gt.totals[:, 0].tolist() == [0.0, 2.0]  # by hand: only the second respondent's x prints as -0.0


def test_missing_quantity_counts_rows_and_comes_with_design_problems() -> None:
    frame = pl.DataFrame({"h": ["a", "a", "b", "b"], "w": [1.0, -1.0, 1.0, 1.0], "y": [1.0, None, None, float("nan")]})
    with pytest.raises(DataError) as info:
        group_totals(frame, {"y": pl.col("y"), "one": pl.lit(1.0)}, weight="w", strata="h", psu=None)
    text = info.value.render()
    assert "negative weights (column 'w'); 1 row" in text
    assert "quantity 'y' is null or NaN" in text and "; 3 rows" in text  # two nulls and one NaN, counted by hand
    assert "'one'" not in text


def test_empty_frame_gives_no_groups() -> None:
    frame = pl.DataFrame(schema={"h": pl.String, "j": pl.Int64, "w": pl.Float64, "y": pl.Float64})
    gt = group_totals(frame, {"y": pl.col("y"), "one": pl.lit(1.0)}, weight="w", strata="h", psu="j")
    assert gt.totals.shape == (0, 2) and gt.n_psus == 0 and gt.stratum_labels == ()
