"""Raking (iterative proportional fitting) on class totals, all replicates at once.

Deming & Stephan (1940), "On a least squares adjustment of a sampled frequency table when the
expected marginal totals are known", Ann. Math. Statist. 11: each cycle scales the weights of
every category of margin m by target / current total, margin after margin, until every margin
is met. The fixed point is the minimum-discrimination-information ("raking ratio") calibration
w_i = d_i exp(x_i' lambda) of Deville & Sarndal (1992), JASA 87, section 2 (case 2 distance).

Arrays are (C, R): C weighting classes by R replicates (R = 1 for the full sample).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from pipeline.weighting.classes import Margin


@dataclass(frozen=True)
class RakeFit:
    """Result of raking: factors (C, R), cycles run, remaining discrepancy per margin, converged flag.

    discrepancy[m] = max over categories and replicates of |achieved / target - 1| after the last cycle.
    empty[m] = number of (category, replicate) pairs with no weight (left unadjusted).
    """

    factors: np.ndarray
    iterations: int
    discrepancy: np.ndarray
    converged: bool
    empty: np.ndarray


def _indicator(margin: Margin) -> sparse.csr_array:
    c = margin.of_class.shape[0]
    return sparse.csr_array(
        (np.ones(c), (margin.of_class, np.arange(c))), shape=(margin.size, c)
    )


def absolute_targets(margin: Margin, population: np.ndarray) -> np.ndarray:
    """(K, R) targets as totals: counts as given; proportions times each replicate's population total."""
    if margin.kind == "count":
        return np.repeat(margin.targets[:, None], population.shape[0], axis=1)
    return margin.targets[:, None] * population[None, :]


def rake(
    totals: np.ndarray,
    margins: Sequence[Margin],
    population: np.ndarray,
    *,
    tolerance: float,
    max_iterations: int,
    start: np.ndarray | None = None,
) -> RakeFit:
    """Rake (C, R) class totals to the margins; `population` (R,) scales proportion targets.

    Each cycle: for m in margins, S = G_m A (category totals), A <- A * (t_m / S)[category].
    Stops when every margin is within `tolerance` (relative) or after `max_iterations` cycles; a
    replicate that has converged is left unchanged while the others go on (so each replicate's
    result does not depend on which others are raked with it).
    `start` (C,) optional class factors to begin from: any product of per-category factors of the
    same margins leaves the fixed point unchanged (it is a reparametrisation of lambda), so the
    full-sample factors are a valid warm start for replicates.
    """
    current = totals.copy() if start is None else totals * start[:, None]
    indicators = [_indicator(m) for m in margins]
    targets = [absolute_targets(m, population) for m in margins]
    per_column = np.zeros((len(margins), totals.shape[1]))
    empty = np.zeros(len(margins), dtype=np.int64)
    iterations = 0

    def check() -> np.ndarray:
        for k, (g, t) in enumerate(zip(indicators, targets)):
            sums = g @ current
            live = sums > 0
            empty[k] = int((~live & (t > 0)).sum())
            rel = np.abs(np.divide(sums, t, out=np.ones_like(sums), where=live & (t > 0)) - 1.0)
            per_column[k] = rel.max(axis=0) if rel.size else 0.0
        return per_column.max(axis=0, initial=0.0) > tolerance

    active = check()
    step = np.empty_like(current)
    while iterations < max_iterations and active.any():
        iterations += 1
        for m, g, t in zip(margins, indicators, targets):
            sums = g @ current
            ratio = np.divide(t, sums, out=np.ones_like(sums), where=(sums > 0) & active[None, :])
            np.take(ratio, m.of_class, axis=0, out=step)
            current *= step
        active = check()
    discrepancy = per_column.max(axis=1, initial=0.0)
    # factor of each class = raked / incoming total; a class with no incoming weight keeps its
    # starting factor (it carries no weight, so any finite factor gives the same replicate weights)
    first = np.ones_like(totals) if start is None else np.repeat(start[:, None], totals.shape[1], axis=1)
    factors = np.divide(current, totals, out=first, where=totals > 0)
    return RakeFit(factors, iterations, discrepancy, bool(discrepancy.max(initial=0.0) <= tolerance), empty.copy())
