"""Weighting diagnostics: weight summaries, margin checks, largest weights, class response rates.

Kish's design effect due to unequal weighting (Kish 1965, Survey Sampling, section 11.7;
Kish 1992, "Weighting for unequal P_i", J. Official Statistics 8: 183-200, eq. 2):
  deff_w = 1 + CV^2 = n sum w^2 / (sum w)^2, with CV computed with divisor n;
effective sample size n_eff = (sum w)^2 / sum w^2 = n / deff_w; efficiency = 100 n_eff / n.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from pipeline.errors import Problem


@dataclass(frozen=True)
class WeightSummary:
    """Summary of a set of weights (all positive)."""

    n: int
    total: float
    minimum: float
    maximum: float
    mean: float
    cv: float
    deff: float
    n_eff: float
    efficiency_pct: float

    @classmethod
    def of(cls, weights: np.ndarray) -> WeightSummary:
        """Summarise `weights`: CV = sqrt(mean((w - mean)^2)) / mean (divisor n); deff = 1 + CV^2 (Kish 1992, eq. 2)."""
        w = np.asarray(weights, dtype=float)
        n = int(w.size)
        if n == 0:
            return cls(0, 0.0, float("nan"), float("nan"), float("nan"), float("nan"), float("nan"), 0.0, float("nan"))
        total = float(w.sum())
        mean = total / n
        cv = float(np.sqrt(np.mean((w - mean) ** 2)) / mean)
        n_eff = total**2 / float(np.dot(w, w))
        return cls(n, total, float(w.min()), float(w.max()), mean, cv, 1.0 + cv**2, n_eff, 100.0 * n_eff / n)


@dataclass(frozen=True)
class MarginCheck:
    """One margin category: population target vs unweighted sample vs weighted result."""

    margin: str
    category: str
    target: float  # as a total
    target_share: float
    sample_count: int
    sample_share: float
    achieved: float  # weighted total after the step
    achieved_share: float


@dataclass(frozen=True)
class ClassResponse:
    """Response in one nonresponse-adjustment class."""

    weighting_class: str
    issued: int
    respondents: int
    nonrespondents: int
    ineligible: int
    response_rate: float  # respondents / (respondents + nonrespondents), unweighted
    weighted_response_rate: float  # same with base weights
    factor: float  # weight moved onto respondents: (R + NR) / R, weighted


@dataclass(frozen=True)
class LargeWeight:
    """One of the largest final weights with its weighting profile (never a respondent id)."""

    rank: int
    weight: float
    ratio_to_mean: float
    profile: dict[str, str]


@dataclass(frozen=True)
class StepReport:
    """What one weighting step did."""

    index: int
    kind: str
    summary: WeightSummary
    iterations: int | None = None
    converged: bool | None = None
    discrepancy: dict[str, float] = field(default_factory=dict)  # margin -> max |achieved/target - 1|
    trimmed: int = 0
    bounds: tuple[float, float] | None = None  # trimming: absolute (lower, upper) bounds applied
    margins: tuple[MarginCheck, ...] = ()
    collapsed: tuple[str, ...] = ()
    response: tuple[ClassResponse, ...] = ()
    warnings: tuple[Problem, ...] = ()


@dataclass(frozen=True)
class WeightingReport:
    """Weighting of one wave: counts, base and final summaries, per-step reports, largest weights."""

    wave: str
    n_input: int
    n_weighted: int
    dropped: dict[str, int]  # reason -> rows not weighted (e.g. nonrespondents, ineligible)
    base: WeightSummary
    final: WeightSummary
    steps: tuple[StepReport, ...]
    largest: tuple[LargeWeight, ...]
    warnings: tuple[Problem, ...] = ()

    def render(self) -> str:
        """A plain-text report for the terminal."""
        lines = [f"wave {self.wave}: {self.n_weighted} of {self.n_input} rows weighted"]
        lines += [f"  not weighted: {n} {reason}" for reason, n in self.dropped.items() if n]
        lines.append(_summary_line("base weights", self.base))
        for step in self.steps:
            head = f"step {step.index + 1} ({step.kind})"
            if step.iterations is not None:
                head += f": {step.iterations} iteration(s), {'converged' if step.converged else 'NOT converged'}"
            if step.bounds is not None:
                head += f", bounds [{step.bounds[0]:.4g}, {step.bounds[1]:.4g}], {step.trimmed} weight(s) at a bound"
            lines.append(_summary_line(head, step.summary))
            lines += [f"    {note}" for note in step.collapsed]
            lines += [f"    margin {m}: max relative discrepancy {d:.2e}" for m, d in step.discrepancy.items()]
            for r in step.response:
                lines.append(
                    f"    class {r.weighting_class}: response rate {100 * r.response_rate:.1f}% "
                    f"({r.respondents}/{r.respondents + r.nonrespondents}), factor {r.factor:.3f}"
                )
            if step.margins:
                lines.append(f"    {'margin':<22}{'category':<14}{'target%':>9}{'sample%':>9}{'weighted%':>10}")
                lines += [
                    f"    {m.margin:<22}{m.category:<14}{100 * m.target_share:>9.2f}{100 * m.sample_share:>9.2f}"
                    f"{100 * m.achieved_share:>10.2f}"
                    for m in step.margins
                ]
        lines.append(_summary_line("final weights", self.final))
        lines.append("  largest weights:")
        lines += [
            f"    {w.rank:>2}. {w.weight:,.4g} ({w.ratio_to_mean:.2f} x mean) "
            + ", ".join(f"{k}={v}" for k, v in w.profile.items())
            for w in self.largest
        ]
        lines += ["  " + p.render() for p in self.warnings]
        return "\n".join(lines)


def _summary_line(head: str, s: WeightSummary) -> str:
    return (
        f"  {head}: n {s.n}, sum {s.total:,.6g}, min {s.minimum:.4g}, max {s.maximum:.4g}, mean {s.mean:.4g}, "
        f"CV {s.cv:.3f}, deff {s.deff:.3f}, n_eff {s.n_eff:,.1f} ({s.efficiency_pct:.1f}%)"
    )


def margin_checks(margins: list, class_counts: np.ndarray, class_weighted: np.ndarray, population: float) -> tuple[MarginCheck, ...]:
    """Per margin category: target (as a total and share), unweighted count and share, weighted total and share."""
    out: list[MarginCheck] = []
    n = float(class_counts.sum())
    wsum = float(class_weighted.sum())
    for m in margins:
        counts = m.sums(class_counts.astype(float))
        achieved = m.sums(class_weighted)
        targets = m.targets * (population if m.kind == "proportion" else 1.0)
        ttotal = float(targets.sum())
        for k, cat in enumerate(m.categories):
            out.append(
                MarginCheck(m.name, cat, float(targets[k]), float(targets[k]) / ttotal, int(counts[k]),
                            float(counts[k]) / n, float(achieved[k]), float(achieved[k]) / wsum)
            )
    return tuple(out)


def largest_weights(weights: np.ndarray, profiles: list[dict[str, str]], *, top: int = 10) -> tuple[LargeWeight, ...]:
    """The `top` largest weights with the given profiles (weighting-variable values), largest first."""
    if weights.size == 0:
        return ()
    order = np.argsort(-weights, kind="stable")[:top]
    mean = float(weights.mean())
    return tuple(
        LargeWeight(rank + 1, float(weights[i]), float(weights[i]) / mean, profiles[rank]) for rank, i in enumerate(order)
    )
