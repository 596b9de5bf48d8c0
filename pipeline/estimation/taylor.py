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
    z = gt.totals @ np.nan_to_num(estimand.linearize(t))
    if calibration is None:
        return z
    x = np.asarray(calibration.matrix, dtype=np.float64)
    if x.shape[0] < gt.n_classes:
        raise ValueError(f"calibration matrix has {x.shape[0]} classes but the data have {gt.n_classes}")
    w_g = gt.totals[:, calibration.weight_column]
    w_c = np.bincount(gt.cls, weights=w_g, minlength=x.shape[0])
    z_c = sum_by(gt.cls, z, x.shape[0])
    b = np.linalg.pinv((x * w_c[:, None]).T @ x) @ (x.T @ z_c)
    return z - w_g[:, None] * (x @ b)[gt.cls]


def taylor_variance(
    gt: GroupTotals,
    estimand: Estimand,
    layout: PsuLayout,
    *,
    calibration: Calibration | None = None,
    covariance: bool = False,
) -> tuple[np.ndarray, np.ndarray]:
    """Estimates theta(t) and their Taylor variances (m,), or the (m, m) covariance when `covariance`.

    v(theta) = sum_h (1-f_h) n_h/(n_h-1) sum_j (z_hj - zbar_h)^2 with z_hj the PSU totals of the
    linearized variable (calibration residuals when `calibration` is given). Estimates with a zero
    denominator total are NaN, and so are their variances.
    """
    t = gt.totals.sum(axis=0)
    theta = estimand.value(t)
    z = gt.psu_totals(linearized_group_totals(gt, estimand, calibration=calibration))
    v = layout.covariance(z) if covariance else layout.variance(z)
    undefined = ~np.isfinite(theta)
    if covariance:
        v[undefined, :] = np.nan
        v[:, undefined] = np.nan
    else:
        v = np.where(undefined, np.nan, v)
    return theta, v
