"""Taylor-linearization variance from group totals, with calibration residuals for calibrated weights.

For an estimator theta(t) of totals t, the linearized variable of respondent i is z_i = y_i @ D
(D = `estimand.linearize(t)`), so the weighted linearized PSU totals are
z_j = sum_{g in j} Y[g] @ D: group totals times D, summed within PSU. Their variance is the
with-replacement PSU formula of `pipeline.estimation.design` (Woodruff 1971; Binder 1983;
Lohr 3rd ed. section 9.1, from memory).

Calibrated weights (post-stratified, raked, GREG-calibrated): the estimator behaves like the
calibration estimator of z, whose variance is that of the residuals
    e_i = z_i - x_i' B,      B = (sum_i w_i x_i x_i')^-1 sum_i w_i x_i z_i
(Deville & Sarndal 1992, JASA 87:376-382, section 3; Sarndal, Swensson & Wretman 1992, Model
Assisted Survey Sampling, section 6.6, the g-weighted residual variance estimator, from memory).
Here x is constant within a weighting class c (the class's row of `calibration_matrix`, e.g.
post-stratum or raking-margin indicators), so with W_gc the weight total of group g:
    sum_i w_i x_i x_i' = X' diag(W_c) X,   sum_i w_i x_i z_i = X' Z_c,   E_g = Z_g - W_g x_{c(g)}' B
all from group totals. Raking margin indicators are collinear, so B is a least-squares solution
(pseudo-inverse); the residuals do not depend on which solution is taken.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

import numpy as np

from pipeline.estimation.design import PsuLayout
from pipeline.estimation.estimands import Ratios
from pipeline.estimation.totals import GroupTotals, sum_by


class Estimand(Protocol):
    """Anything with `value(t)` and `linearize(t)`: `Ratios` or `Contrast`."""

    def value(self, t: np.ndarray) -> np.ndarray: ...

    def linearize(self, t: np.ndarray) -> np.ndarray: ...


@dataclass(frozen=True)
class Calibration:
    """Class-level auxiliary vectors for calibrated weights.

    matrix: (C, p) the auxiliary vector x of each weighting class (the weighting recipe's
    `calibration_matrix()`); weight_column: index in GroupTotals.columns of the quantity 1 (so
    that its totals are the weight totals W_g).
    """

    matrix: np.ndarray
    weight_column: int


def linearized_group_totals(
    gt: GroupTotals, estimand: Estimand, *, calibration: Calibration | None = None
) -> np.ndarray:
    """(G, m) weighted totals of the linearized variables (or of their calibration residuals) by group."""
    t = gt.totals.sum(axis=0)
    z = linear_combinations(gt.totals, np.nan_to_num(estimand.linearize(t)))
    if calibration is None:
        return z
    w_g = gt.totals[:, calibration.weight_column]
    return z - w_g[:, None] * _fitted(gt, z, calibration)[gt.cls]


def linear_combinations(y: np.ndarray, d: np.ndarray) -> np.ndarray:
    """y @ d for (G, K) totals and a (K, m) gradient: a sparse product when d is mostly zeros (a
    ratio's gradient has two non-zero entries per column), so the cost is G x nnz(d), not G x K x m.

    The sparse product also sums only the non-zero terms, so a ratio whose numerator and
    denominator totals are equal in every group (a share of 100%) gets linearized totals of exactly
    0, where a dense product may leave rounding noise of order 1e-18."""
    if d.size and np.count_nonzero(d) <= 0.5 * d.size:
        from scipy import sparse

        return np.asarray(sparse.csc_matrix(d).T.dot(y.T).T)
    return y @ d


def _fitted(gt: GroupTotals, z: np.ndarray, calibration: Calibration) -> np.ndarray:
    """(C, m) fitted values x_c' B of each class for the linearized group totals z (module docstring)."""
    x = np.asarray(calibration.matrix, dtype=np.float64)
    if x.shape[0] < gt.n_classes:
        raise ValueError(f"calibration matrix has {x.shape[0]} classes but the data have {gt.n_classes}")
    w_c = np.bincount(gt.cls, weights=gt.totals[:, calibration.weight_column], minlength=x.shape[0])
    z_c = sum_by(gt.cls, z, x.shape[0])
    return x @ (np.linalg.pinv((x * w_c[:, None]).T @ x) @ (x.T @ z_c))


@dataclass(frozen=True)
class SquaredTotals:
    """Group totals of the squared-weight moments, for the within-PSU (second-stage) term.

    totals: (G, K) sums over group g of w_i^2 y_ik for the quantities of the first pass, in the
    same groups and columns (w the final weights); s_nn, s_nd, s_dd: (m,) column indices of
    y_num^2, y_num y_den and y_den^2 of each estimator (-1 when absent: a total has no denominator).
    """

    totals: np.ndarray
    s_nn: np.ndarray
    s_nd: np.ndarray
    s_dd: np.ndarray


def within_psu_variance(
    gt: GroupTotals,
    estimand: Ratios,
    squared: SquaredTotals,
    *,
    weight_column: int,
    calibration: Calibration | None = None,
) -> np.ndarray:
    """(P, m) second-stage variance estimates v2(z_j) = m_j/(m_j - 1) [sum_i u_i^2 - (sum_i u_i)^2 / m_j].

    u_i = w_i (z_i - x_c' B) is respondent i's weighted linearized value (its calibration residual
    when `calibration` is given) and m_j the PSU's respondents with a non-zero weight (counts of
    the quantity 1 at `weight_column`); 0 when
    m_j < 2. The second-stage sampling fraction is taken as 0 (unknown), which errs on the safe
    side. With z_i = a y_num,i + b y_den,i and beta = x_c' B,
        sum_{i in g} u_i^2 = a^2 S(y_num^2) + 2ab S(y_num y_den) + b^2 S(y_den^2)
                             - 2 beta (a S(y_num) + b S(y_den)) + beta^2 S(1),   S(.) = sum_{i in g} w_i^2 (.)
    (Cochran 1977, Sampling Techniques, 3rd ed., section 11.9; Lohr 3rd ed. section 5.3, from memory).
    """
    t = gt.totals.sum(axis=0)
    d = np.nan_to_num(estimand.linearize(t))
    cols = np.arange(len(estimand))
    a = d[estimand.num, cols]
    b = np.where(estimand.is_total, 0.0, d[np.maximum(estimand.den, 0), cols])
    s = np.append(squared.totals, np.zeros((squared.totals.shape[0], 1)), axis=1)  # column -1: absent moment
    den = np.where(estimand.is_total, -1, estimand.den)
    q = a**2 * s[:, squared.s_nn] + 2 * a * b * s[:, squared.s_nd] + b**2 * s[:, squared.s_dd]
    if calibration is not None:
        beta = _fitted(gt, linear_combinations(gt.totals, d), calibration)[gt.cls]
        ones = s[:, [weight_column]]
        q = q - 2 * beta * (a * s[:, estimand.num] + b * s[:, den]) + beta**2 * ones
    u = gt.psu_totals(linearized_group_totals(gt, estimand, calibration=calibration))
    m = gt.psu_totals(gt.counts[:, [weight_column]].astype(float))
    with np.errstate(divide="ignore", invalid="ignore"):
        v2 = m / (m - 1) * (gt.psu_totals(q) - u**2 / m)
    return np.where(m >= 2, np.maximum(v2, 0.0), 0.0)


@dataclass(frozen=True)
class ProductMoments:
    """Group sums of squared-weight cross-products, for the within-PSU term of a covariance.

    pairs: (Q, 2) int column indices (k, l), k <= l, into GroupTotals.columns; totals: (G, Q) with
    totals[g, q] = sum_{i in g} w_i^2 y_ik y_il (w the final weights, the groups of GroupTotals).
    The interface between the grouped pass (which computes the sums) and the covariance formula:
    `product_pairs` says which pairs a covariance needs. The quantity 1 (the weight column) is an
    ordinary column, so sum w^2 y_k = pair (k, one) and sum w^2 = pair (one, one).
    """

    pairs: np.ndarray
    totals: np.ndarray

    def __post_init__(self) -> None:
        pairs = np.sort(np.asarray(self.pairs, dtype=np.int64).reshape(-1, 2), axis=1)
        object.__setattr__(self, "pairs", pairs)
        totals = np.asarray(self.totals, dtype=np.float64)
        if totals.ndim != 2 or totals.shape[1] != len(pairs):
            raise ValueError(f"product totals of shape {totals.shape} for {len(pairs)} pairs")
        object.__setattr__(self, "totals", totals)

    def lookup(self, wanted: np.ndarray) -> np.ndarray:
        """(n, 2) pairs -> (n,) their columns in `totals`; ValueError naming the first missing pair."""
        wanted = np.sort(np.asarray(wanted, dtype=np.int64).reshape(-1, 2), axis=1)
        index = {(int(a), int(b)): q for q, (a, b) in enumerate(self.pairs.tolist())}
        missing = [tuple(p) for p in wanted.tolist() if tuple(p) not in index]
        if missing:
            raise ValueError(f"the product moments lack {len(missing)} needed pairs, e.g. columns {missing[0]}")
        return np.array([index[(a, b)] for a, b in wanted.tolist()], dtype=np.int64)


def _used_columns(estimand: Estimand, t: np.ndarray) -> np.ndarray:
    """Columns of the totals the linearized variables read (rows of D that are not all 0)."""
    d = np.nan_to_num(estimand.linearize(t))
    return np.flatnonzero(np.any(d != 0, axis=1))


def product_pairs(gt: GroupTotals, estimand: Estimand, *, weight_column: int | None = None) -> np.ndarray:
    """(Q, 2) the column pairs (k <= l) whose squared-weight cross-products `within_psu_covariance` needs.

    Every pair of the columns the estimands' linearized variables read; with `weight_column` (the
    quantity 1, needed for calibration residuals) that column joins them.
    """
    cols = _used_columns(estimand, gt.totals.sum(axis=0))
    if weight_column is not None:
        cols = np.union1d(cols, [weight_column])
    a, b = np.triu_indices(len(cols))
    return np.column_stack([cols[a], cols[b]])


def within_psu_covariance(
    gt: GroupTotals,
    estimand: Estimand,
    moments: ProductMoments,
    *,
    weight_column: int,
    calibration: Calibration | None = None,
) -> np.ndarray:
    """(P, m, m) second-stage covariances c2_j(a, b) of the PSU totals of linearized variables.

    c2_j(a, b) = m_j/(m_j - 1) [sum_{i in j} u_ia u_ib - U_ja U_jb / m_j],  U_j = sum_{i in j} u_i,
    the cross-product form of `within_psu_variance` (whose diagonal it is; Cochran 1977, Sampling
    Techniques, 3rd ed., section 11.9, the covariance by the same algebra, from memory). u_ia =
    w_i (z_ia - beta_a(c_i)) with z_ia = y_i' D_a and beta = x_c' B the calibration fit (0 without
    calibration). From the group sums S2 = sum w^2 y y', S1 = sum w^2 y, S0 = sum w^2 of `moments`:
        sum_{i in g} u_ia u_ib = D_a' S2_g D_b - beta_a S1_g' D_b - beta_b S1_g' D_a + beta_a beta_b S0_g.
    m_j counts the PSU's respondents with a non-zero weight; c2_j = 0 when m_j < 2. Memory: (P, m, m),
    plus (G, m, m) with calibration: meant for the estimates a test compares, not for a whole book.
    """
    t = gt.totals.sum(axis=0)
    d = np.nan_to_num(estimand.linearize(t))
    m = d.shape[1]
    pairs = product_pairs(gt, estimand)
    psum = gt.psu_totals(moments.totals[:, moments.lookup(pairs)])
    half = np.where(pairs[:, 0] == pairs[:, 1], 0.5, 1.0)
    cross = np.einsum("jq,qa,qb->jab", psum * half, d[pairs[:, 0]], d[pairs[:, 1]])
    cross = cross + cross.transpose(0, 2, 1)
    if calibration is not None:
        beta = _fitted(gt, gt.totals @ d, calibration)[gt.cls]  # (G, m)
        cols = _used_columns(estimand, t)
        s1 = moments.totals[:, moments.lookup(np.column_stack([cols, np.full(len(cols), weight_column)]))]
        s1d = s1 @ d[cols]  # (G, m): S1_g' D
        s0 = moments.totals[:, moments.lookup(np.array([[weight_column, weight_column]]))][:, 0]
        mixed = beta[:, :, None] * s1d[:, None, :]
        per_group = (beta * s0[:, None])[:, :, None] * beta[:, None, :] - mixed - mixed.transpose(0, 2, 1)
        cross = cross + gt.psu_totals(per_group.reshape(len(beta), m * m)).reshape(-1, m, m)
    u = gt.psu_totals(linearized_group_totals(gt, estimand, calibration=calibration))
    n_j = gt.psu_totals(gt.counts[:, [weight_column]].astype(float))[:, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        c2 = (n_j / (n_j - 1))[:, None, None] * (cross - u[:, :, None] * u[:, None, :] / n_j[:, None, None])
    return np.where((n_j >= 2)[:, None, None], c2, 0.0)


def taylor_variance(
    gt: GroupTotals,
    estimand: Estimand,
    layout: PsuLayout,
    *,
    calibration: Calibration | None = None,
    covariance: bool = False,
    within: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Estimates theta(t) and their Taylor variances (m,), or the (m, m) covariance when `covariance`.

    v(theta) = sum_h (1-f_h) n_h/(n_h-1) sum_j (z_hj - zbar_h)^2 with z_hj the PSU totals of the
    linearized variable (calibration residuals when `calibration` is given). `within`: (P, m)
    second-stage variances of the PSU totals (`within_psu_variance`), added as
    sum_h f_h (1 - f_2) sum_j v2(z_hj), the second term of the two-stage estimator; with
    `covariance`, (P, m, m) second-stage covariances (`within_psu_covariance`), added the same way.
    Estimates with a zero denominator total are NaN, and so are their variances.
    """
    if within is not None and np.ndim(within) != (3 if covariance else 2):
        raise ValueError("within must be (P, m) second-stage variances, or (P, m, m) covariances with covariance=True")
    t = gt.totals.sum(axis=0)
    theta = estimand.value(t)
    z = gt.psu_totals(linearized_group_totals(gt, estimand, calibration=calibration))
    v = layout.covariance(z) if covariance else layout.variance(z)
    if within is not None:
        v = v + (layout.second_stage_covariance(within) if covariance else layout.second_stage(within))
    undefined = ~np.isfinite(theta)
    if covariance:
        v[undefined, :] = np.nan
        v[:, undefined] = np.nan
    else:
        v = np.where(undefined, np.nan, v)
    return theta, v
