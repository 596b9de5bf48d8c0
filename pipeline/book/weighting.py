"""The book's weighting and standard-error pages: what the weights did, per wave, in aggregate.

`weighting_section(study, reports)` turns the weighting reports of the waves
(`pipeline.weighting.WeightingReport`) into a `WeightingSection` for `templates/_weighting.html.j2`:
one summary row per wave (respondents weighted, steps, smallest and largest weight, the Kish
design effect due to weighting and the effective sample size) and one table of margins
(population target, unweighted sample and weighted share per wave). `variance_lines(options,
study)` says how standard errors and intervals were computed. No respondent-level figure
(no single weight, no id) reaches the book.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from pipeline.estimation.options import VarianceOptions
from pipeline.staging.spec import Study
from pipeline.weighting import WeightingReport
from pipeline.weighting.targets import split_category, split_margin

# The study's weighting moving the data's own weight by more than this share (for some respondent)
# means supplied replicate weights, made for that weight, no longer describe the full-sample weight:
# the book says so and the run warns. 1%: common practice, no source; it is well above the rounding
# of published weights and well below what a real post-stratification or raking step changes.
SUPPLIED_WEIGHT_TOLERANCE = 0.01
SUPPLIED_NAMES = {
    "sdr": "successive-difference replication",
    "jackknife": "delete-one jackknife",
    "stratified-jackknife": "stratified delete-one jackknife",
    "brr": "balanced repeated replication",
    "fay": "balanced repeated replication with Fay's coefficient",
    "bootstrap": "bootstrap",
}


@dataclass(frozen=True)
class SuppliedWave:
    """One wave's supplied replicate weights: how many, and how far the study's weighting moved the
    data's own weight (max_i |w_i / b_i - 1|, `runner.supplied_weight_change`)."""

    replicates: int
    weight_change: float


STEP_NAMES = {
    "nonresponse": "nonresponse adjustment by weighting classes",
    "poststratify": "post-stratification",
    "rake": "raking",
    "trim": "trimming",
    "calibrate": "calibration",
}


@dataclass(frozen=True)
class WaveWeighting:
    """One wave's weights in summary: counts, steps, range, Kish deff due to weighting, n_eff, efficiency."""

    wave: str
    label: str
    weighted: int
    not_weighted: str | None
    steps: str
    smallest: str
    largest: str
    ratio: str
    deff: str
    n_eff: str
    efficiency: str
    trimmed: int
    converged: bool


@dataclass(frozen=True)
class MarginRow:
    """One margin category: its label, the population target share and, per wave, sample and weighted shares (text)."""

    margin: str
    category: str
    target: str
    shares: tuple[tuple[str, str], ...]


@dataclass(frozen=True)
class WeightingSection:
    """What `templates/_weighting.html.j2` receives as `book.weighting`."""

    waves: tuple[WaveWeighting, ...]
    wave_labels: tuple[str, ...]
    margins: tuple[MarginRow, ...]
    notes: tuple[str, ...]
    variables: tuple[str, ...]  # labels of the margins the weights were calibrated to


def _pct(share: float) -> str:
    return f"{100 * share:.1f}%"


def _weight_text(weight: float) -> str:
    """A weight for reading: whole numbers from 100 up, else three significant figures."""
    return f"{weight:,.0f}" if weight >= 100 else f"{weight:.3g}"


def _category_label(study: Study, margin: str, category: str) -> str:
    """Codes of a (possibly crossed or merged) margin category shown with the codebook's labels."""
    names, codes = split_margin(margin), split_category(category)
    if len(names) != len(codes):
        return category
    parts = []
    for name, code in zip(names, codes, strict=True):
        variable = study.variables.get(name)
        labels = {str(k): v for k, v in variable.values.items()} if variable else {}
        members = code.split("+")  # a merged category joins its codes with "+" (weighting.classes.group_label)
        parts.append(" or ".join(labels.get(c, c) for c in members))
    return " × ".join(parts)


