"""Estimators as smooth functions of totals, and their linearization.

Every estimate wavebook makes from group totals is a ratio of two estimated totals or a total:

    theta_j = t[num_j] / t[den_j]        (mean, proportion, ratio; den_j = -1: theta_j = t[num_j])

A mean of y in domain d is t(y d) / t(d answered); a proportion of category a is
t(1[y = a] d) / t(d answered). Differences (between banner columns, between waves) are linear
contrasts C theta of such ratios. Both expose the same two methods, so Taylor and replicate
variances treat them alike:

    value(t)      the estimates from totals t (vectorised over leading axes: replicates)
    linearize(t)  D (K, m): influence weights, so the linearized variable of respondent i is
                  z_i = y_i @ D and theta_hat - theta ~ sum_i w_i z_i (first-order Taylor expansion;
                  Woodruff 1971, JASA 66:411-414; Binder 1983, Int. Stat. Rev. 51:279-292).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Ratios:
    """m estimators theta_j = t[num_j] / t[den_j]; den_j = -1 means theta_j = t[num_j] (a total)."""

    num: np.ndarray  # (m,) int column indices into GroupTotals.columns
    den: np.ndarray  # (m,) int, -1 for totals

    def __post_init__(self) -> None:
        object.__setattr__(self, "num", np.asarray(self.num, dtype=np.int64).reshape(-1))
        object.__setattr__(self, "den", np.asarray(self.den, dtype=np.int64).reshape(-1))
        if self.num.shape != self.den.shape:
            raise ValueError(f"num and den differ in length ({len(self.num)} and {len(self.den)})")

    def __len__(self) -> int:
        return len(self.num)

    @property
    def is_total(self) -> np.ndarray:
        """(m,) bool: which estimators are plain totals."""
        return self.den < 0

    def denominators(self, t: np.ndarray) -> np.ndarray:
        """t (..., K) -> (..., m): the denominator totals (1 for plain totals)."""
        t = np.asarray(t, dtype=np.float64)
        return np.where(self.is_total, 1.0, t[..., np.maximum(self.den, 0)])

    def value(self, t: np.ndarray) -> np.ndarray:
        """t (..., K) -> (..., m): theta_j = t_num / t_den (NaN where the denominator total is 0)."""
        t = np.asarray(t, dtype=np.float64)
        with np.errstate(divide="ignore", invalid="ignore"):
            out = t[..., self.num] / self.denominators(t)
        return np.where(self.denominators(t) == 0, np.nan, out)

    def linearize(self, t: np.ndarray) -> np.ndarray:
        """t (K,) -> D (K, m), the gradient of theta with respect to the totals.

        For a ratio R = t_y / t_x: dR/dt_y = 1 / t_x and dR/dt_x = -R / t_x, so the linearized
        variable is z_i = (y_i - R x_i) / t_x (Woodruff 1971; Lohr 3rd ed. section 9.1, from
        memory); for a total z_i = y_i. Columns with a zero denominator are NaN.
        """
        t = np.asarray(t, dtype=np.float64)
        m = len(self)
        cols = np.arange(m)
        theta = self.value(t)
        den = self.denominators(t)
        with np.errstate(divide="ignore", invalid="ignore"):
            d_num = np.where(self.is_total, 1.0, 1.0 / den)
            d_den = -theta / den
        out = np.zeros((t.shape[-1], m))
        np.add.at(out, (self.num, cols), d_num)
        ratio = ~self.is_total
        np.add.at(out, (self.den[ratio], cols[ratio]), d_den[ratio])
        out[:, den == 0] = np.nan
        return out

    def contrast(self, matrix: np.ndarray) -> Contrast:
        """The q linear combinations C theta, C of shape (q, m) (e.g. a row [1, -1] for a difference)."""
        return Contrast(self, np.atleast_2d(np.asarray(matrix, dtype=np.float64)))


@dataclass(frozen=True)
class Contrast:
    """Linear contrasts C theta of ratios: value = C theta, gradient D C' (chain rule), covariances included."""

    ratios: Ratios
    matrix: np.ndarray  # (q, m)

    def __len__(self) -> int:
        return self.matrix.shape[0]

    def value(self, t: np.ndarray) -> np.ndarray:
        """t (..., K) -> (..., q): C theta(t)."""
        return self.ratios.value(t) @ self.matrix.T

    def linearize(self, t: np.ndarray) -> np.ndarray:
        """t (K,) -> (K, q): D C', the influence weights of C theta."""
        return self.ratios.linearize(t) @ self.matrix.T
