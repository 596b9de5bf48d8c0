"""The `[[weighting]]` steps of a study spec, parsed and validated.

Each table of the array is one step, applied in the declared order; `step` names its kind:

  step = "nonresponse"   status = "disposition", responded = [1], nonrespondent = [2],
                         ineligible = [3] (optional), classes = ["region"] (optional)
  step = "poststratify"  cells = "age_band x sex", targets = "cells.csv" | totals = {...},
                         total = 1200000 (optional), collapse = {...} (optional)
  step = "rake"          margins = ["age_band x sex", "region"], targets = "margins.csv" | totals = {...},
                         (targets by wave: a `wave` column in the CSV, or targets = { W1 = "a.csv", W4 = "b.csv" })
                         total, tolerance = 1e-6, max_iterations = 100, allow_nonconvergence = false, collapse,
                         replicate_tolerance (default tolerance; looser only), replicate_max_iterations (default
                         20 x max_iterations): replicate re-weighting only, which always finishes
  step = "trim"          upper = 5.0, lower = 0.2 (at least one), relative_to = "mean" | "median" | "absolute",
                         max_rounds = 100
  step = "calibrate"     distance = "linear" | "logit", bounds = [0.4, 3.0] (logit), margins = [...],
                         numeric = { hh_size = 2450000 }, targets | totals, total, tolerance = 1e-8,
                         max_iterations = 50, collapse

Targets (file or inline) are proportions or counts; proportions are scaled by `total` when given,
else by the population total of the step's count margins, else by the sum of the incoming
weights. `collapse = { min_count = 20, order = { age_band = [[5, 6], [1, 2]], region = "adjacent" } }`
merges small categories before the step (see pipeline.weighting.margins).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from pipeline.errors import Problem, SpecError
from pipeline.weighting.margins import Collapse
from pipeline.weighting.targets import TargetTable, inline_targets, read_targets_csv, split_margin


@dataclass(frozen=True)
class StepContext:
    """The plain facts about a study that the steps are checked against (built by the spec).

    folder: where targets files are resolved; source: the spec file, named in messages;
    variable_types: codebook variable name -> type; coded: the variables a margin, cell or class
    may use (single-choice and rating variables, and the strata column); codes: variable -> its
    codebook codes as text, in order (the order margins and collapsing follow); waves: the spec's
    wave ids (targets may differ by wave).
    The steps never read the spec itself, so the weighting package does not import it.
    """

    folder: Path
    source: str
    variable_types: Mapping[str, str] = field(default_factory=dict)
    coded: frozenset[str] = frozenset()
    codes: Mapping[str, tuple[str, ...]] = field(default_factory=dict)
    waves: tuple[str, ...] = ()

    def code_order(self, variables: set[str]) -> dict[str, list[str]]:
        """Codebook code order (as text) of those of `variables` that have codes."""
        return {name: list(self.codes[name]) for name in variables if name in self.codes}


@dataclass(frozen=True)
class NonresponseStep:
    """Move each class's base weight from nonrespondents onto its respondents (weighting-class adjustment)."""

    index: int
    status: str
    responded: tuple[str, ...]
    nonrespondent: tuple[str, ...]
    ineligible: tuple[str, ...] = ()
    classes: tuple[str, ...] = ()
    kind: str = "nonresponse"


@dataclass(frozen=True)
class PoststratifyStep:
    """Scale each cell of a cross-classification to its population total."""

    index: int
    cells: tuple[str, ...]
    targets: TargetTable
    total: float | None = None
    collapse: Collapse | None = None
    kind: str = "poststratify"


@dataclass(frozen=True)
class RakeStep:
    """Iterative proportional fitting to marginal targets (margins may be crossed)."""

    index: int
    margins: tuple[tuple[str, ...], ...]
    targets: TargetTable
    total: float | None = None
    tolerance: float = 1e-6
    max_iterations: int = 100
    allow_nonconvergence: bool = False
    collapse: Collapse | None = None
    kind: str = "rake"
    replicate_tolerance: float | None = None  # re-weighting a replicate: this tolerance (default `tolerance`)
    replicate_max_iterations: int | None = None  # and this many cycles (default 20 x max_iterations)


