"""Design-adjusted test of independence of a single-choice stub and a single-choice break: Rao-Scott, F form.

With p the r x c joint proportions (weighted, among respondents in both), p_i. and p_.j their
margins and n the unweighted number of those respondents, Pearson's statistic on the weighted
proportions is

    X2 = n sum_ij (p_ij - p_i. p_.j)^2 / (p_i. p_.j).

Independence is h(p) = 0 for the k = (r-1)(c-1) functions h_ij = p_ij - p_i. p_.j (i < r, j < c).
With H their Jacobian at p, V the design covariance of p (`FitState.covariance`: Taylor with
calibration residuals, or replicates) and P = (diag(p) - p p') / (n - 1) the covariance a simple
random sample of n would have (the same n - 1 convention as the design's with-replacement
estimator, so that P = V exactly under simple random sampling with equal weights), the
generalized design effects delta_1..delta_k are the eigenvalues of (H P H')^-1 (H V H').
The second-order correction (Rao and Scott 1984, Ann. Statist. 12:46-60, section 4, from memory)
with mean delta. and a^2 = sum (delta_i - delta.)^2 / (k delta.^2) refers

    F = X2 / (k delta.)    to F(nu, nu d),   nu = k / (1 + a^2),

d the design degrees of freedom (the F form of Thomas and Rao 1987, JASA 82:630-636, from memory).
Under SRS with equal weights every delta is 1, so F = X2 / k with X2 Pearson's chi-square
(`tests/test_tables_rao_scott.py` checks it against scipy). Empty rows or columns are dropped first;
the eigenvalues are invariant to the choice of independence contrasts.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special


# a mean generalized design effect below this is a table the weighting calibrates to (e.g. the cells of
# an age x sex raking margin): it has no sampling variance to test (real design effects are near 1)
SET_BY_WEIGHTING = 1e-6


@dataclass(frozen=True)
class RaoScott:
    """One test: Pearson's X2, the mean generalized design effect, a^2, the F statistic, its dfs and p."""

    pearson: float
    mean_deff: float
    a2: float
    statistic: float
    df_num: float
    df_den: float
    p_value: float


def _jacobian(r: int, c: int, p: np.ndarray) -> np.ndarray:
    """(k, r c) derivatives of h_ij = p_ij - p_i. p_.j (i < r-1, j < c-1) with respect to vec(p) (row-major)."""
    rows, cols = p.sum(axis=1), p.sum(axis=0)
    out = np.zeros(((r - 1) * (c - 1), r * c))
    for i in range(r - 1):
        for j in range(c - 1):
            g = np.zeros((r, c))
            g[i, :] -= cols[j]
            g[:, j] -= rows[i]
            g[i, j] += 1.0
            out[i * (c - 1) + j] = g.ravel()
    return out


def rao_scott(p: np.ndarray, cov: np.ndarray, n: int, design_df: float) -> RaoScott | None:
    """The test for joint proportions `p` (r, c) with design covariance `cov` (r c, r c) (module docstring).

    None when fewer than two non-empty rows or columns remain, n < 2, the covariance is not available,
    or the table is set by the weighting (mean design effect below `SET_BY_WEIGHTING`).
    """
    p = np.asarray(p, dtype=np.float64)
    keep_r, keep_c = p.sum(axis=1) > 0, p.sum(axis=0) > 0
    if keep_r.sum() < 2 or keep_c.sum() < 2 or n < 2 or not np.all(np.isfinite(cov)):
        return None
    keep = (keep_r[:, None] & keep_c[None, :]).ravel()
    p = p[keep_r][:, keep_c]
    p = p / p.sum()
    cov = np.asarray(cov, dtype=np.float64)[np.ix_(keep, keep)]
    r, c = p.shape
    k = (r - 1) * (c - 1)
    expected = np.outer(p.sum(axis=1), p.sum(axis=0))
    pearson = float(n * ((p - expected) ** 2 / expected).sum())
    flat = p.ravel()
    srs = (np.diag(flat) - np.outer(flat, flat)) / (n - 1)
    h = _jacobian(r, c, p)
    deffs = np.linalg.solve(h @ srs @ h.T, h @ cov @ h.T)
    trace = float(np.trace(deffs))
    mean_deff = trace / k
    if not mean_deff > SET_BY_WEIGHTING:
        return None
    a2 = max(float(np.trace(deffs @ deffs)) / k / mean_deff**2 - 1.0, 0.0)
    nu = k / (1.0 + a2)
    statistic = pearson / (k * mean_deff)
    p_value = float(special.fdtrc(nu, nu * design_df, statistic))  # F survival function
    return RaoScott(pearson, mean_deff, a2, statistic, nu, nu * design_df, p_value)
