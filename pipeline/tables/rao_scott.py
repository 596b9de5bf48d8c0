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
the eigenvalues are invariant to the choice of independence contrasts. Empty cells inside the table
make H P H' singular: the deltas are then those of the contrasts it identifies, and k their number
(`_generalized_deffs`).
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


def _generalized_deffs(srs: np.ndarray, design: np.ndarray) -> np.ndarray:
    """The eigenvalues of srs^-1 design (both symmetric, srs positive semi-definite) on the range of srs.

    An empty cell (p_ij = 0 in a non-empty row and column) makes the SRS covariance P singular along
    it, and with several such cells H P H' loses rank: `solve` would then return rounding noise
    amplified without bound. The generalized design effects are taken on the contrasts P
    identifies: with srs = U diag(l) U', the eigenvalues of L^-1/2 U' design U L^-1/2 over the
    eigenvalues l above 1e-10 of the largest (our choice of tolerance: far above rounding, far below
    any real variance ratio), so k is the number of those contrasts (equal to (r-1)(c-1) without
    empty cells, where this is exactly `eig(solve(srs, design))`).
    """
    values, vectors = np.linalg.eigh((srs + srs.T) / 2)
    keep = values > 1e-10 * max(float(values.max(initial=0.0)), 0.0)
    if not keep.any():
        return np.zeros(0)
    scaled = vectors[:, keep] / np.sqrt(values[keep])
    return np.linalg.eigvalsh(scaled.T @ ((design + design.T) / 2) @ scaled)


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
    deffs = _generalized_deffs(h @ srs @ h.T, h @ cov @ h.T)
    k = len(deffs)
    if k == 0:
        return None
    mean_deff = float(deffs.sum()) / k
    if not mean_deff > SET_BY_WEIGHTING:
        return None
    a2 = max(float((deffs**2).sum()) / k / mean_deff**2 - 1.0, 0.0)
    nu = k / (1.0 + a2)
    statistic = pearson / (k * mean_deff)
    p_value = float(special.fdtrc(nu, nu * design_df, statistic))  # F survival function
    return RaoScott(pearson, mean_deff, a2, statistic, nu, nu * design_df, p_value)