def _margin_label(study: Study, margin: str) -> str:
    return " × ".join(study.variables[n].label if n in study.variables else n for n in split_margin(margin))


def weighting_section(study: Study, reports: Mapping[str, WeightingReport]) -> WeightingSection:
    """The book's weighting summary from the waves' reports (spec wave order).

    Kish's design effect due to weighting is 1 + CV^2 of the final weights and the effective
    sample size (sum w)^2 / sum w^2 (Kish, Survey Sampling, 1965, section 11.7, from memory);
    both come from `WeightSummary`.
    """
    waves = [w for w in study.waves if w.id in reports]
    rows = []
    notes: list[str] = []
    for wave in waves:
        report = reports[wave.id]
        final = report.final
        steps = ", then ".join(STEP_NAMES.get(s.kind, s.kind) for s in report.steps) or "base weights only"
        dropped = ", ".join(f"{n:,} {reason}" for reason, n in report.dropped.items() if n) or None
        rows.append(
            WaveWeighting(
                wave=wave.id,
                label=wave.label,
                weighted=report.n_weighted,
                not_weighted=dropped,
                steps=steps,
                smallest=_weight_text(final.minimum),
                largest=_weight_text(final.maximum),
                ratio=f"{final.maximum / final.minimum:,.1f}" if final.minimum > 0 else "–",
                deff=f"{final.deff:.2f}",
                n_eff=f"{final.n_eff:,.0f}",
                efficiency=f"{final.efficiency_pct:.0f}%",
                trimmed=sum(s.trimmed for s in report.steps),
                converged=all(s.converged is not False for s in report.steps),
            )
        )
        notes += [f"{wave.label}: {n}" for s in report.steps for n in s.collapsed]
        notes += [f"{wave.label}: {p.message}" for p in report.warnings]
    margins = _margin_rows(study, [w.id for w in waves], reports)
    return WeightingSection(
        waves=tuple(rows),
        wave_labels=tuple(w.label for w in waves),
        margins=margins,
        notes=tuple(notes),
        variables=tuple(dict.fromkeys(m.margin.lower() for m in margins)),
    )


def _margin_rows(study: Study, wave_ids: Sequence[str], reports: Mapping[str, WeightingReport]) -> tuple[MarginRow, ...]:
    """Margins of each wave's last step that has margins, aligned by (margin, category) across waves."""
    checks: dict[str, dict[tuple[str, str], object]] = {}
    order: list[tuple[str, str]] = []
    for wave_id in wave_ids:
        steps = [s for s in reports[wave_id].steps if s.margins]
        if not steps:
            continue
        checks[wave_id] = {}
        for m in steps[-1].margins:
            key = (m.margin, m.category)
            checks[wave_id][key] = m
            if key not in order:
                order.append(key)
    rows = []
    for margin, category in order:
        found = [checks[w][(margin, category)] for w in wave_ids if (margin, category) in checks.get(w, {})]
        shares = tuple(
            (_pct(checks[w][(margin, category)].sample_share), _pct(checks[w][(margin, category)].achieved_share))
            if (margin, category) in checks.get(w, {})
            else ("–", "–")
            for w in wave_ids
        )
        rows.append(
            MarginRow(
                margin=_margin_label(study, margin),
                category=_category_label(study, margin, category),
                target=_pct(found[0].target_share),
                shares=shares,
            )
        )
    return tuple(rows)


