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
    collapsed: (R,) whether a replicate had an empty category merged into a neighbour
    (`collapse_empty`); unconverged: (R,) whether a replicate is still beyond the tolerance.
    """

    factors: np.ndarray
    iterations: int
    discrepancy: np.ndarray
    converged: bool
    empty: np.ndarray
    collapsed: np.ndarray
    unconverged: np.ndarray


def merge_empty_targets(
    sums: np.ndarray, targets: np.ndarray, groups: Sequence[np.ndarray] | None = None
) -> np.ndarray:
    """(K, R) targets with each category that has no weight (sums 0, target > 0) merged into a neighbour.

    Per replicate: the target of an empty category moves to the heaviest category with weight of
    its group in the step's collapse order (`groups`: arrays of category indices), else to the
    nearest category in code order that has weight, the heavier of the two at equal distance, so
    the margin can still be met and its total is kept (a per-replicate collapse; our rule, common
    practice for sparse cells, no source). Categories are left as they are when none has weight.
    """
    out = targets.copy()
    for k, r in zip(*np.nonzero((sums <= 0) & (targets > 0)), strict=True):
        live = np.flatnonzero(sums[:, r] > 0)
        if not len(live):
            continue
        mates = [g for g in (groups or ()) if k in g]
        in_group = np.intersect1d(live, mates[0]) if mates else np.array([], dtype=np.int64)
        distance = np.abs(live - k)
        near = in_group if len(in_group) else live[distance == distance.min()]
        partner = near[np.argmax(sums[near, r])]
        out[partner, r] += out[k, r]
        out[k, r] = 0.0
    return out


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
    collapse_empty: bool = False,
    partners: Sequence[Sequence[np.ndarray] | None] | None = None,
) -> RakeFit:
    """Rake (C, R) class totals to the margins; `population` (R,) scales proportion targets.

    Each cycle: for m in margins, S = G_m A (category totals), A <- A * (t_m / S)[category].
    Stops when every margin is within `tolerance` (relative) or after `max_iterations` cycles; a
    replicate that has converged is left unchanged while the others go on (so each replicate's
    result does not depend on which others are raked with it).
    `start` (C,) optional class factors to begin from: any product of per-category factors of the
    same margins leaves the fixed point unchanged (it is a reparametrisation of lambda), so the
    full-sample factors are a valid warm start for replicates.
    `collapse_empty` (replicates): a category with no weight in a replicate has its target merged
    into a neighbour for that replicate (`merge_empty_targets`; `partners`: per margin, the category
    groups of the step's collapse order, or None), so the others can still be met.
    """
    current = totals.copy() if start is None else totals * start[:, None]
    indicators = [_indicator(m) for m in margins]
    targets = [absolute_targets(m, population) for m in margins]
    collapsed = np.zeros(totals.shape[1], dtype=bool)
    if collapse_empty:
        groups = list(partners) if partners is not None else [None] * len(margins)
        merged = [merge_empty_targets(g @ current, t, p) for g, t, p in zip(indicators, targets, groups)]
        for t, t_new in zip(targets, merged):
            collapsed |= np.any(t != t_new, axis=0)
        targets = merged
    per_column = np.zeros((len(margins), totals.shape[1]))
    empty = np.zeros(len(margins), dtype=np.int64)
    iterations = 0

    def check(cols: np.ndarray) -> np.ndarray:
        """Update per_column (and empty) for the replicate columns `cols`; which are beyond the tolerance."""
        block = current[:, cols]
        for k, (g, t) in enumerate(zip(indicators, targets)):
            sums = g @ block
            tk = t[:, cols]
            live = sums > 0
            empty[k] = int((~live & (tk > 0)).sum())
            rel = np.abs(np.divide(sums, tk, out=np.ones_like(sums), where=live & (tk > 0)) - 1.0)
            per_column[k, cols] = rel.max(axis=0) if rel.size else 0.0
        return per_column[:, cols].max(axis=0, initial=0.0) > tolerance

    everything = np.arange(totals.shape[1])
    active = check(everything)
    while iterations < max_iterations and active.any():
        iterations += 1
        cols = np.flatnonzero(active)  # converged replicates are left as they are
        block = current[:, cols]
        for m, g, t in zip(margins, indicators, targets):
            sums = g @ block
            block *= np.divide(t[:, cols], sums, out=np.ones_like(sums), where=sums > 0)[m.of_class]
        current[:, cols] = block
        active[cols] = check(cols)
    check(everything)
    discrepancy = per_column.max(axis=1, initial=0.0)
    # factor of each class = raked / incoming total; a class with no incoming weight keeps its
    # starting factor (it carries no weight, so any finite factor gives the same replicate weights)
    first = np.ones_like(totals) if start is None else np.repeat(start[:, None], totals.shape[1], axis=1)
    factors = np.divide(current, totals, out=first, where=totals > 0)
    unconverged = per_column.max(axis=0, initial=0.0) > tolerance
    return RakeFit(factors, iterations, discrepancy, bool(discrepancy.max(initial=0.0) <= tolerance), empty.copy(),
                   collapsed, unconverged)