@dataclass(frozen=True)
class TrimStep:
    """Bound the weights (relative to their mean or median on entry, or absolute), re-fitting after each round."""

    index: int
    upper: float | None = None
    lower: float | None = None
    relative_to: str = "mean"
    max_rounds: int = 100
    kind: str = "trim"


@dataclass(frozen=True)
class CalibrateStep:
    """Calibration (Deville-Sarndal) with linear or bounded logit distance, categorical and numeric auxiliaries."""

    index: int
    distance: str
    margins: tuple[tuple[str, ...], ...]
    numeric: dict[str, float]
    targets: TargetTable
    bounds: tuple[float, float] | None = None
    total: float | None = None
    tolerance: float = 1e-8
    max_iterations: int = 50
    collapse: Collapse | None = None
    kind: str = "calibrate"


Step = NonresponseStep | PoststratifyStep | RakeStep | TrimStep | CalibrateStep

_KEYS = {
    "nonresponse": {"step", "status", "responded", "nonrespondent", "ineligible", "classes"},
    "poststratify": {"step", "cells", "targets", "totals", "total", "collapse"},
    "rake": {"step", "margins", "targets", "totals", "total", "tolerance", "max_iterations", "allow_nonconvergence", "collapse",
             "replicate_tolerance", "replicate_max_iterations"},
    "trim": {"step", "upper", "lower", "relative_to", "max_rounds"},
    "calibrate": {"step", "distance", "bounds", "margins", "numeric", "targets", "totals", "total", "tolerance",
                  "max_iterations", "collapse"},
}


class _Reader:
    """Typed access to one step table, collecting problems that name the key."""

    def __init__(self, raw: dict[str, Any], where: str, problems: list[Problem]) -> None:
        self.raw, self.where, self.problems = raw, where, problems

    def bad(self, key: str, message: str) -> None:
        self.problems.append(Problem("spec-weighting", f"{self.where}, {key}: {message}"))

    def number(self, key: str, default: float | None, *, positive: bool = True) -> float | None:
        value = self.raw.get(key, default)
        if value is None:
            return None
        if isinstance(value, bool) or not isinstance(value, (int, float)) or (positive and value <= 0):
            self.bad(key, f"must be a {'positive ' if positive else ''}number, got {value!r}")
            return default
        return float(value)

    def integer(self, key: str, default: int) -> int:
        value = self.raw.get(key, default)
        if isinstance(value, bool) or not isinstance(value, int) or value < 1:
            self.bad(key, f"must be a whole number >= 1, got {value!r}")
            return default
        return value

    def flag(self, key: str, default: bool) -> bool:
        value = self.raw.get(key, default)
        if not isinstance(value, bool):
            self.bad(key, f"must be true or false, got {value!r}")
            return default
        return value

    def codes(self, key: str, *, required: bool) -> tuple[str, ...]:
        value = self.raw.get(key)
        if value is None:
            if required:
                self.bad(key, "is required: list the status codes")
            return ()
        if not isinstance(value, list) or not value:
            self.bad(key, f"must be a non-empty list of codes, got {value!r}")
            return ()
        return tuple(str(v) for v in value)

    def choice(self, key: str, default: str, options: tuple[str, ...]) -> str:
        value = self.raw.get(key, default)
        if value not in options:
            self.bad(key, f"must be one of {', '.join(repr(o) for o in options)}, got {value!r}")
            return default
        return str(value)


def _variables(r: _Reader, key: str, value: object, known: set[str]) -> tuple[str, ...]:
    names = split_margin(value) if isinstance(value, str) else value
    if not isinstance(names, (list, tuple)) or not names or not all(isinstance(n, str) for n in names):
        r.bad(key, f"must name variables, e.g. \"age_band x sex\", got {value!r}")
        return ()
    for n in names:
        if n not in known:
            r.bad(key, f"'{n}' is not a single-choice or rating variable of the codebook (nor the strata column)")
    return tuple(names)


