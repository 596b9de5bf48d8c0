"""Kish design effects of domain totals: the SRS reference is a simple random sample of the whole sample."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline.estimation import estimate


def _srs(seed: int = 1, n: int = 400) -> pl.DataFrame:
    """Invented simple random sample: equal weights N / n, three domains of random size."""
    rng = np.random.default_rng(seed)
    return pl.DataFrame({"w": np.full(n, 25.0), "y": rng.gamma(2.0, 10.0, n), "g": rng.integers(0, 3, n)})


def test_domain_totals_of_a_simple_random_sample_have_design_effect_one() -> None:
    out = estimate(_srs(), weight="w", total="y", by="g")
    # identity: under SRS with equal weights the design variance of any total (a domain total is the
    # total of y * 1[domain], domain size random) IS the SRS variance, so deff = 1 (Kish 1965, Survey
    # Sampling, section 8.2 definition; Lohr 3rd ed. section 4.3 on domain totals, from memory)
    assert out["deff"].to_list() == pytest.approx([1.0] * 4, rel=1e-9)
    # the effective sample size of an SRS is its size (Kish 1965 section 8.2)
    assert out["n_eff"].to_list() == pytest.approx([400.0] * 4, rel=1e-9)


def test_domain_means_keep_their_domain_reference() -> None:
    frame = _srs()
    out = estimate(frame, weight="w", mean="y", by="g").filter(pl.col("domain") == "g=1").row(0, named=True)
    n_d = int((frame["g"] == 1).sum())
    # SRS with equal weights: Taylor v = n/(n-1) sum_d (y - ybar_d)^2 / n_d^2 against the domain SRS
    # variance s_d^2 / n_d, so deff = n (n_d - 1) / ((n - 1) n_d) (algebraic identity from those two formulas)
    assert out["deff"] == pytest.approx(400 * (n_d - 1) / (399 * n_d), rel=1e-9)
    assert out["n"] == n_d
