"""Identities of weights and designs (STYLE.md), as property tests, plus the group-total path against
a naive per-respondent computation (../shared/DESIGN.md)."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from polars.testing import assert_frame_equal

from pipeline.estimation import estimate

KEY = ["statistic", "variable", "category", "domain"]


def survey(seed: int, n: int = 60) -> pl.DataFrame:
    """A small invented stratified cluster sample: 3 strata x 4 PSUs, a numeric and a coded answer."""
    rng = np.random.default_rng(seed)
    stratum = rng.integers(0, 3, n)
    return pl.DataFrame(
        {
            "stratum": stratum,
            "psu": stratum * 10 + rng.integers(0, 4, n),
            "w": rng.uniform(0.5, 4.0, n),
            "y": rng.normal(50, 10, n).round(1),
            "x": rng.uniform(1, 5, n),
            "q": rng.integers(1, 4, n),
            "g": rng.choice(["a", "b"], n),
        }
    )


def run(frame: pl.DataFrame, **extra: object) -> pl.DataFrame:
    options: dict = {
        "weight": "w", "strata": "stratum", "psu": "psu", "mean": "y", "total": "y",
        "proportion": "q", "ratio": ("y", "x"), "by": "g",
    }
    options.update(extra)
    return estimate(frame, **options).sort(KEY)


def test_unit_weights_give_unweighted_srs_results() -> None:
    frame = survey(1).with_columns(w=pl.lit(1.0))
    out = estimate(frame, weight="w", mean="y", proportion="q").sort(KEY)
    y = frame["y"].to_numpy()
    mean = out.filter(pl.col("statistic") == "mean").row(0, named=True)
    # unweighted sample mean and s / sqrt(n) (textbook SRS with replacement; numpy as reference)
    assert mean["estimate"] == pytest.approx(y.mean(), rel=1e-12)
    assert mean["se"] == pytest.approx(y.std(ddof=1) / np.sqrt(len(y)), rel=1e-10)
    assert mean["deff"] == pytest.approx(1.0, rel=1e-10)
    p = out.filter((pl.col("statistic") == "proportion") & (pl.col("category") == "2")).row(0, named=True)
    share = (frame["q"] == 2).mean()
    assert p["estimate"] == pytest.approx(share, rel=1e-12)
    # p(1-p)/(n-1), the unweighted SRS variance of a proportion (identity with s^2 of a 0/1 variable)
    assert p["se"] ** 2 == pytest.approx(share * (1 - share) / (len(y) - 1), rel=1e-10)


@settings(max_examples=15, deadline=None)
@given(seed=st.integers(0, 10_000))
def test_integer_weights_equal_repeated_rows(seed: int) -> None:
    frame = survey(seed).with_columns(w=pl.Series(np.random.default_rng(seed).integers(1, 4, 60)).cast(pl.Float64))
    repeated = frame.select(pl.all().repeat_by(pl.col("w").cast(pl.Int64)).explode()).with_columns(w=pl.lit(1.0))
    a, b = run(frame), run(repeated)
    # point estimates are identical (identity); variances differ because the rows are not independent
    assert a["estimate"].to_numpy() == pytest.approx(b["estimate"].to_numpy(), rel=1e-9)


@settings(max_examples=15, deadline=None)
@given(seed=st.integers(0, 10_000), row=st.integers(0, 59))
def test_zero_weight_equals_dropped_row_when_its_psu_has_others(seed: int, row: int) -> None:
    frame = survey(seed)
    psu = frame["psu"][row]
    if (frame["psu"] == psu).sum() < 2:
        return  # the row is alone in its PSU: see the next test
    zeroed = frame.with_columns(w=pl.when(pl.int_range(pl.len()) == row).then(0.0).otherwise(pl.col("w")))
    dropped = frame.filter(pl.int_range(pl.len()) != row)
    a, b = run(zeroed), run(dropped)
    # estimates, SEs, bases and design effects all equal: the PSU set is unchanged (identity)
    assert_frame_equal(a, b, rel_tol=1e-9, abs_tol=1e-9)


def test_zero_weight_row_alone_in_its_psu_still_counts_as_a_psu() -> None:
    frame = pl.DataFrame({"w": [1.0, 2.0, 1.5, 3.0, 0.0], "y": [3.0, 5.0, 4.0, 8.0, 100.0]})
    with_zero = estimate(frame, weight="w", total="y").row(0, named=True)
    dropped = estimate(frame.head(4), weight="w", total="y").row(0, named=True)
    assert with_zero["estimate"] == dropped["estimate"]
    # each respondent is a PSU: the zero-weight PSU has total 0 and stays in the sample of n = 5 PSUs,
    # so v = n/(n-1) sum (z_j - zbar)^2 over 5 PSU totals (the with-replacement formula by hand)
    z = np.array([3.0, 10.0, 6.0, 24.0, 0.0])
    assert with_zero["se"] ** 2 == pytest.approx(5 / 4 * ((z - z.mean()) ** 2).sum(), rel=1e-12)
    assert with_zero["se"] != pytest.approx(dropped["se"])
    assert with_zero["df"] == dropped["df"] + 1
    assert with_zero["n"] == dropped["n"] == 4  # the zero-weight respondent is in no base


@settings(max_examples=15, deadline=None)
@given(seed=st.integers(0, 10_000), factor=st.floats(0.01, 100.0))
def test_scaling_weights(seed: int, factor: float) -> None:
    frame = survey(seed)
    a, b = run(frame), run(frame.with_columns(w=pl.col("w") * factor))
    scaled = a["statistic"] == "total"
    for col in ("estimate", "se"):
        expected = np.where(scaled.to_numpy(), a[col].to_numpy() * factor, a[col].to_numpy())
        # means, proportions, ratios and their SEs unchanged; totals and their SEs scale (identity)
        assert b[col].to_numpy() == pytest.approx(expected, rel=1e-8)
    assert b["deff"].to_numpy() == pytest.approx(a["deff"].to_numpy(), rel=1e-8)


@settings(max_examples=15, deadline=None)
@given(seed=st.integers(0, 10_000), order_seed=st.integers(0, 10_000))
def test_row_order_does_not_matter(seed: int, order_seed: int) -> None:
    frame = survey(seed)
    shuffled = frame.sample(fraction=1.0, shuffle=True, seed=order_seed)
    assert_frame_equal(run(frame), run(shuffled), rel_tol=1e-9, abs_tol=1e-12)


def test_group_total_path_equals_naive_per_respondent_computation() -> None:
    frame = survey(7, n=200)
    out = estimate(frame, weight="w", strata="stratum", psu="psu", ratio=("y", "x"), by="g").sort("domain")
    w, y, x = (frame[c].to_numpy() for c in ("w", "y", "x"))
    h, j = frame["stratum"].to_numpy(), frame["psu"].to_numpy()
    for domain, d in (("", np.ones(len(w))), ("g=a", (frame["g"] == "a").to_numpy().astype(float))):
        # naive linearization, written from Lohr 3rd ed. section 9.1 (ratio z_i = (y_i - R x_i) / t_x):
        # per-respondent z, PSU totals in a Python loop, stratum deviations
        r = (w * d * y).sum() / (w * d * x).sum()
        z = w * d * (y - r * x) / (w * d * x).sum()
        v = 0.0
        for stratum in np.unique(h):
            psus = np.unique(j[h == stratum])
            totals = np.array([z[j == p].sum() for p in psus])
            v += len(psus) / (len(psus) - 1) * ((totals - totals.mean()) ** 2).sum()
        row = out.filter(pl.col("domain") == domain).row(0, named=True)
        assert row["estimate"] == pytest.approx(r, rel=1e-12)
        assert row["se"] ** 2 == pytest.approx(v, rel=1e-10)


@settings(max_examples=30, deadline=None)
@given(index=st.lists(st.integers(0, 6), min_size=0, max_size=40), seed=st.integers(0, 1000))
def test_sum_by_equals_unbuffered_add(index: list[int], seed: int) -> None:
    from pipeline.estimation.totals import sum_by

    idx = np.array(index, dtype=np.int64)
    values = np.random.default_rng(seed).normal(size=(len(idx), 3))
    expected = np.zeros((8, 3))
    np.add.at(expected, idx, values)  # numpy's unbuffered scatter-add as the reference
    assert sum_by(idx, values, 8) == pytest.approx(expected, abs=1e-12)