def _margins(r: _Reader, key: str, known: set[str], *, required: bool) -> tuple[tuple[str, ...], ...]:
    value = r.raw.get(key)
    if value is None:
        if required:
            r.bad(key, 'is required, e.g. margins = ["age_band x sex", "region"]')
        return ()
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        r.bad(key, f"must be a list of margin names, got {value!r}")
        return ()
    margins = tuple(_variables(r, f"{key}[{i}]", v, known) for i, v in enumerate(value))
    seen = [v for m in margins for v in m]
    twice = sorted({v for v in seen if seen.count(v) > 1})
    if twice and len(margins) > 1 and r.raw.get("step") == "calibrate":
        r.bad(key, f"variable(s) {', '.join(twice)} appear in more than one margin; calibration needs each once")
    return margins


def _unknown_target_variables(r: _Reader, targets: TargetTable, variables: set[str]) -> None:
    """A margin of the targets naming a variable the codebook lacks (a misspelling, say) is an
    error here, before any data is read, with the closest codebook names as a hint."""
    import difflib

    if not variables:  # no codebook to compare with
        return
    key = "targets" if "targets" in r.raw else "totals"
    for margin in sorted(targets.all_margins()):
        for name in split_margin(margin):
            if name not in variables:
                close = difflib.get_close_matches(name, sorted(variables), n=2)
                hint = f"; did you mean {' or '.join(repr(c) for c in close)}?" if close else ""
                r.bad(key, f"the targets name margin '{margin}', but '{name}' is not a codebook variable{hint}")


def _wave_targets(r: _Reader, folder: Path, files: dict, waves: tuple[str, ...]) -> TargetTable:
    """`targets = { W1 = "a.csv", W4 = "b.csv" }`: each wave's targets from its own file."""
    by_wave: dict[str, dict[str, dict[tuple[str, ...], float]]] = {}
    for wave, file in files.items():
        if waves and wave not in waves:
            r.bad(f"targets.{wave}", f"'{wave}' is not a wave of the spec ({', '.join(waves)})")
        elif not isinstance(file, str):
            r.bad(f"targets.{wave}", f"must be a file path, got {file!r}")
        else:
            table, problems = read_targets_csv(folder / file, where=f"{r.where}, targets.{wave}")
            r.problems.extend(problems)
            if table is not None:
                by_wave[wave] = table.for_wave(wave).margins
    return TargetTable({}, source=", ".join(str(f) for f in files.values()), waves=by_wave, every_wave=False)


def _targets(r: _Reader, folder: Path, waves: tuple[str, ...] = ()) -> TargetTable:
    has_file, has_inline = "targets" in r.raw, "totals" in r.raw
    if has_file == has_inline:
        r.bad("targets", "give exactly one of `targets` (a CSV file variable,category,target) or `totals` (inline)")
        return TargetTable({}, source=r.where)
    if has_file:
        if isinstance(r.raw["targets"], dict):
            return _wave_targets(r, folder, r.raw["targets"], waves)
        if not isinstance(r.raw["targets"], str):
            r.bad("targets", f"must be a file path or a table wave = file path, got {r.raw['targets']!r}")
            return TargetTable({}, source=r.where)
        table, problems = read_targets_csv(folder / r.raw["targets"], where=f"{r.where}, targets")
        if table is not None and waves:
            for wave in sorted(set(table.waves) - set(waves)):
                r.bad("targets", f"{r.raw['targets']} has rows for wave '{wave}', which is not a wave of the spec")
    else:
        table, problems = inline_targets(r.raw["totals"], where=f"{r.where}, totals")
    r.problems.extend(problems)
    return table if table is not None else TargetTable({}, source=r.where)


