"""Variances and covariances from replicate estimates, and replicate degrees of freedom.

For estimates theta (m,) and replicate estimates theta_r (R, m):

    v(theta) = multiplier * sum_r multipliers_r (theta_r - c_r)^2          (Wolter 2007, sections 3.3 and 4.5)
    cov(theta_a, theta_b) = multiplier * sum_r multipliers_r (theta_ra - c_ra)(theta_rb - c_rb)

c_r is the full-sample estimate (centre "full-sample") or the mean of the replicates that share the
replicate's group (centre "replicate-mean": all replicates, except the stratified jackknife whose replicates
are centred on their stratum's mean, Wolter 2007 section 4.5, from memory). A contrast C theta
(differences between banner columns or waves) has replicate estimates theta_r C^T, so its variance
is `replicate_variance(theta @ C.T, theta_r @ C.T, rf)` = diag(C cov C^T), covariances included.
A replicate whose estimate is undefined (a domain empty in that replicate) makes the variance NaN:
it is never dropped silently.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from pipeline.estimation.replicates import ReplicateFactors


def _deviations(theta: np.ndarray, theta_r: np.ndarray, rf: ReplicateFactors, centre: str | None) -> np.ndarray:
    theta = np.asarray(theta, dtype=np.float64)
    theta_r = np.asarray(theta_r, dtype=np.float64)
    if theta_r.shape[0] != len(rf.multipliers):
        raise ValueError(f"{theta_r.shape[0]} replicate estimates for {len(rf.multipliers)} replicates")
    how = rf.centre if centre is None else centre
    if how == "full-sample":
        return theta_r - theta
    if how != "replicate-mean":
        raise ValueError(f"centre must be 'full-sample' or 'replicate-mean', not {how!r}")
    groups = np.zeros(len(rf.multipliers), dtype=np.int64) if rf.replicate_stratum is None else rf.replicate_stratum
    n_groups = int(groups.max()) + 1
    sums = np.zeros((n_groups,) + theta_r.shape[1:])
    np.add.at(sums, groups, theta_r)
    means = sums / np.bincount(groups, minlength=n_groups).reshape((-1,) + (1,) * (theta_r.ndim - 1))
    return theta_r - means[groups]


def replicate_variance(
    theta: np.ndarray, theta_r: np.ndarray, rf: ReplicateFactors, *, centre: str | None = None
) -> np.ndarray:
    """v = multiplier * sum_r multipliers_r (theta_r - c_r)^2, vectorised over the trailing axes of theta_r.

    theta (m,) or scalar, theta_r (R, m); centre overrides rf.centre ("full-sample" or "replicate-mean").
    Formulas: jackknife Wolter 2007 sections 4.2 and 4.5; BRR and Fay Wolter section 3.3 and Fay 1989;
    bootstrap Rao & Wu 1988; successive differences Fay & Train 1995 (multipliers in `rf`).
    """
    d = _deviations(theta, theta_r, rf, centre)
    w = rf.multiplier * rf.multipliers.reshape((-1,) + (1,) * (d.ndim - 1))
    return np.sum(w * d * d, axis=0)


def replicate_covariance(
    theta: np.ndarray, theta_r: np.ndarray, rf: ReplicateFactors, *, centre: str | None = None
) -> np.ndarray:
    """The (m, m) covariance matrix multiplier * sum_r multipliers_r d_r d_r^T with d_r = theta_r - c_r."""
    d = _deviations(theta, theta_r, rf, centre)
    return (d * (rf.multiplier * rf.multipliers)[:, None]).T @ d


def replicate_df(rf: ReplicateFactors) -> int:
    """Degrees of freedom of a replicate variance, for t intervals and tests.

    jackknife: P - 1; stratified-jackknife: P - H (PSUs minus strata); BRR and Fay: H (= P - H with 2 PSUs per stratum);
    bootstrap: P - H, since resampling adds no design information beyond the PSUs (common
    practice, no source); supplied weights: as declared, else R - 1 (common practice, no source).
    """
    if rf.df is not None:
        return int(rf.df)
    return rf.n_replicates - 1
