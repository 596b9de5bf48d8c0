"""Replicate variance in a two-stage design with a first-stage FPC.

The jackknife with a first-stage FPC carries the within-PSU term of the two-stage estimator, as Taylor does.
"""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline.estimation import estimate


def _two_stage(seed: int = 3) -> pl.DataFrame:
    """Invented: 2 strata of 12 and 9 PSUs, 5 and 4 sampled, 6-9 respondents per PSU, unequal weights."""
    rng = np.random.default_rng(seed)
    rows = []
    for stratum, n_psu in (("A", 5), ("B", 4)):
        for j in range(n_psu):
            effect = rng.normal(0, 1.0)
            for _ in range(int(rng.integers(6, 10))):
                rows.append({"h": stratum, "j": j, "w": float(rng.uniform(20, 60)), "y": float(effect + rng.normal(0, 3))})
    return pl.DataFrame(rows)


def test_jackknife_of_a_total_with_first_stage_fpc_matches_the_two_stage_estimator() -> None:
    frame = _two_stage()
    options = {"weight": "w", "strata": "h", "psu": "j", "fpc": {"A": 12.0, "B": 9.0}, "total": "y"}
    jkn = estimate(frame, **options, variance="jkn").row(0, named=True)
    taylor = estimate(frame, **options).row(0, named=True)
    # identity: for a linear total the stratified jackknife reproduces the PSU-level formula exactly
    # (Wolter 2007 section 4.5, from memory); with a first-stage FPC the unbiased two-stage estimator
    # adds sum_h f_h sum_j v2(z_hj) (Cochran 1977 section 11.9, from memory), which Taylor computes
    assert jkn["se"] == pytest.approx(taylor["se"], rel=1e-10)
