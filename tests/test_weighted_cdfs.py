"""`weighted_cdfs`: one grouped pass for every domain gives each domain's own weighted CDF.

The reference is the definition itself, computed domain by domain with numpy:
F_d(y) = sum_i w_i d_i 1[y_i <= y] over the values y observed in the domain (mathematical identity).
"""

from __future__ import annotations

import numpy as np
import polars as pl
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.estimation.quantiles import weighted_cdfs


def _direct(y: np.ndarray, w: np.ndarray, d: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    keep = d & ~np.isnan(y) & (w > 0)
    values = np.unique(y[keep])
    cumulative = np.cumsum([w[keep][y[keep] == v].sum() for v in values])
    return values, cumulative


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 10_000), n=st.integers(1, 60), k=st.integers(1, 5))
def test_every_domain_equals_its_own_direct_cdf(seed: int, n: int, k: int) -> None:
    rng = np.random.default_rng(seed)
    y = rng.integers(0, 6, n).astype(np.float64)
    y[rng.random(n) < 0.15] = np.nan  # missing answers are outside F
    w = np.round(rng.exponential(2.0, n), 3)
    w[rng.random(n) < 0.1] = 0.0  # zero weights are outside F
    members = rng.random((k, n)) < 0.6
    frame = pl.DataFrame({"y": y, "w": w, **{f"d{j}": members[j] for j in range(k)}},
                         ).with_columns(pl.col("y").fill_nan(None))
    frame = frame.with_columns(pl.when(pl.col("d0") & (pl.col("w") > 5)).then(None).otherwise(pl.col("d0")).alias("d0"))
    cdfs = weighted_cdfs(frame, value="y", weight="w", domains={f"dom{j}": pl.col(f"d{j}") for j in range(k)})
    for j in range(k):
        d = frame[f"d{j}"].fill_null(False).to_numpy()  # a null membership counts as outside
        values, cumulative = _direct(y, w, d)
        np.testing.assert_array_equal(cdfs[f"dom{j}"].values, values)
        np.testing.assert_allclose(cdfs[f"dom{j}"].cumulative, cumulative, rtol=1e-12, atol=1e-12)


def test_median_of_a_small_domain_by_hand() -> None:
    """y = 1, 2, 3 with weights 1, 1, 3 in the domain: F = 0.2, 0.4, 1.0, so the median is 3
    (the smallest y with F(y) >= 0.5, hand computation); the row outside the domain is ignored."""
    frame = pl.DataFrame({"y": [1.0, 2.0, 3.0, 0.0], "w": [1.0, 1.0, 3.0, 100.0], "d": [True, True, True, False]})
    cdf = weighted_cdfs(frame, value="y", weight="w", domains={"x": pl.col("d")})["x"]
    assert cdf.values.tolist() == [1.0, 2.0, 3.0]
    assert float(cdf.quantile(0.5)) == 3.0
    assert cdf.total == 5.0