def _collapse(r: _Reader, known: set[str]) -> Collapse | None:
    value = r.raw.get("collapse")
    if value is None:
        return None
    if not isinstance(value, dict) or set(value) - {"min_count", "order"}:
        r.bad("collapse", "must be a table with min_count and order, e.g. { min_count = 20, order = { age_band = [[5, 6]] } }")
        return None
    min_count = value.get("min_count", 1)
    if isinstance(min_count, bool) or not isinstance(min_count, int) or min_count < 1:
        r.bad("collapse.min_count", f"must be a whole number >= 1, got {min_count!r}")
        min_count = 1
    order: dict[str, tuple[tuple[str, ...], ...] | str] = {}
    for var, rule in dict(value.get("order", {})).items():
        if var not in known:
            r.bad(f"collapse.order.{var}", "is not a single-choice or rating variable of the codebook")
        if rule == "adjacent":
            order[var] = "adjacent"
        elif isinstance(rule, list) and all(isinstance(g, list) and len(g) >= 2 for g in rule):
            order[var] = tuple(tuple(str(c) for c in g) for g in rule)
        else:
            r.bad(f"collapse.order.{var}", f'must be "adjacent" or a list of code groups like [[5, 6], [1, 2]], got {rule!r}')
    return Collapse(min_count, order)


def _parse_one(i: int, raw: object, context: StepContext, problems: list[Problem]) -> Step | None:
    where = f"weighting step {i + 1}"
    if not isinstance(raw, dict):
        problems.append(Problem("spec-weighting", f"{where}: each [[weighting]] entry must be a table"))
        return None
    kind = raw.get("step")
    if kind not in _KEYS:
        problems.append(Problem("spec-weighting", f"{where}, step: must be one of {', '.join(sorted(_KEYS))}, got {kind!r}"))
        return None
    r = _Reader(raw, where, problems)
    for key in sorted(set(raw) - _KEYS[kind]):
        r.bad(key, f"unknown key for step '{kind}'; allowed: {', '.join(sorted(_KEYS[kind] - {'step'}))}")
    known = set(context.coded)
    folder = context.folder
    if kind == "nonresponse":
        status = raw.get("status")
        if not isinstance(status, str) or status not in context.variable_types:
            r.bad("status", f"must name a codebook variable holding the response status, got {status!r}")
        classes = _variables(r, "classes", raw["classes"], known) if "classes" in raw else ()
        responded, nonresp = r.codes("responded", required=True), r.codes("nonrespondent", required=True)
        inelig = r.codes("ineligible", required=False)
        clash = (set(responded) & set(nonresp)) | (set(responded) & set(inelig)) | (set(nonresp) & set(inelig))
        if clash:
            r.bad("responded", f"code(s) {', '.join(sorted(clash))} are listed in more than one status list")
        if i != 0:
            r.bad("step", "the nonresponse adjustment must be the first weighting step")
        return NonresponseStep(i, str(status), responded, nonresp, inelig, classes)
    if kind == "trim":
        upper, lower = r.number("upper", None), r.number("lower", None)
        if upper is None and lower is None:
            r.bad("upper", "give `upper`, `lower` or both")
        relative_to = r.choice("relative_to", "mean", ("mean", "median", "absolute"))
        if relative_to != "absolute" and upper is not None and upper <= 1:
            r.bad("upper", f"relative to the {relative_to} must exceed 1, got {upper}")
        if relative_to != "absolute" and lower is not None and lower >= 1:
            r.bad("lower", f"relative to the {relative_to} must be below 1, got {lower}")
        if upper is not None and lower is not None and lower >= upper:
            r.bad("lower", f"must be below upper ({lower} >= {upper})")
        return TrimStep(i, upper, lower, relative_to, r.integer("max_rounds", 100))
    collapse = _collapse(r, known)
    targets = _targets(r, folder, context.waves)
    _unknown_target_variables(r, targets, set(context.variable_types))
    total = r.number("total", None)
    if kind == "poststratify":
        if "cells" not in raw:
            r.bad("cells", 'is required, e.g. cells = "age_band x sex"')
        cells = _variables(r, "cells", raw.get("cells", ()), known) if "cells" in raw else ()
        return PoststratifyStep(i, cells, targets, total, collapse)
    if kind == "rake":
        tolerance = float(r.number("tolerance", 1e-6) or 1e-6)
        replicate_tolerance = r.number("replicate_tolerance", None)
        if replicate_tolerance is not None and replicate_tolerance < tolerance:
            r.bad("replicate_tolerance", f"may be looser than tolerance ({tolerance:g}), never tighter; "
                  f"got {replicate_tolerance!r}")
        iterations = r.integer("max_iterations", 100)
        return RakeStep(
            i, _margins(r, "margins", known, required=True), targets, total, tolerance,
            iterations, r.flag("allow_nonconvergence", False), collapse,
            replicate_tolerance=replicate_tolerance,
            replicate_max_iterations=r.integer("replicate_max_iterations", 20 * iterations),
        )
    distance = r.choice("distance", "linear", ("linear", "logit"))
    bounds = None
    if distance == "logit":
        b = raw.get("bounds")
        if not (isinstance(b, list) and len(b) == 2 and all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in b)
                and 0 <= b[0] < 1 < b[1]):
            r.bad("bounds", f"the logit distance needs bounds = [L, U] with 0 <= L < 1 < U, got {b!r}")
        else:
            bounds = (float(b[0]), float(b[1]))
    elif "bounds" in raw:
        r.bad("bounds", "bounds apply to the logit distance only")
    numeric = raw.get("numeric", {})
    if not isinstance(numeric, dict):
        r.bad("numeric", "must be a table variable = population total")
        numeric = {}
    for var, tot in numeric.items():
        if context.variable_types.get(var) != "numeric":
            r.bad(f"numeric.{var}", "is not a numeric variable of the codebook")
        if isinstance(tot, bool) or not isinstance(tot, (int, float)):
            r.bad(f"numeric.{var}", f"must be a population total (a number), got {tot!r}")
    margins = _margins(r, "margins", known, required=False)
    if not margins and not numeric:
        r.bad("margins", "calibration needs `margins`, `numeric` or both")
    return CalibrateStep(
        i, distance, margins, {k: float(v) for k, v in numeric.items() if isinstance(v, (int, float))}, targets,
        bounds, total, float(r.number("tolerance", 1e-8) or 1e-8), r.integer("max_iterations", 50), collapse,
    )


