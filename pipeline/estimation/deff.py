"""Design effects, their square roots and effective sample sizes.

deff = v_design(theta) / v_srs(theta) (Kish 1965, Survey Sampling, section 8.2; Kish 1995,
"Methods for design effects", J. Official Statistics 11:55-77), deft = sqrt(deff), and the
effective sample size n_eff = n / deff (Kish 1965 section 8.2; Lohr 3rd ed. section 7.5, from memory).

v_srs is the variance the same estimator would have under simple random sampling of the same
number n of respondents of its base (the domain's respondents who answered), estimated from the
weighted sample. With z_i the linearized variable of the estimator (`Ratios.linearize`) and W the
weight total of the base:

    v_srs = (1 - n/W) * W^2 / (n - 1) * [ sum_i w_i z_i^2 / W - (sum_i w_i z_i / W)^2 ]

(the factor 1 - n/W only when the design has an FPC). Special cases, which are the textbook
definitions: a mean, z_i = (y_i - ybar)/W, gives (1 - f) s_w^2 / n with
s_w^2 = n/(n-1) sum w (y - ybar)^2 / W the weighted estimate of the population variance; a
proportion gives p(1-p) / (n - 1) = [p(1-p) n/(n-1)] / n; a total gives W^2 times the mean's
variance (Lohr 3rd ed. sections 2.3 and 7.5, from memory).

A domain mean or proportion is compared with an SRS of the domain's own respondents (the usual
domain design effect). A domain total is the total of y * 1[domain] over the whole sample, and
under SRS the domain's size is random, so its reference is an SRS of the variable's whole-sample
base (n and W of every respondent who answered, z_i = y_i in the domain and 0 outside; Lohr 3rd
ed. section 4.3, from memory): an SRS with equal weights then has deff = 1 for every total, and
n_eff = n / deff refers to that whole-sample n.
"""

from __future__ import annotations

import numpy as np

from pipeline.estimation.estimands import Ratios


def second_moment(ratios: Ratios, t: np.ndarray, *, s_nn: np.ndarray, s_nd: np.ndarray, s_dd: np.ndarray) -> np.ndarray:
    """sum_i w_i z_i^2 for each ratio, from the weighted sums of squares and cross-products.

    With z_i = a y_i + b x_i (a = 1/t_x, b = -R/t_x; a = 1, b = 0 for totals):
    sum w z^2 = a^2 sum w y^2 + 2 a b sum w x y + b^2 sum w x^2.
    """
    t = np.asarray(t, dtype=np.float64)
    den = ratios.denominators(t)
    with np.errstate(divide="ignore", invalid="ignore"):
        a = np.where(ratios.is_total, 1.0, 1.0 / den)
        b = np.where(ratios.is_total, 0.0, -ratios.value(t) / den)
        return a**2 * s_nn + 2 * a * b * s_nd + b**2 * s_dd


def srs_variance(
    *, sum_wz2: np.ndarray, sum_wz: np.ndarray, base_weight: np.ndarray, base_n: np.ndarray, fpc: bool
) -> np.ndarray:
    """v_srs = (1 - n/W if fpc) * W^2/(n-1) * [sum w z^2 / W - (sum w z / W)^2]; NaN when n < 2 or W = 0."""
    w = np.asarray(base_weight, dtype=np.float64)
    n = np.asarray(base_n, dtype=np.float64)
    ok = (n >= 2) & (w > 0)
    w_safe = np.where(ok, w, 1.0)
    n_safe = np.where(ok, n, 2.0)
    spread = np.asarray(sum_wz2) / w_safe - (np.asarray(sum_wz) / w_safe) ** 2
    v = w_safe**2 / (n_safe - 1) * np.maximum(spread, 0.0)
    if fpc:
        v = v * np.clip(1.0 - n_safe / w_safe, 0.0, 1.0)
    return np.where(ok, v, np.nan)


def design_effect(v_design: np.ndarray, v_srs: np.ndarray) -> np.ndarray:
    """deff = v_design / v_srs (NaN when v_srs is 0 or undefined)."""
    v_srs = np.asarray(v_srs, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(v_srs > 0, np.asarray(v_design, dtype=np.float64) / v_srs, np.nan)


def effective_n(n: np.ndarray, deff: np.ndarray) -> np.ndarray:
    """n_eff = n / deff (Kish 1965 section 8.2); NaN when deff is undefined or 0."""
    deff = np.asarray(deff, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(deff > 0, np.asarray(n, dtype=np.float64) / deff, np.nan)
