"""Calibration estimators (Deville & Sarndal 1992, JASA 87: 376-382) solved by Newton's method.

Final weight w_k = d_k F(x_k' lambda), with lambda solving the calibration equations
sum_k d_k F(x_k' lambda) x_k = t_x (Deville & Sarndal 1992, eq. 2.5 with F = inverse of g).
Distances:
  linear: F(u) = 1 + u (the GREG weights; one Newton step is exact).
  logit with bounds L < 1 < U: F(u) = [L(U-1) + U(1-L) e^{Au}] / [(U-1) + (1-L) e^{Au}],
          A = (U-L) / ((1-L)(U-1)); so L < F < U (Deville & Sarndal 1992, section 3, case 6;
          formula from memory, checked in tests: F(0) = 1, F'(0) = 1). Computed stably as
          F = L + (U-L) s, s = expit(A u - log((U-1)/(1-L))), F' = (U-L) A s (1-s).
The units are weighting classes (d = class totals, x = class auxiliary vector) or respondents
(numeric auxiliaries); all R replicates are solved together as (C, R) arrays.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import expit


MAX_HALVINGS = 30


@dataclass(frozen=True)
class CalibrationFit:
    """factors (C, R); lam (p, R); iterations; discrepancy = max |X'w / t - 1|; converged."""

    factors: np.ndarray
    lam: np.ndarray
    iterations: int
    discrepancy: float
    converged: bool


def distance_function(u: np.ndarray, *, distance: str, bounds: tuple[float, float] | None) -> tuple[np.ndarray, np.ndarray]:
    """F(u) and F'(u) for the linear or bounded logit distance (see module docstring)."""
    if distance == "linear":
        return 1.0 + u, np.ones_like(u)
    assert bounds is not None
    low, up = bounds
    a = (up - low) / ((1.0 - low) * (up - 1.0))
    sigma = expit(a * u - np.log((up - 1.0) / (1.0 - low)))
    return low + (up - low) * sigma, (up - low) * a * sigma * (1.0 - sigma)


def calibrate(
    totals: np.ndarray,
    aux: np.ndarray,
    targets: np.ndarray,
    *,
    distance: str,
    bounds: tuple[float, float] | None,
    tolerance: float,
    max_iterations: int,
    start: np.ndarray | None = None,
) -> CalibrationFit:
    """Solve sum_c T_c F(x_c' lam) x_c = t for every replicate by Newton's method.

    totals (C, R) incoming weights per unit; aux (C, p) auxiliary vector of each unit (full
    column rank over units with weight); targets (p, R). Newton step:
    lam <- lam + [X' diag(T F'(X lam)) X]^+ (t - X' (T F(X lam))), halved while it does not
    reduce the largest relative miss (at most MAX_HALVINGS times; pseudo-inverse for safety).
    `start` (p,) optional starting lambda (the full-sample solution for replicates). A replicate
    that has converged is left unchanged while the others go on.
    """
    p, r = aux.shape[1], totals.shape[1]
    lam = np.zeros((p, r)) if start is None else np.repeat(start[:, None], r, axis=1)
    scale = np.maximum(np.abs(targets), 1e-9 * np.abs(targets).max(axis=0, initial=1e-300))
    iterations = 0

    def misses(lam_: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        f_, fprime_ = distance_function(aux @ lam_, distance=distance, bounds=bounds)
        achieved_ = aux.T @ (totals * f_)
        return achieved_, fprime_, (np.abs(achieved_ - targets) / scale).max(axis=0, initial=0.0)

    achieved, fprime, per_column = misses(lam)
    while True:
        active = ~(per_column <= tolerance)
        if not active.any() or iterations >= max_iterations:
            break
        iterations += 1
        cols = np.flatnonzero(active)
        jac = np.einsum("cp,cr,cq->rpq", aux, totals[:, cols] * fprime[:, cols], aux)
        step = (np.linalg.pinv(jac) @ (targets[:, cols] - achieved[:, cols]).T[:, :, None])[:, :, 0].T
        for _ in range(MAX_HALVINGS):
            trial = lam.copy()
            trial[:, cols] += step
            t_achieved, t_fprime, t_miss = misses(trial)
            worse = ~(t_miss[cols] < per_column[cols]) & (per_column[cols] > tolerance)
            if not worse.any():
                break
            step[:, worse] *= 0.5
        lam, achieved, fprime, per_column = trial, t_achieved, t_fprime, t_miss
    discrepancy = float(per_column.max(initial=0.0))
    f, _ = distance_function(aux @ lam, distance=distance, bounds=bounds)
    return CalibrationFit(f, lam, iterations, discrepancy, bool(discrepancy <= tolerance))
