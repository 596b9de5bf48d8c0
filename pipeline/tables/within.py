"""The within-PSU (second-stage) term of variances and covariances of banner estimates, from squared moments.

With a first-stage FPC in a two-stage design the variance of an estimate adds
sum_h f_h (1 - f_2) sum_j v2_j (`pipeline.estimation.design.PsuLayout.second_stage`), where v2_j is
the second-stage variance of PSU j's total of u_i = w_i e_i, e_i = z_i - x_c' B the calibration
residual of the linearized value z_i (`pipeline.estimation.taylor.within_psu_variance`). For two
estimators a and b the same term of their covariance is, per PSU with m_j respondents,

    c2_j(a, b) = m_j / (m_j - 1) [ sum_{i in j} u_ia u_ib - U_ja U_jb / m_j ],   U_j = sum_{i in j} u_i

(the sample covariance form of Cochran 1977, Sampling Techniques, 3rd ed., section 11.9, from
memory), 0 when m_j < 2, so that a difference a - b gets c2(a, a) + c2(b, b) - 2 c2(a, b), clipped
at 0 per PSU as the variance is. With z_a = al_a y_na + be_a y_da (al = 1/t_den, be = -theta/t_den,
`Ratios.linearize`) and beta_a(c) the class's fitted value of the calibration,

    sum_{i in g} u_ia u_ib = al_a al_b S(y_na y_nb) + al_a be_b S(y_na y_db) + be_a al_b S(y_da y_nb)
                             + be_a be_b S(y_da y_db) - beta_b S(z_a) - beta_a S(z_b) + beta_a beta_b S(1),

S(.) = sum_{i in g} w_i^2 (.), all sums of squared weights times quantities of the plan: the four
products are named by the caller (`Cross`), because they are known from the structure of the
banner (two cells of one stub row multiply to the same row in the intersection of their columns;
columns of one single-choice break are disjoint, so their products vanish). For a = b this is
exactly the core's `within_psu_variance` (`tests/test_tables_within.py`).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from pipeline.estimation.estimands import Ratios
from pipeline.estimation.taylor import Calibration, _fitted
from pipeline.estimation.totals import GroupTotals

CHUNK_VALUES = 2**23


@dataclass(frozen=True)
class Cross:
    """Column indices (into the group totals; -1: the product is 0) of y_na y_nb, y_na y_db, y_da y_nb, y_da y_db."""

    nn: np.ndarray
    nd: np.ndarray
    dn: np.ndarray
    dd: np.ndarray

    @staticmethod
    def of(rows: list[tuple[int, int, int, int]]) -> Cross:
        arr = np.asarray(rows, dtype=np.int64).reshape(-1, 4)
        return Cross(arr[:, 0], arr[:, 1], arr[:, 2], arr[:, 3])


@dataclass(frozen=True)
class WithinTerms:
    """What the within-PSU covariances of any pairs of estimators need (module docstring)."""

    squared: np.ndarray  # (G, K + 1) S(.) by group, last column 0 (an absent product)
    ratios: Ratios
    al: np.ndarray  # (m,)
    be: np.ndarray  # (m,)
    beta: np.ndarray | None  # (C, m) fitted calibration values, or None
    cls: np.ndarray  # (G,)
    psu: np.ndarray  # (G,)
    n_psus: int
    u: np.ndarray  # (P, m) PSU totals of the weighted residuals
    m: np.ndarray  # (P,) respondents with a non-zero weight per PSU
    one: int  # column of the quantity 1
    by_psu: np.ndarray  # (P, K + 1) S(.) summed by PSU: the terms of the products that do not vary by group

    @staticmethod
    def build(final: GroupTotals, squared: np.ndarray, ratios: Ratios, calibration: Calibration | None,
              u: np.ndarray, *, weight_column: int) -> WithinTerms:
        t = final.totals.sum(axis=0)
        theta, den = ratios.value(t), ratios.denominators(t)
        with np.errstate(divide="ignore", invalid="ignore"):
            al = np.where(den != 0, np.where(ratios.is_total, 1.0, 1.0 / den), 0.0)
            be = np.where((den != 0) & ~ratios.is_total, -theta / den, 0.0)
        al, be = np.nan_to_num(al), np.nan_to_num(be)
        beta = None
        if calibration is not None:  # in blocks of estimators: no (G, m) matrix of linearized values
            den_idx = np.maximum(ratios.den, 0)
            beta = np.empty((calibration.matrix.shape[0], len(ratios)))
            step = max(1, CHUNK_VALUES // max(1, final.totals.shape[0]))
            for lo in range(0, len(ratios), step):
                sl = slice(lo, min(len(ratios), lo + step))
                z = final.totals[:, ratios.num[sl]] * al[sl] + final.totals[:, den_idx[sl]] * be[sl]
                beta[:, sl] = _fitted(final, z, calibration)
        m = final.psu_totals(final.counts[:, [weight_column]].astype(np.float64))[:, 0]
        sq = np.concatenate([squared, np.zeros((squared.shape[0], 1))], axis=1)
        terms = WithinTerms(sq, ratios, al, be, beta, final.cls, final.psu, final.n_psus, u, m, weight_column,
                            np.zeros(0))
        return replace(terms, by_psu=terms._psu_sums(sq))

    def covariance_terms(self, a: np.ndarray, b: np.ndarray, cross: Cross) -> np.ndarray:
        """(P, q) c2_j(a, b) of the module docstring for pairs a[k], b[k]."""
        a, b = np.asarray(a, dtype=np.int64), np.asarray(b, dtype=np.int64)
        q = len(a)
        out = np.zeros((self.n_psus, q))
        step = max(1, CHUNK_VALUES // max(1, self.squared.shape[0]))
        s, sp = self.squared, self.by_psu
        num, den = self.ratios.num, np.where(self.ratios.is_total, -1, self.ratios.den)
        for lo in range(0, q, step):
            sl = slice(lo, min(q, lo + step))
            ia, ib = a[sl], b[sl]
            aa, ab, ba, bb = self.al[ia], self.al[ib], self.be[ia], self.be[ib]
            # the coefficients are constant over groups: sum by PSU first, then combine
            xp = (aa * ab * sp[:, cross.nn[sl]] + aa * bb * sp[:, cross.nd[sl]] + ba * ab * sp[:, cross.dn[sl]]
                  + ba * bb * sp[:, cross.dd[sl]])
            if self.beta is not None:  # the fitted calibration values vary by class: per group
                beta_a, beta_b = self.beta[:, ia][self.cls], self.beta[:, ib][self.cls]
                sz_a = aa * s[:, num[ia]] + ba * s[:, den[ia]]
                sz_b = ab * s[:, num[ib]] + bb * s[:, den[ib]]
                xp = xp + self._psu_sums(beta_a * beta_b * s[:, [self.one]] - beta_b * sz_a - beta_a * sz_b)
            with np.errstate(divide="ignore", invalid="ignore"):
                c2 = self.m[:, None] / (self.m[:, None] - 1) * (xp - self.u[:, ia] * self.u[:, ib] / self.m[:, None])
            out[:, sl] = np.where(self.m[:, None] >= 2, c2, 0.0)
        return out

    def _psu_sums(self, x: np.ndarray) -> np.ndarray:
        """(G, ...) -> (P, ...) sums over the groups of each PSU (groups are sorted by PSU)."""
        out = np.zeros((self.n_psus, *x.shape[1:]))
        if len(self.psu):
            starts = np.flatnonzero(np.r_[True, self.psu[1:] != self.psu[:-1]])
            out[self.psu[starts]] = np.add.reduceat(x, starts, axis=0)
        return out

    def joint_covariance_terms(self, idx: np.ndarray) -> np.ndarray:
        """(P, k, k) c2_j(a, b) for the joint cells `idx` of a stub by a break (`cells.WavePlan.joint_cross`).

        Their numerators are disjoint and their denominators one joint base jb, so with r_a = al_a S(y_a),
        sz_a = r_a + be_a S(jb) and beta_a the fitted calibration values,
            sum_g u_a u_b = delta_ab al_a r_a + r_a be_b + be_a r_b + be_a be_b S(jb)
                            - sz_a beta_b - beta_a sz_b + beta_a beta_b S(1),
        the outer-product form of `covariance_terms` for these products (module docstring), summed by PSU.
        """
        idx = np.asarray(idx, dtype=np.int64)
        num, jb = self.ratios.num[idx], self.ratios.den[idx[0]]
        al, be = self.al[idx], self.be[idx]
        s = self.squared
        r = al * s[:, num]
        sz = r + be * s[:, [jb]]
        rp, jbp = self._psu_sums(r), self._psu_sums(s[:, jb])
        x = (np.einsum("pk,k->pk", rp, al)[:, :, None] * np.eye(len(idx))
             + rp[:, :, None] * be[None, None, :] + be[None, :, None] * rp[:, None, :]
             + jbp[:, None, None] * np.outer(be, be)[None])
        if self.beta is not None:  # per PSU: sz' b + b' sz - b' diag(S(1)) b over its groups (sorted by PSU)
            b = self.beta[:, idx][self.cls]
            one = s[:, self.one]
            cross = np.zeros_like(x)
            starts = np.flatnonzero(np.r_[True, self.psu[1:] != self.psu[:-1]]) if len(self.psu) else np.zeros(0, np.int64)
            for lo, hi in zip(starts.tolist(), [*starts[1:].tolist(), len(self.psu)], strict=True):
                product = sz[lo:hi].T @ b[lo:hi]
                cross[self.psu[lo]] = product + product.T - (b[lo:hi] * one[lo:hi, None]).T @ b[lo:hi]
            x = x - cross
        u = self.u[:, idx]
        m = self.m[:, None, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            c2 = m / (m - 1) * (x - u[:, :, None] * u[:, None, :] / m)
        return np.where(m >= 2, c2, 0.0)
