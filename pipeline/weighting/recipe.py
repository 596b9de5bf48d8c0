"""Fit the weighting steps on one wave and keep them as a replayable recipe.

Final weight of respondent i: w_i = b_i * f[c_i], where b_i (`adjusted_base`) is the base weight
times the per-respondent factors held fixed (nonresponse-class factors, trimming factors) and
f = replay(class totals of b) is produced by the class-level steps (post-stratification,
raking, calibration) applied in their declared order to the (C,) class totals. Because those
steps give every member of a class the same factor, a replicate r with PSU factors a_r is
re-weighted by replaying the recipe on the class totals of b_i * a_r(psu_i): its weights are
b_i * a_r(psu_i) * replay(T_r)[c_i] (see ../shared/DESIGN.md). Holding the nonresponse and
trimming factors fixed in replicates is a simplification stated in the methodology.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import polars as pl

from pipeline.errors import DataError, Problem
from pipeline.weighting.base import adjust_nonresponse, check_base
from pipeline.weighting.calibration import calibrate
from pipeline.weighting.classes import ClassIndex, Margin, build_classes
from pipeline.weighting.diagnostics import StepReport, WeightSummary, largest_weights, margin_checks
from pipeline.weighting.ipf import absolute_targets, rake
from pipeline.weighting.margins import Collapse, build_margins
from pipeline.weighting.steps import CalibrateStep, NonresponseStep, PoststratifyStep, RakeStep, Step, TrimStep

TRIM_SLACK = 1e-6  # a weight within this relative distance of its bound counts as within it
POSTSTRATIFY_TOLERANCE = 1e-10
WATER_FILLING_STEPS = 50
REPLAY_BLOCK_BYTES = 2 * 2**20


def _population(margins: Sequence[Margin], fixed: float | None) -> float | None:
    if fixed is not None:
        return fixed
    counts = [float(m.targets.sum()) for m in margins if m.kind == "count"]
    return counts[0] if counts else None


def reference_coded(margins: Sequence[Margin]) -> tuple[np.ndarray, list[tuple[Margin, np.ndarray]]]:
    """(C, p) full-rank auxiliary matrix of categorical margins: the first margin with every category,
    later margins without their first category (their totals then follow from the first margin's).
    Also returns, per margin, the category columns kept."""
    blocks, kept = [], []
    for j, m in enumerate(margins):
        cols = np.arange(m.size) if j == 0 else np.arange(1, m.size)
        blocks.append(m.indicator()[:, cols])
        kept.append((m, cols))
    return np.hstack(blocks) if blocks else np.zeros((0, 0)), kept


def _population_now(op: _RakeOp | _CalibrateOp, current: np.ndarray) -> np.ndarray:
    """(R,) population total that proportion targets are scaled to.

    Declared (`total`, or the step's count margins): that number. Otherwise it is estimated by the
    sum of the weights entering the step: at the first fit that sum P0 is recorded and held while
    later steps (trimming) refit; once the recipe is frozen with the full-sample entering sum S,
    a replicate entering with sum S_r is scaled to P0 * S_r / S (so the full sample gets P0 exactly)."""
    r = current.shape[1]
    if op.population is not None:
        return np.full(r, op.population)
    if op.estimated is None:
        op.estimated = float(current.sum())
    if op.reference is None:
        return np.full(r, op.estimated)
    return current.sum(axis=0) * (op.estimated / op.reference)


@dataclass
class _RakeOp:
    """A raking (or post-stratification: one margin) step on class totals."""

    index: int
    kind: str
    margins: list[Margin]
    population: float | None
    tolerance: float
    max_iterations: int
    allow_nonconvergence: bool
    start: np.ndarray | None = None
    last: dict = field(default_factory=dict)
    estimated: float | None = None
    reference: float | None = None
    replicate_tolerance: float | None = None
    replicate_max_iterations: int | None = None
    partners: list | None = None  # per margin, category groups of the step's collapse order (or None)
    collapsed_replicates: int = 0  # replicates in which an empty margin category was merged into a neighbour
    unconverged_replicates: int = 0  # replicates accepted beyond replicate_tolerance
    worst_replicate_discrepancy: float = 0.0

    def apply(self, current: np.ndarray) -> np.ndarray:
        """(C, R) class totals -> (C, R) factors. Once frozen (`reference` set), columns are replicates:
        empty categories are merged per replicate, the replicate tolerance and cycle budget apply, and a
        replicate still beyond the tolerance is accepted and counted (replicate re-weighting always
        finishes); the full-sample fit is never relaxed."""
        pop = _population_now(self, current)
        if self.reference is not None:
            return self._apply_replicates(current, pop)
        fit = rake(current, self.margins, pop, tolerance=self.tolerance, max_iterations=self.max_iterations, start=self.start)
        self.last = {"iterations": fit.iterations, "converged": fit.converged,
                     "discrepancy": {m.name: float(d) for m, d in zip(self.margins, fit.discrepancy)},
                     "population": float(pop[0]) if pop.size else 0.0,
                     "empty": {m.name: int(e) for m, e in zip(self.margins, fit.empty) if e}}
        if not fit.converged and not self.allow_nonconvergence:
            replicate = (" while re-weighting a replicate (the full-sample fit converged): a replicate that drops "
                         "PSUs left these margins unreachable or slow to reach; collapse categories so each spans "
                         "several PSUs, or") if self.reference is not None else ";"
            raise DataError(
                f"weighting step {self.index + 1} ({self.kind}) did not converge in {fit.iterations} iteration(s) "
                f"(tolerance {self.tolerance:g}){replicate} set allow_nonconvergence = true to accept it with a warning",
                [Problem("rake-nonconvergence", f"margin '{m.name}': remaining relative discrepancy {d:.3e}"
                         + (f"; {e} empty category-replicate pair(s)" if e else ""), column=m.name)
                 for m, d, e in zip(self.margins, fit.discrepancy, fit.empty)],
            )
        if self.start is None:
            self.start = fit.factors[:, 0].copy()
        return fit.factors

    def _apply_replicates(self, current: np.ndarray, pop: np.ndarray) -> np.ndarray:
        tolerance = max(self.tolerance, self.replicate_tolerance or self.tolerance)
        cycles = self.replicate_max_iterations or 20 * self.max_iterations
        fit = rake(current, self.margins, pop, tolerance=tolerance, max_iterations=cycles, start=self.start,
                   collapse_empty=True, partners=self.partners)
        self.last = {"iterations": fit.iterations, "converged": fit.converged,
                     "discrepancy": {m.name: float(d) for m, d in zip(self.margins, fit.discrepancy)},
                     "population": float(pop[0]) if pop.size else 0.0,
                     "empty": {m.name: int(e) for m, e in zip(self.margins, fit.empty) if e}}
        self.collapsed_replicates += int(fit.collapsed.sum())
        self.unconverged_replicates += int(fit.unconverged.sum())
        if fit.unconverged.any():
            self.worst_replicate_discrepancy = max(self.worst_replicate_discrepancy, float(fit.discrepancy.max()))
        return fit.factors

    def aux(self) -> np.ndarray:
        return reference_coded(self.margins)[0]


@dataclass
class _CalibrateOp:
    """A calibration step on class (or respondent) totals."""

    index: int
    margins: list[Margin]
    numeric: np.ndarray  # (C, q) numeric auxiliaries per unit
    numeric_totals: np.ndarray  # (q,)
    numeric_names: list[str]
    population: float | None
    distance: str
    bounds: tuple[float, float] | None
    tolerance: float
    max_iterations: int
    start: np.ndarray | None = None
    last: dict = field(default_factory=dict)
    estimated: float | None = None
    reference: float | None = None

    def aux(self) -> np.ndarray:
        x, _ = reference_coded(self.margins)
        return np.hstack([x, self.numeric]) if x.size else self.numeric

    def targets(self, pop: np.ndarray) -> np.ndarray:
        _, kept = reference_coded(self.margins)
        rows = [absolute_targets(m, pop)[cols] for m, cols in kept]
        rows.append(np.repeat(self.numeric_totals[:, None], pop.shape[0], axis=1))
        return np.vstack(rows)

    def apply(self, current: np.ndarray) -> np.ndarray:
        pop = _population_now(self, current)
        try:
            fit = calibrate(current, self.aux(), self.targets(pop), distance=self.distance, bounds=self.bounds,
                            tolerance=self.tolerance, max_iterations=self.max_iterations, start=self.start)
        except np.linalg.LinAlgError as exc:
            raise DataError(f"weighting step {self.index + 1} (calibrate): the auxiliary variables are collinear among the "
                            "respondents (a category with no weight, or a numeric variable that is constant)") from exc
        self.last = {"iterations": fit.iterations, "converged": fit.converged,
                     "discrepancy": {"all calibration totals": fit.discrepancy}, "population": float(pop[0])}
        if not fit.converged:
            raise DataError(
                f"weighting step {self.index + 1} (calibrate, {self.distance}) did not converge in {fit.iterations} Newton "
                f"step(s): largest relative miss {fit.discrepancy:.3e}"
                + (f"; the bounds {self.bounds} may be too tight for these targets" if self.bounds else ""),
                [Problem("calibration-nonconvergence", "calibration equations not solved", column=", ".join(
                    [m.name for m in self.margins] + self.numeric_names))],
            )
        if (fit.factors <= 0).any():
            raise DataError(f"weighting step {self.index + 1} (calibrate, linear): some weights came out zero or negative "
                            f"({int((fit.factors <= 0).sum())} class(es)); use distance = \"logit\" with bounds")
        if self.start is None:
            self.start = fit.lam[:, 0].copy()
        return fit.factors


@dataclass
class FittedRecipe:
    """The weighting of one wave, replayable on replicate class totals.

    weights (n,): final weights of the weighted rows (respondents), in `ids` order.
    classes (n,): weighting class of each row, 0..C-1; class_labels (C,); class_frame (C rows, codes as text).
    adjusted_base (n,): base weight times per-respondent factors held fixed (nonresponse, trimming).
    aux_matrix: (n, p) per-respondent auxiliaries when a calibration uses numeric auxiliaries (then
    every respondent is its own class, C = n), else None.
    kept (n_input,): which input rows were weighted (False for nonrespondents and ineligibles).
    """

    ids: pl.Series
    weights: np.ndarray
    classes: np.ndarray
    class_labels: tuple[str, ...]
    class_frame: pl.DataFrame
    adjusted_base: np.ndarray
    kept: np.ndarray
    ops: list
    aux_matrix: np.ndarray | None
    reports: list[StepReport]
    base_summary: WeightSummary
    dropped: dict[str, int]
    warnings: list[Problem]

    def replay(self, class_totals: np.ndarray) -> np.ndarray:
        """(R, C) class totals of adjusted_base * a_r -> (R, C) class factors f_r of the class-level steps.

        Replicate weight_i = adjusted_base_i * a_r(psu_i) * f_r[classes_i]; replay of the full-sample
        totals returns the full-sample factors, so weights == adjusted_base * replay(T)[0, classes].
        Replicates are processed in blocks of (C, block) arrays of about REPLAY_BLOCK_BYTES, so
        the working set stays in cache; each replicate's result does not depend on its block.
        """
        totals = np.asarray(class_totals, dtype=float)
        out = np.empty_like(totals)
        block = max(1, REPLAY_BLOCK_BYTES // (8 * max(totals.shape[1], 1)))
        for first in range(0, totals.shape[0], block):
            current = totals[first:first + block].T.copy()
            factors = np.ones_like(current)
            for op in self.ops:
                f = op.apply(current)
                current *= f
                factors *= f
            out[first:first + block] = factors.T
            self._note_empty()
        return out

    def _note_empty(self) -> None:
        """Record (once per step) a warning when replicates needed a per-replicate collapse or were
        accepted beyond the replicate tolerance (`replicate_adjustments` has the counts)."""
        for op in self.ops:
            if not isinstance(op, _RakeOp) or op.reference is None:
                continue
            if op.collapsed_replicates:
                message = (f"weighting step {op.index + 1}: in some replicates a margin category had no respondents and was "
                           "merged into its neighbour for that replicate; collapse categories so each spans several PSUs")
                if all(p.message != message for p in self.warnings):
                    self.warnings.append(Problem("replicate-empty-category", message, severity="warning"))
            if op.unconverged_replicates:
                message = (f"weighting step {op.index + 1}: some replicates stopped beyond the replicate tolerance "
                           f"({max(op.tolerance, op.replicate_tolerance or op.tolerance):g}); raise "
                           "replicate_max_iterations or loosen replicate_tolerance")
                if all(p.message != message for p in self.warnings):
                    self.warnings.append(Problem("replicate-nonconvergence", message, severity="warning"))

    def replicate_adjustments(self) -> dict[str, int]:
        """Replicate columns re-weighted so far that needed a per-replicate collapse of an empty margin
        category ("collapsed") or were accepted beyond the replicate tolerance ("unconverged"), summed
        over the raking steps."""
        ops = [op for op in self.ops if isinstance(op, _RakeOp)]
        return {"collapsed": sum(op.collapsed_replicates for op in ops),
                "unconverged": sum(op.unconverged_replicates for op in ops)}

    def calibration_matrix(self) -> np.ndarray:
        """(C, p) auxiliary vector x of each class for the last class-level step (full column rank:
        indicators of the first margin, then of later margins without their first category, then
        numeric auxiliaries); for GREG residuals y - x'B (Deville & Sarndal 1992, section 3).
        Empty (C, 0) when no class-level step ran."""
        if not self.ops:
            return np.zeros((len(self.class_labels), 0))
        return self.ops[-1].aux()

    def class_totals(self, weights: np.ndarray | None = None) -> np.ndarray:
        """(C,) class totals of `weights` (default adjusted_base)."""
        w = self.adjusted_base if weights is None else weights
        return np.bincount(self.classes, weights=w, minlength=len(self.class_labels))


def _class_variables(steps: Sequence[Step]) -> tuple[str, ...]:
    seen: dict[str, None] = {}
    for s in steps:
        if isinstance(s, PoststratifyStep):
            seen.update(dict.fromkeys(s.cells))
        elif isinstance(s, (RakeStep, CalibrateStep)):
            for m in s.margins:
                seen.update(dict.fromkeys(m))
    return tuple(seen)


def _build_ops(steps: Sequence[Step], classes: ClassIndex, data: pl.DataFrame, code_order: dict[str, list[str]]) -> tuple[dict[int, object], dict[int, list[str]]]:
    ops: dict[int, object] = {}
    notes: dict[int, list[str]] = {}
    problems: list[Problem] = []
    for s in steps:
        where = f"weighting step {s.index + 1}"
        if isinstance(s, PoststratifyStep):
            margins, note, probs = build_margins(classes, [s.cells], s.targets, code_order=code_order, collapse=s.collapse, where=where)
            ops[s.index] = _RakeOp(s.index, "poststratify", margins, _population(margins, s.total),
                                   POSTSTRATIFY_TOLERANCE, 3, False)
        elif isinstance(s, RakeStep):
            margins, note, probs = build_margins(classes, list(s.margins), s.targets, code_order=code_order, collapse=s.collapse, where=where)
            ops[s.index] = _RakeOp(s.index, "rake", margins, _population(margins, s.total), s.tolerance,
                                   s.max_iterations, s.allow_nonconvergence,
                                   replicate_tolerance=s.replicate_tolerance,
                                   replicate_max_iterations=s.replicate_max_iterations,
                                   partners=[collapse_groups(m, s.collapse) for m in margins])
        elif isinstance(s, CalibrateStep):
            margins, note, probs = (build_margins(classes, list(s.margins), s.targets, code_order=code_order,
                                                  collapse=s.collapse, where=where) if s.margins else ([], [], []))
            names = list(s.numeric)
            num = data.select([pl.col(v).cast(pl.Float64) for v in names])
            for v in names:
                if num[v].null_count():
                    probs.append(Problem("calibration-missing", f"{where}: numeric auxiliary '{v}' is missing for some "
                                         "respondents", column=v, count=int(num[v].null_count())))
            numeric = num.to_numpy() if names else np.zeros((classes.size, 0))
            ops[s.index] = _CalibrateOp(s.index, margins, numeric, np.array([s.numeric[v] for v in names]), names,
                                        _population(margins, s.total), s.distance, s.bounds, s.tolerance, s.max_iterations)
        else:
            continue
        notes[s.index] = note
        problems += probs
    if problems:
        raise DataError("the weighting targets do not fit the data", problems)
    return ops, notes


def collapse_groups(margin: Margin, collapse: Collapse | None) -> list[np.ndarray] | None:
    """The category groups (index arrays) of a one-variable margin's explicit collapse order, for
    the per-replicate merge of empty categories; None for "adjacent", crossed margins or no order."""
    if collapse is None or len(margin.variables) != 1:
        return None
    rule = collapse.order.get(margin.variables[0])
    if not isinstance(rule, tuple):
        return None
    codes = [set(label.split("+")) for label in margin.categories]
    return [np.array([k for k, c in enumerate(codes) if c & {str(x) for x in group}], dtype=np.int64)
            for group in rule]


def _chain_factors(ops: list, classes: ClassIndex, b: np.ndarray) -> np.ndarray:
    current = classes.totals(b)[:, None].copy()
    factors = np.ones_like(current)
    for op in ops:
        f = op.apply(current)
        current *= f
        factors *= f
    return factors[:, 0]


def _clipped_factor(w: np.ndarray, cat: np.ndarray, t: np.ndarray, k: int, lower: float, upper: float) -> np.ndarray:
    """(K,) factors f with sum_{i in k} clip(w_i f_k, L, U) = t_k, all categories at once.

    g_k(f) is non-decreasing and piecewise linear with slope sum of the unclipped w_i: Newton steps,
    kept inside a bracket [lo, hi] updated from the sign of g - t, falling back to the bracket's
    geometric midpoint (doubling or halving while one side is open)."""
    f = np.ones(k)
    lo, hi = np.zeros(k), np.full(k, np.inf)
    for _ in range(WATER_FILLING_STEPS):
        v = w * f[cat]
        clipped = np.clip(v, lower, upper)
        g = np.bincount(cat, weights=clipped, minlength=k)
        miss = t - g
        if np.all(np.abs(miss) <= 1e-13 * np.maximum(t, 1e-300)):
            break
        slope = np.bincount(cat, weights=np.where(clipped == v, w, 0.0), minlength=k)
        lo = np.where(miss > 0, f, lo)
        hi = np.where(miss < 0, f, hi)
        newton = f + np.divide(miss, slope, out=np.full(k, np.nan), where=slope > 0)
        fallback = np.where(np.isinf(hi), 2.0 * f, np.where(lo == 0, 0.5 * f, np.sqrt(lo * hi)))
        inside = np.isfinite(newton) & (newton > lo) & (newton < hi)
        f = np.where(miss == 0, f, np.where(inside, newton, fallback))
    return f


def _bounded_rake(op: _RakeOp, classes: ClassIndex, w: np.ndarray, lower: float, upper: float, *, rounds: int) -> np.ndarray:
    """Per-respondent raking with bounds: each margin's category factor f_k solves
    sum_{i in k} clip(w_i f_k, L, U) = T_k (capped weights stay at their bound, the rest share
    what is left), cycling over the margins until margins and bounds hold together."""
    population = op.population if op.population is not None else float(op.estimated if op.estimated is not None else w.sum())
    cats = [m.of_class[classes.index] for m in op.margins]
    targets = [absolute_targets(m, np.array([population]))[:, 0] for m in op.margins]
    w = np.clip(w, lower, upper)
    for _ in range(rounds):
        for m, cat, t in zip(op.margins, cats, targets):
            f = _clipped_factor(w, cat, t, m.size, lower, upper)
            w = np.clip(w * f[cat], lower, upper)
        worst = [float(np.max(np.abs(np.bincount(cat, weights=w, minlength=m.size) / t - 1.0), initial=0.0))
                 for m, cat, t in zip(op.margins, cats, targets)]
        if max(worst, default=0.0) <= op.tolerance:
            return w
    raise DataError(
        f"weighting step {op.index + 1} margins cannot be met with every weight within [{lower:.4g}, {upper:.4g}] "
        f"(raking with bounds, {rounds} cycles); widen the trimming bounds or collapse categories",
        [Problem("trim-infeasible", f"margin '{m.name}': remaining relative discrepancy {d:.3e}", column=m.name)
         for m, d in zip(op.margins, worst)],
    )


def _bounds(step: TrimStep, weights_in: np.ndarray) -> tuple[float, float]:
    """(lower, upper) absolute bounds: relative to the mean or median of the incoming weights, or absolute."""
    ref = 1.0 if step.relative_to == "absolute" else float(
        weights_in.mean() if step.relative_to == "mean" else np.median(weights_in))
    return (step.lower * ref if step.lower is not None else 0.0, step.upper * ref if step.upper is not None else np.inf)


def _at_bounds(step: TrimStep, weights_in: np.ndarray, weights: np.ndarray) -> int:
    """Number of weights sitting at a trimming bound (within TRIM_SLACK)."""
    lower, upper = _bounds(step, weights_in)
    return int(((weights >= upper * (1 - TRIM_SLACK)) | (weights <= lower * (1 + TRIM_SLACK))).sum())


def _trim(step: TrimStep, ops: list, classes: ClassIndex, base: np.ndarray, weights_in: np.ndarray) -> tuple[np.ndarray, int]:
    """Trimming factors t (n,) such that w = base * t * f(totals(base * t)) lies within the bounds.

    With a raking or post-stratification step before, the trimmed weights are first found by raking
    with bounds (`_bounded_rake`); then t = trimmed / (base * f) and rounds of trim-and-refit
    (t_i *= bound / w_i for weights outside, then the class steps re-run) settle any remainder."""
    lower, upper = _bounds(step, weights_in)
    where = f"weighting step {step.index + 1} (trim)"
    conflicts: list[Problem] = []
    t = np.ones_like(base)
    if ops and isinstance(ops[-1], _RakeOp):
        op = ops[-1]
        pop = op.population if op.population is not None else float(op.estimated if op.estimated is not None else weights_in.sum())
        for m in op.margins:
            counts = m.sums(classes.counts.astype(float))
            need = absolute_targets(m, np.array([pop]))[:, 0] / counts
            for k in np.flatnonzero((need > upper * (1 + TRIM_SLACK)) | (need < lower * (1 - TRIM_SLACK))):
                conflicts.append(Problem(
                    "trim-infeasible",
                    f"{where}: category '{m.categories[k]}' of margin '{m.name}' needs an average weight of {need[k]:.4g} "
                    f"over its {int(counts[k])} respondent(s), outside the bounds [{lower:.4g}, {upper:.4g}]",
                    column=m.name, value=m.categories[k], count=int(counts[k])))
        if conflicts:
            raise DataError(f"{where}: the bounds cannot hold together with the targets; widen them or collapse categories",
                            conflicts)
        trimmed = _bounded_rake(op, classes, weights_in, lower, upper, rounds=step.max_rounds)
        t = trimmed / weights_in
    for rounds in range(1, step.max_rounds + 1):
        w = base * t * (_chain_factors(ops, classes, base * t)[classes.index] if ops else 1.0)
        hi, lo = w > upper * (1 + TRIM_SLACK), w < lower * (1 - TRIM_SLACK)
        if not (hi.any() or lo.any()):
            return t, rounds
        t[hi] *= upper / w[hi]
        t[lo] *= lower / w[lo]
    raise DataError(
        f"{where}: weights still outside the bounds after {step.max_rounds} trim-and-refit rounds",
        [Problem("trim-infeasible", f"{int(hi.sum())} weight(s) above {upper:.4g} (largest {w.max():.4g}) and "
                 f"{int(lo.sum())} below {lower:.4g} (smallest {w.min():.4g}); widen the bounds or raise max_rounds")],
    )


def fit_recipe(
    data: pl.DataFrame,
    steps: Sequence[Step],
    *,
    base_weights: np.ndarray,
    id_column: str = "respondent_id",
    code_order: dict[str, list[str]] | None = None,
) -> FittedRecipe:
    """Fit `steps` in order on the rows of `data` starting from `base_weights`; see the module docstring."""
    base = np.asarray(base_weights, dtype=float)
    check_base(base, data[id_column], column="base weight", source=f"data ({data.height} rows)")
    kept = np.ones(data.height, dtype=bool)
    dropped: dict[str, int] = {}
    reports: list[StepReport] = []
    base_summary = WeightSummary.of(base)
    rest = list(steps)
    if rest and isinstance(rest[0], NonresponseStep):
        nr = adjust_nonresponse(data, base, rest[0], id_column=id_column)
        kept, dropped = nr.keep, nr.dropped
        base = (base * nr.factor)[kept]
        data = data.filter(pl.Series(kept))
        reports.append(StepReport(rest[0].index, "nonresponse", WeightSummary.of(base), response=nr.response))
        rest = rest[1:]
    numeric = any(isinstance(s, CalibrateStep) and s.numeric for s in rest)
    classes = build_classes(data, _class_variables(rest), per_respondent=numeric)
    op_of, notes = _build_ops(rest, classes, data, code_order or {})
    ops: list = []
    warnings: list[Problem] = []
    weights = base.copy()
    for s in rest:
        if isinstance(s, TrimStep):
            weights_in_trim = weights
            t, rounds = _trim(s, ops, classes, base, weights)
            base = base * t
            weights = base * (_chain_factors(ops, classes, base)[classes.index] if ops else 1.0)
            at_bound = _at_bounds(s, weights_in_trim, weights)
            reports.append(StepReport(s.index, "trim", WeightSummary.of(weights), iterations=rounds, converged=True,
                                      trimmed=at_bound, bounds=_bounds(s, weights_in_trim)))
            continue
        op = op_of[s.index]
        ops.append(op)
        weights = base * _chain_factors(ops, classes, base)[classes.index]
        step_warn = []
        if not op.last["converged"]:
            step_warn.append(Problem("rake-nonconvergence", f"weighting step {s.index + 1} accepted without convergence: "
                                     + ", ".join(f"'{k}' {v:.2e}" for k, v in op.last["discrepancy"].items()),
                                     severity="warning"))
        warnings += step_warn
        checks = margin_checks(op.margins, classes.counts, classes.totals(weights), op.last["population"])
        reports.append(StepReport(s.index, op.kind if isinstance(op, _RakeOp) else "calibrate", WeightSummary.of(weights),
                                  iterations=op.last["iterations"], converged=op.last["converged"],
                                  discrepancy=op.last["discrepancy"], margins=checks,
                                  collapsed=tuple(notes.get(s.index, ())), warnings=tuple(step_warn)))
    recipe = FittedRecipe(
        ids=data[id_column], weights=weights, classes=classes.index, class_labels=classes.labels(),
        class_frame=classes.frame, adjusted_base=base, kept=kept, ops=ops,
        aux_matrix=ops[-1].aux() if numeric and ops else None, reports=reports, base_summary=base_summary,
        dropped=dropped, warnings=warnings,
    )
    if ops:
        current = recipe.class_totals()[:, None]
        for op in ops:  # freeze: record each step's full-sample entering total (see _population_now)
            op.reference = float(current.sum())
            current = current * op.apply(current)
        recipe.weights = base * recipe.replay(recipe.class_totals()[None, :])[0, classes.index]
    return recipe


def largest(recipe: FittedRecipe, *, top: int = 10) -> tuple:
    """The `top` largest final weights with their weighting-class profile (never an id)."""
    order = np.argsort(-recipe.weights, kind="stable")[:top]
    frame = recipe.class_frame
    profiles = [dict(zip(frame.columns, frame.row(int(recipe.classes[i])))) if frame.width else {} for i in order]
    return largest_weights(recipe.weights, profiles, top=top)