def variance_lines(
    options: VarianceOptions,
    study: Study,
    *,
    calibrated: bool,
    replicate_adjustments: Mapping[str, Mapping[str, int]] | None = None,
    replicates: Mapping[str, int] | None = None,
    supplied: Mapping[str, SuppliedWave] | None = None,
) -> tuple[str, ...]:
    """How standard errors, design effects and intervals were computed, in plain sentences.

    Says what the variance holds fixed (nonresponse-class and trimming factors; in Taylor, only the
    last calibration step's auxiliaries enter the residuals), describes strata and PSUs only when
    the design has them, and, for replicate methods, how many replicates of each wave needed a
    per-replicate collapse of an empty margin category or stopped beyond the replicate tolerance
    (`replicate_adjustments`: wave -> `FittedRecipe.replicate_adjustments()`; `replicates`: wave ->
    number of replicates). Supplied replicate weights (`supplied`: wave -> `SuppliedWave`): how
    many, their method, multiplier, centre and df, and which weight they were made for
    (`_supplied_lines`).
    """
    design = study.design
    level = f"{100 * options.level:g}%"
    has_fpc = bool(design.population or design.sampling_fraction or design.psu_inclusion_probability)
    steps = [str(w.get("step")) for w in study.weighting] if study.weighting else []
    fixed = [name for step, name in (("nonresponse", "nonresponse-class"), ("trim", "trimming")) if step in steps]
    held = (f" The {' and '.join(fixed)} factors are held fixed at their full-sample values." if fixed else "")
    units = "primary sampling units" if design.psu else "respondents (each its own sampling unit)"
    within = " within strata" if design.strata else ""
    if options.supplied:
        first, df = _supplied_lines(options, study, supplied or {})
    elif options.method == "taylor":
        first = (
            f"Standard errors: Taylor linearization of each estimate, with the with-replacement variance between "
            f"{units}{within}"
            + (" and the declared finite population correction" if has_fpc else "")
            + (", plus the variance within the sampled units from the second stage"
               if design.psu and has_fpc and design.second_stage_fraction < 1 else "")
            + "."
        )
        if calibrated:
            first += (
                " Because the weights were calibrated to population figures, the linearization uses the "
                "residuals of the calibration (Deville and Särndal), so the gain from weighting is counted; "
                "only the auxiliaries of the last calibration step enter the residuals."
            )
        first += held
        df = (f"Degrees of freedom: {units.split(' (')[0]} minus {'strata' if design.strata else 'one'}; for a "
              f"subgroup, the {units.split(' (')[0]} with members of the subgroup minus the "
              f"{'strata' if design.strata else 'one'} they lie in.")
    else:
        names = {
            "jackknife": "delete-one-unit jackknife",
            "stratified-jackknife": "stratified delete-one-unit jackknife",
            "brr": "balanced repeated replication",
            "fay": f"balanced repeated replication with Fay's coefficient {options.fay:g}",
            "bootstrap": f"Rao-Wu rescaling bootstrap ({options.replicates or 500} replicates, seed {options.seed or 0})",
        }
        first = f"Standard errors: replicate weights ({names[options.method]})."
        if calibrated:
            first += (" Every replicate repeats the calibration steps (post-stratification, raking, "
                      "calibration) on its own totals, so the variance includes their effect.")
        first += held
        first += _replicate_sentence(replicate_adjustments or {}, replicates or {}) if calibrated else ""
        df = "Degrees of freedom: from the replicate design, and for a subgroup at most its own."
    return (
        first,
        df,
        f"Intervals: {level} confidence intervals. Percentages use the Korn-Graubard interval "
        "(exact binomial limits on the effective sample size, capped at the actual base), which stays "
        "inside 0-100% and behaves well near the ends; means use the t distribution; medians use the "
        "Woodruff interval. Where the variance cannot be estimated (one respondent, or every respondent "
        "in one sampling unit) no interval is shown.",
        "Design effect (deff): the variance of an estimate under this design and weighting divided by "
        "its variance under a simple random sample of the same size. Effective base: the unweighted "
        "base divided by the design effect. Medians have no design effect.",
    )