def steps_for_wave(steps: list[Step], wave: str, *, source: str = "") -> list[Step]:
    """The steps with each step's targets those of `wave` (`TargetTable.for_wave`).

    SpecError (rule wave-without-targets) naming each step whose targets give this wave nothing.
    """
    out: list[Step] = []
    problems: list[Problem] = []
    for step in steps:
        targets = getattr(step, "targets", None)
        if targets is None:
            out.append(step)
            continue
        own = targets.for_wave(wave)
        needs = bool(getattr(step, "margins", ())) or isinstance(step, PoststratifyStep)
        if needs and not own.margins:
            problems.append(Problem(
                "wave-without-targets",
                f"weighting[{step.index}] ({step.kind}): the targets ({targets.source}) give wave '{wave}' none; "
                f"add rows with wave {wave} (or rows without a wave) or a targets file for {wave}",
                value=wave,
            ))
        out.append(replace(step, targets=own))  # type: ignore[arg-type]
    if problems:
        raise SpecError(f"{source or 'the spec'}: wave {wave} has no weighting targets", problems)
    return out


def parse_steps(raw: tuple[dict, ...], context: StepContext) -> list[Step]:
    """Parse the raw `[[weighting]]` tables against the study's `context`; every problem is collected into one SpecError.

    Problems name the step as the user counts the [[weighting]] blocks, from 1, and the key, e.g.
    `weighting step 3, margins[0]`. Targets files are read here (paths relative
    to `context.folder`, the spec's folder) so their problems are reported with the spec's.
    """
    problems: list[Problem] = []
    steps = [_parse_one(i, item, context, problems) for i, item in enumerate(raw)]
    if problems:
        raise SpecError(f"{context.source}: the [[weighting]] steps have {len(problems)} problem(s)", problems)
    return [s for s in steps if s is not None]