def _supplied_lines(options: VarianceOptions, study: Study, waves: Mapping[str, SuppliedWave]) -> tuple[str, str]:
    """The standard-error and degrees-of-freedom sentences of supplied replicate weights.

    The full-sample weight is the study's final weight: the data's own weight column when the spec
    has no weighting steps, else the result of those steps. The replicates were made for the data's
    own weight; when the steps move it by more than SUPPLIED_WEIGHT_TOLERANCE the text says that
    the replicates do not carry the study's weighting.
    """
    from pipeline.estimation.replicates import SUPPLIED_MULTIPLIERS, supplied_factors

    method = str(options.replicate_method)
    name = SUPPLIED_NAMES[method] + (f" {options.fay:g}" if method == "fay" else "")
    counts = sorted({w.replicates for w in waves.values()})
    if len(counts) == 1 and counts[0] >= 2:
        r = counts[0]
        rf = supplied_factors(method, r, fay=options.fay, multiplier=options.multiplier,
                              multipliers=options.multipliers, df=options.df, centre=options.centre)
        how = (f"the declared multiplier {rf.multiplier:.6g}" if options.multiplier is not None
               else f"the {method} multiplier {SUPPLIED_MULTIPLIERS[method]} = {rf.multiplier:.6g}")
        if options.multipliers is not None:
            how += " with the declared multiplier of each replicate"
        many, df_value = f"the {r} replicate weights", int(rf.df if rf.df is not None else r - 1)
    else:
        how, many, df_value = f"the {method} multiplier {SUPPLIED_MULTIPLIERS[method]}", "the replicate weights", None
    centre = ("the full-sample estimate" if options.centre == "full-sample"
              else "the mean of the replicate estimates")
    first = (f"Standard errors: {many} supplied with the data ({name}), used as supplied: the variance is "
             f"{how} times the sum over the replicates of the squared difference between each replicate's "
             f"estimate and {centre}.")
    weight = study.design.base_weight or (f"1 / {study.design.selection_probability}"
                                          if study.design.selection_probability else "equal weights")
    if not study.weighting:
        first += (f" The full-sample weight is the data's own weight ({weight}), the weight the replicates were "
                  "made for; the study adds no weighting of its own.")
    else:
        moved = {w: s.weight_change for w, s in waves.items()}
        largest = max(moved.values(), default=0.0)
        if largest > SUPPLIED_WEIGHT_TOLERANCE:
            where = ", ".join(w for w, c in moved.items() if c > SUPPLIED_WEIGHT_TOLERANCE)
            first += (f" Caution: the full-sample weight is the study's own weighting of the data's weight ({weight}), "
                      f"which it changes by up to {100 * largest:.3g}% (wave {where}); the supplied replicates were "
                      "made for the data's weight and do not carry the study's weighting, so these standard errors "
                      "may be too large or too small, above all for the variables the weighting controls.")
        else:
            first += (f" The full-sample weight is the study's own weighting of the data's weight ({weight}); it "
                      f"changes that weight by at most {100 * largest:.3g}% for any respondent, so the supplied "
                      "replicates, made for the data's weight, still describe it.")
    if df_value is None:
        df = "Degrees of freedom: those declared for the replicate weights, for every estimate, subgroups included."
    else:
        source = ("as declared (the number of half-sample pairs)" if method in ("brr", "fay")
                  else "as declared" if options.df is not None else "the number of replicates minus one")
        df = f"Degrees of freedom: {df_value}, {source}, for every estimate, subgroups included."
    return first, df


def _replicate_sentence(adjustments: Mapping[str, Mapping[str, int]], replicates: Mapping[str, int]) -> str:
    """' In wave W1, 3 of 200 replicates ...' for the waves whose replicate re-weighting needed help."""
    parts = []
    for wave, counts in adjustments.items():
        total = replicates.get(wave)
        of = f" of {total:,}" if total else ""
        if counts.get("collapsed"):
            parts.append(f"in wave {wave}, {counts['collapsed']:,}{of} replicates had a margin category with no "
                         "respondents, merged into its neighbour for that replicate only")
        if counts.get("unconverged"):
            parts.append(f"in wave {wave}, {counts['unconverged']:,}{of} replicates stopped beyond the replicate "
                         "raking tolerance")
    if not parts:
        return " Every replicate met the weighting targets without merging categories."
    return " Replicate re-weighting: " + "; ".join(parts) + "."
