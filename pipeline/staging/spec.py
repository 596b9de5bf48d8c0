"""The study spec: one TOML file that declares a study, its waves, its sample design and its codebook.

`load_spec(path)` reads and validates the file and returns a `Study`. Validation collects every
problem (unknown keys, wrong types, references to undeclared variables) into one `SpecError`,
each problem naming the key (e.g. `variables.satisfaction.exclude_from_statistics`). A key or value
with a retired name is refused naming its replacement (`pipeline.renamed`).

This module defines the objects every later stage reads; sections owned by later stages
(`[[weighting]]`, `[variance]`) are parsed by those stages' own modules and kept here as raw
tables until they are (see DEVELOPERS.md).
"""

from __future__ import annotations

import datetime as dt
import re
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Literal

from pipeline.errors import Problem, SpecError
from pipeline.staging.conditions import NAME_PATTERN, ColumnInfo, Condition, ConditionError, bind, name_positions, parse
from pipeline.renamed import renamed_key, renamed_value

if TYPE_CHECKING:
    from pipeline.weighting.steps import StepContext

Code = int | str
VariableType = Literal["single", "multi", "numeric", "rating"]


@dataclass(frozen=True)
class Wave:
    """One wave of the tracker: its id (used as a key everywhere), label, fieldwork dates and raw file."""

    id: str
    label: str
    file: Path  # resolved against the spec's folder
    fieldwork_start: dt.date | None = None
    fieldwork_end: dt.date | None = None


@dataclass(frozen=True)
class Design:
    """The sample design of every wave.

    kind: "probability" (strata/PSU/weights known) or "nonprobability" (quota or online panel:
    equal base weights; the book carries the non-probability caution).
    strata, psu: column names (None = unstratified / each respondent is its own PSU).
    psu_ids: "within-stratum" (PSU ids restart within each stratum) or "unique" (unique across strata).
    base_weight / selection_probability: at most one column name; base weight = 1 / probability.
    population: first-stage population size per stratum code (PSUs in the stratum; respondents
    in a single-stage design), for the finite population correction.
    sampling_fraction: alternatively, the first-stage sampling fraction per stratum code.
    single_psu: policy for strata with one PSU: "error", "certainty", "grand-mean" or "collapse".
    collapse_with: for "collapse", stratum code -> partner stratum code.
    second_stage_fraction: with PSUs and a finite population correction, the share of each selected
    PSU's units taken at the second stage (0 when unknown, the safe side; 1 when whole PSUs are
    taken), for the within-PSU term of the two-stage variance (pipeline.estimation.design).
    first_stage: "equal" (PSUs drawn with equal probability within stratum, default) or "pps"
    (probability proportional to size: no finite population correction, with-replacement variance,
    unless psu_inclusion_probability names a column of each PSU's first-stage inclusion
    probability, which gives the (1 - pi) approximation of pipeline.estimation.design).
    extreme_weight_ratio: staging warns (extreme-weight, naming the ids) about a design weight above
    this multiple of the wave's median weight (default 1,000: common practice, no source).
    same_psus_across_waves: the waves re-interview the same PSUs (a panel of areas), so wave-over-wave
    changes are estimated on the waves stacked into one design (pipeline.tables.wave_change).
    """

    kind: Literal["probability", "nonprobability"] = "probability"
    strata: str | None = None
    psu: str | None = None
    psu_ids: Literal["within-stratum", "unique"] = "within-stratum"
    base_weight: str | None = None
    selection_probability: str | None = None
    population: dict[Code, float] = field(default_factory=dict)
    sampling_fraction: dict[Code, float] = field(default_factory=dict)
    single_psu: Literal["error", "certainty", "grand-mean", "collapse"] = "error"
    collapse_with: dict[Code, Code] = field(default_factory=dict)
    second_stage_fraction: float = 0.0
    first_stage: Literal["equal", "pps"] = "equal"
    psu_inclusion_probability: str | None = None
    extreme_weight_ratio: float = 1000.0
    same_psus_across_waves: bool = False

    @property
    def columns(self) -> tuple[str, ...]:
        """The data columns the design reads."""
        return tuple(
            c
            for c in (self.strata, self.psu, self.base_weight, self.selection_probability,
                      self.psu_inclusion_probability)
            if c is not None
        )


@dataclass(frozen=True)
class Variable:
    """One codebook entry.

    type "single": one code per respondent, labelled by `values`.
    type "multi": a multiple-response set; `items` maps each item column to its label, an item
    column holds 1 (selected) or 0 (not selected); missing means not asked.
    type "numeric": a number; optional `minimum` / `maximum` bounds are checked at staging.
    type "rating": a rating scale; `values` labels the codes, `exclude_from_statistics` lists codes
    such as "don't know" that are shown in distributions but left out of the mean, median, minimum,
    maximum and number of answers.
    nets: label -> list of codes (e.g. "Top two box" -> [9, 10]), for "single" and "rating".
    exclude_from_base: codes (e.g. 99 "don't know") shown as their own rows but outside the base
    of the percentages (and of the statistics), for "single" and "rating".
    For "multi", nets: label -> items (a net of respondents choosing any of them).
    balance: label -> (plus codes, minus codes): the percentage giving a plus code minus the
    percentage giving a minus code, for "single" and "rating".
    asked_if: who was asked (pipeline.staging.conditions); the others are "Not asked", out of
    every base of the variable. waves: the waves that asked it (None: every wave); in other
    waves its columns need not exist. item_waves: for a multi set, item -> the waves that
    asked that item.
    column: wave -> the column's name in that wave's file (default: the variable's name).
    recode: wave -> {code in that wave's file: codebook code}, applied before checking and
    staging (so drift checks compare recoded values).
    """

    name: str
    type: VariableType
    label: str
    values: dict[Code, str] = field(default_factory=dict)
    items: dict[str, str] = field(default_factory=dict)
    nets: dict[str, tuple[Code, ...]] = field(default_factory=dict)
    exclude_from_statistics: tuple[Code, ...] = ()
    exclude_from_base: tuple[Code, ...] = ()
    balance: dict[str, tuple[tuple[Code, ...], tuple[Code, ...]]] = field(default_factory=dict)
    minimum: float | None = None
    maximum: float | None = None
    asked_if: Condition | None = None
    waves: tuple[str, ...] | None = None
    item_waves: dict[str, tuple[str, ...]] = field(default_factory=dict)
    column: dict[str, str] = field(default_factory=dict)
    recode: dict[str, dict[Code, Code]] = field(default_factory=dict)
    when: dict[Code, Condition] = field(default_factory=dict)

    @property
    def derived(self) -> bool:
        """Whether the variable is derived (`[derived.<name>]`): computed at staging, in no file."""
        return bool(self.when)

    def asked_in(self, wave_id: str, item: str | None = None) -> bool:
        """Whether the wave asked the variable (and, for a multi set, the item)."""
        if self.waves is not None and wave_id not in self.waves:
            return False
        return item is None or item not in self.item_waves or wave_id in self.item_waves[item]

    def wave_columns(self, wave_id: str) -> tuple[str, ...]:
        """The columns this variable reads in a wave's file (none in a wave that did not ask it,
        none for a derived variable)."""
        if self.derived or (self.waves is not None and wave_id not in self.waves):
            return ()
        return tuple(c for c in self.columns if self.asked_in(wave_id, c if self.type == "multi" else None))

    @property
    def unscored(self) -> tuple[Code, ...]:
        """Codes left out of the statistics: those excluded from the statistics or from the base."""
        return tuple(dict.fromkeys((*self.exclude_from_statistics, *self.exclude_from_base)))

    @property
    def columns(self) -> tuple[str, ...]:
        """The data columns this variable reads (the items of a multi set, else its own name)."""
        return tuple(self.items) if self.type == "multi" else (self.name,)

    @property
    def int_coded(self) -> bool:
        """Whether the codes are integers (every key of `values` an integer literal; always for a rating)."""
        return self.type in ("single", "rating") and all(isinstance(c, int) for c in self.values)

    @property
    def valid_codes(self) -> tuple[Code, ...]:
        """The codes a response may hold, in order.

        single: the labelled codes. rating: the labelled codes plus every integer between the
        lowest and the highest labelled code that is not excluded from the statistics (so 1..9
        need no label on a 0-10 scale). Other types have no codes.
        """
        if self.type == "single":
            return tuple(self.values)
        if self.type != "rating" or not self.values:
            return ()
        on_scale = [c for c in self.values if c not in self.unscored]
        filled = set(range(min(on_scale), max(on_scale) + 1)) if on_scale else set()
        return tuple(sorted(filled | set(self.values)))


@dataclass(frozen=True)
class Study:
    """A validated study spec."""

    path: Path
    title: str
    respondent_id: str
    waves: tuple[Wave, ...]
    design: Design
    variables: dict[str, Variable]
    notes: tuple[str, ...] = ()
    database: Path | None = None  # default: <spec stem>.duckdb beside the spec
    weighting: tuple[dict, ...] = ()  # raw [[weighting]] steps, parsed by pipeline.weighting
    variance: dict = field(default_factory=dict)  # raw [variance] table, parsed by pipeline.estimation
    tables: dict = field(default_factory=dict)  # raw [tables] table, parsed by pipeline.tables.spec
    banners: tuple[dict, ...] = ()  # raw [[banners]] tables, parsed by pipeline.tables.spec

    @property
    def database_path(self) -> Path:
        """The study database file."""
        return self.database if self.database is not None else self.path.with_suffix(".duckdb")

    def step_context(self) -> StepContext:
        """What the `[[weighting]]` steps are checked against: plain facts, never the spec itself."""
        from pipeline.weighting.steps import StepContext

        coded = {name for name, v in self.variables.items() if v.type in ("single", "rating")}
        return StepContext(
            folder=self.path.parent,
            source=str(self.path),
            variable_types={name: v.type for name, v in self.variables.items()},
            coded=frozenset(coded | ({self.design.strata} if self.design.strata else set())),
            codes={name: tuple(str(c) for c in v.valid_codes) for name, v in self.variables.items() if v.valid_codes},
            waves=tuple(w.id for w in self.waves),
        )

    def own_columns(self) -> dict[str, str]:
        """Every column the spec names (respondent id, design, codebook) -> where it is declared."""
        out = {self.respondent_id: "respondent_id"}
        for key in ("strata", "psu", "base_weight", "selection_probability", "psu_inclusion_probability"):
            column = getattr(self.design, key)
            if column is not None:
                out.setdefault(column, f"design.{key}")
        for variable in self.variables.values():
            for column in variable.columns:
                out.setdefault(column, f"variables.{variable.name}")
        return out

    def wave(self, wave_id: str) -> Wave:
        """The wave with id `wave_id` (KeyError naming the known ids otherwise)."""
        for w in self.waves:
            if w.id == wave_id:
                return w
        raise KeyError(f"no wave '{wave_id}' in the spec; declared waves: {', '.join(w.id for w in self.waves)}")


# ---------------------------------------------------------------------------------------------
# Loading and validation
# ---------------------------------------------------------------------------------------------

_TOP_KEYS = (
    "title", "notes", "respondent_id", "database", "waves", "design", "variables", "derived", "weighting", "variance",
    "tables", "banners",
)
_DERIVED_KEYS = ("label", "type", "values", "nets", "when")
ANY_ITEM_LABEL = "Any of these"  # the multi set's own net of every item (pipeline.tables.topline)
_WAVE_KEYS = ("label", "file", "fieldwork")
_DESIGN_KEYS = (
    "kind",
    "strata",
    "psu",
    "psu_ids",
    "base_weight",
    "selection_probability",
    "population",
    "sampling_fraction",
    "single_psu",
    "collapse_with",
    "second_stage_fraction",
    "first_stage",
    "psu_inclusion_probability",
    "extreme_weight_ratio",
    "same_psus_across_waves",
)
_ROUTING_KEYS = ("asked_if", "waves")
_VARIABLE_KEYS: dict[str, tuple[str, ...]] = {
    "single": ("label", "type", "values", "nets", "balance", "exclude_from_base", *_ROUTING_KEYS, "column", "recode"),
    "rating": ("label", "type", "values", "exclude_from_statistics", "exclude_from_base", "nets", "balance",
               *_ROUTING_KEYS, "column", "recode"),
    "multi": ("label", "type", "items", "nets", *_ROUTING_KEYS),
    "numeric": ("label", "type", "minimum", "maximum", *_ROUTING_KEYS, "column"),
}
_ITEM_KEYS = ("label", "waves")
_ANY_VARIABLE_KEY = frozenset(k for keys in _VARIABLE_KEYS.values() for k in keys)
_VARIABLE_REQUIRED: dict[str, tuple[str, ...]] = {
    "single": ("label", "values"),
    "rating": ("label", "values"),
    "multi": ("label", "items"),
    "numeric": ("label",),
}
_RESERVED_COLUMNS = frozenset({"wave", "respondent_id"})
_WAVE_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]*$")
_INT_LITERAL = re.compile(r"^[+-]?[0-9]+$")
_TOML_POSITION = re.compile(r"\(at line (\d+), column (\d+)\)")

_TYPE_NAMES = {
    bool: "true or false",
    str: "a string",
    list: "an array",
    dict: "a table",
    dt.date: "a date",
}


def load_spec(path: str | Path) -> Study:
    """Read and validate a study spec (TOML); return the `Study`.

    Every problem is collected and raised together as one `SpecError`; each `Problem` names the
    dotted key (`variables.satisfaction.exclude_from_statistics`) and has one of the rules
    toml-syntax, missing-file, unknown-key, missing-key, wrong-type, bad-value, renamed-key,
    renamed-value, key-not-for-type,
    conflicting-keys, undeclared-code, duplicate-column, reserved-name. Wave files are resolved
    against the spec's folder but not opened (staging checks them). The insides of `[variance]`
    and `[[weighting]]` are validated by their own modules (`pipeline.estimation.options.
    parse_variance`, `pipeline.weighting.steps.parse_steps`) and their problems join the list.
    """
    spec_path = Path(path).resolve()
    try:
        text = spec_path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SpecError(
            f"cannot read the study spec {spec_path}",
            [Problem("missing-file", f"the spec file {spec_path} does not exist", file=str(spec_path))],
        ) from None
    except IsADirectoryError:
        raise SpecError(
            f"cannot read the study spec {spec_path}",
            [Problem("not-a-file", "this is a folder; name the study's .toml file", file=str(spec_path))],
        ) from None
    except OSError as exc:
        raise SpecError(
            f"cannot read the study spec {spec_path}",
            [Problem("unreadable-file", f"{exc.strerror or exc}", file=str(spec_path))],
        ) from None
    except UnicodeDecodeError as exc:
        raise SpecError(
            f"cannot read the study spec {spec_path}",
            [Problem("toml-syntax", f"the spec is not UTF-8 text ({exc.reason})", file=str(spec_path))],
        ) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(f"the study spec {spec_path} is not valid TOML", [_syntax_problem(spec_path, exc)]) from None
    checker = _Checker(str(spec_path))
    study = checker.study(data, spec_path)
    problems = checker.problems + [
        p if p.file else replace(p, file=str(spec_path)) for p in _section_problems(study, data)
    ]
    if problems or study is None:
        n = len(problems)
        raise SpecError(f"the study spec {spec_path} has {n} problem{'s' if n != 1 else ''}", problems)
    return study


def _section_problems(study: Study | None, data: dict) -> list[Problem]:
    """Problems inside `[variance]` and `[[weighting]]`, found by the modules that own them.

    `[variance]` is checked whenever it is a table; the weighting steps need a valid Study (they
    name codebook variables and read their targets files), so they are checked once the rest of
    the spec is valid.
    """
    from pipeline.estimation.options import parse_variance
    from pipeline.tables.spec import parse_tables
    from pipeline.weighting.steps import parse_steps

    problems: list[Problem] = []
    variance = data.get("variance", {})
    if isinstance(variance, dict):
        problems += parse_variance(variance, columns=study.own_columns() if study is not None else None)[1]
        if study is not None and variance.get("method") == "supplied":
            design = study.design
            for key, given in (("population", design.population), ("sampling_fraction", design.sampling_fraction),
                               ("psu_inclusion_probability", design.psu_inclusion_probability)):
                if given:
                    problems.append(Problem("conflicting-keys", f"design.{key}: supplied replicate weights carry "
                                            "their own variance recipe (a finite population correction included); "
                                            "drop it"))
    if study is not None:
        try:
            parse_steps(study.weighting, study.step_context())
        except SpecError as exc:
            problems += exc.problems
        problems += parse_tables(study)[1]
    return problems


def _syntax_problem(spec_path: Path, exc: tomllib.TOMLDecodeError) -> Problem:
    message = str(exc)
    match = _TOML_POSITION.search(message)
    where = f"line {match.group(1)}, column {match.group(2)}" if match else "end of file"
    reason = _TOML_POSITION.sub("", message).replace("(at end of document)", "").strip()
    return Problem("toml-syntax", f"{spec_path.name}, {where}: {reason}", file=str(spec_path))


def _codes_from_keys(keys: list[str]) -> list[Code]:
    """Codes from TOML keys: ints when every key is an integer literal, else the strings."""
    if keys and all(_INT_LITERAL.match(k) for k in keys):
        return [int(k) for k in keys]
    return list(keys)


def _is_number(value: object) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


class _Checker:
    """Walks the parsed TOML, collecting every problem; builds the Study objects as it goes."""

    def __init__(self, file: str) -> None:
        self.file = file
        self.problems: list[Problem] = []

    def add(self, rule: str, key: str, message: str, *, value: object = None) -> None:
        self.problems.append(
            Problem(rule, f"{key}: {message}", file=self.file, value=None if value is None else str(value))
        )

    def keys(self, table: dict, key: str, allowed: tuple[str, ...], required: tuple[str, ...] = ()) -> None:
        prefix = f"{key}." if key else ""
        for k in table:
            if k not in allowed:
                self.add(
                    "unknown-key",
                    f"{prefix}{k}",
                    f"unknown key '{k}'" + (f" in [{key}]" if key else "") + f"; allowed: {', '.join(allowed)}",
                )
        for k in required:
            if k not in table:
                self.add("missing-key", f"{prefix}{k}", f"required key '{k}' is missing")

    def typed(self, table: dict, key: str, name: str, kind: type) -> object:
        """table[name] if present and of the right kind, else None (reporting a wrong type)."""
        if name not in table:
            return None
        value = table[name]
        ok = type(value) is dt.date if kind is dt.date else isinstance(value, kind) and not isinstance(value, bool)
        if kind is float:
            ok = _is_number(value)
        if kind is bool:
            ok = isinstance(value, bool)
        if not ok:
            wanted = "a number" if kind is float else _TYPE_NAMES.get(kind, kind.__name__)
            full = f"{key}.{name}" if key else name
            self.add("wrong-type", full, f"must be {wanted}, not {type(value).__name__} {value!r}", value=value)
            return None
        return value

    def choice(self, table: dict, key: str, name: str, options: tuple[str, ...], default: str) -> str:
        value = self.typed(table, key, name, str)
        if value is None:
            return default
        renamed = renamed_value(f"{key}.{name}", value, file=self.file)
        if renamed is not None:
            self.problems.append(renamed)
            return default
        if value not in options:
            self.add("bad-value", f"{key}.{name}", f"'{value}' is not one of: {', '.join(options)}", value=value)
            return default
        return str(value)

    def string_list(self, table: dict, key: str, name: str) -> tuple[str, ...]:
        value = self.typed(table, key, name, list)
        if value is None:
            return ()
        bad = [v for v in value if not isinstance(v, str)]
        if bad:
            self.add("wrong-type", f"{key}.{name}" if key else name, f"must be an array of strings; got {bad[0]!r}")
            return ()
        return tuple(value)

    # -- the whole study ---------------------------------------------------------------------
    def study(self, data: dict, spec_path: Path) -> Study | None:
        self.keys(data, "", _TOP_KEYS, ("title", "respondent_id", "waves"))
        title = self.typed(data, "", "title", str)
        respondent_id = self.typed(data, "", "respondent_id", str)
        notes = self.string_list(data, "", "notes")
        database = self.typed(data, "", "database", str)
        waves = self.waves(data.get("waves"), spec_path.parent) if "waves" in data else ()
        variables = self.variables(data.get("variables", {}))
        variables = self.routing(data.get("variables", {}), variables, tuple(w.id for w in waves))
        variables = {**variables, **self.derived(data.get("derived", {}), variables)}
        design = self.design(data.get("design", {}), variables)
        weighting = self.weighting(data)
        variance = self.typed(data, "", "variance", dict)
        tables = self.typed(data, "", "tables", dict)
        banners = data.get("banners", [])
        if not isinstance(banners, list) or not all(isinstance(b, dict) for b in banners):
            self.add("wrong-type", "banners", "must be an array of tables ([[banners]] blocks)")
            banners = []
        self.columns(respondent_id, design, variables)
        if self.problems:
            return None
        return Study(
            path=spec_path,
            title=str(title),
            respondent_id=str(respondent_id),
            waves=waves,
            design=design,
            variables=variables,
            notes=notes,
            database=(spec_path.parent / database) if database else None,
            weighting=weighting,
            variance=dict(variance or {}),
            tables=dict(tables or {}),
            banners=tuple(banners),
        )

    def weighting(self, data: dict) -> tuple[dict, ...]:
        steps = data.get("weighting", [])
        if not isinstance(steps, list) or not all(isinstance(s, dict) for s in steps):
            self.add("wrong-type", "weighting", "must be an array of tables ([[weighting]] blocks)")
            return ()
        return tuple(steps)

    # -- waves ---------------------------------------------------------------------------------
    def waves(self, raw: object, folder: Path) -> tuple[Wave, ...]:
        if not isinstance(raw, dict):
            self.add("wrong-type", "waves", "must be a table of waves ([waves.<id>] blocks)")
            return ()
        if not raw:
            self.add("missing-key", "waves", "declare at least one wave ([waves.<id>] with label and file)")
        waves = []
        for wave_id, table in raw.items():
            key = f"waves.{wave_id}"
            if not _WAVE_ID.match(wave_id):
                self.add(
                    "bad-value",
                    key,
                    "a wave id uses letters, digits, '_' and '-' only, starting with a letter or digit",
                    value=wave_id,
                )
            if not isinstance(table, dict):
                self.add("wrong-type", key, "must be a table with label and file")
                continue
            self.keys(table, key, _WAVE_KEYS, ("label", "file"))
            label = self.typed(table, key, "label", str)
            file = self.typed(table, key, "file", str)
            start, end = self.fieldwork(table, key)
            if label is not None and file is not None:
                waves.append(Wave(wave_id, label, folder / file, start, end))
        return tuple(waves)

    def fieldwork(self, table: dict, key: str) -> tuple[dt.date | None, dt.date | None]:
        value = self.typed(table, key, "fieldwork", list)
        if value is None:
            return None, None
        if len(value) != 2 or not all(type(v) is dt.date for v in value):
            self.add("wrong-type", f"{key}.fieldwork", "must be two TOML dates [start, end], e.g. [2026-03-02, 2026-03-21]")
            return None, None
        start, end = value
        if start > end:
            self.add("bad-value", f"{key}.fieldwork", f"starts ({start}) after it ends ({end})")
        return start, end

    # -- variables -----------------------------------------------------------------------------
    def variables(self, raw: object) -> dict[str, Variable]:
        if not isinstance(raw, dict):
            self.add("wrong-type", "variables", "must be a table of variables ([variables.<name>] blocks)")
            return {}
        out = {}
        for name, table in raw.items():
            key = f"variables.{name}"
            if not isinstance(table, dict):
                self.add("wrong-type", key, "must be a table with label and type")
                continue
            variable = self.variable(name, table, key)
            if variable is not None:
                out[name] = variable
        return out

    def variable(self, name: str, table: dict, key: str) -> Variable | None:
        retired = [p for k in table if (p := renamed_key(key, k, file=self.file)) is not None]
        self.problems += retired
        if retired:
            table = {k: v for k, v in table.items() if renamed_key(key, k) is None}
        vtype = self.typed(table, key, "type", str)
        if "type" not in table:
            self.add("missing-key", f"{key}.type", "required key 'type' is missing (single, multi, rating or numeric)")
            return None
        if vtype not in _VARIABLE_KEYS:
            renamed = renamed_value(f"{key}.type", vtype, file=self.file)
            if renamed is not None:
                self.problems.append(renamed)
            elif vtype is not None:
                self.add("bad-value", f"{key}.type", f"'{vtype}' is not one of: single, multi, rating, numeric", value=vtype)
            return None
        allowed = _VARIABLE_KEYS[vtype]
        for k in table:
            if k in _ANY_VARIABLE_KEY and k not in allowed:
                self.add("key-not-for-type", f"{key}.{k}", f"'{k}' is not used by a {vtype} variable; remove it")
        known = {k: v for k, v in table.items() if k not in _ANY_VARIABLE_KEY or k in allowed}
        self.keys(known, key, allowed, _VARIABLE_REQUIRED[vtype])
        label = self.typed(table, key, "label", str)
        if vtype == "numeric":
            return self.numeric(name, table, key, label)
        if vtype == "multi":
            items, item_waves = self.items(table, key)
            if label is None or items is None:
                return None
            return Variable(name, "multi", label, items=items, item_waves=item_waves, nets=self.item_nets(table, key, items))
        labels = self.labels(table, key, "values")
        if labels is None or label is None:
            return None
        codes = _codes_from_keys(list(labels))
        values = dict(zip(codes, labels.values(), strict=True))
        if vtype == "rating" and not all(isinstance(c, int) for c in codes):
            self.add("wrong-type", f"{key}.values", "the codes of a rating must all be integers")
            return None
        base = Variable(name, vtype, label, values=values)  # type: ignore[arg-type]
        exclude: tuple[Code, ...] = ()
        if vtype == "rating" and "exclude_from_statistics" in table:
            exclude = self.code_list(
                table["exclude_from_statistics"], f"{key}.exclude_from_statistics", base, tuple(values)
            )
        outside = self.code_list(table["exclude_from_base"], f"{key}.exclude_from_base", base, tuple(values)) if (
            "exclude_from_base" in table) else ()
        rated = Variable(name, vtype, label, values=values, exclude_from_statistics=exclude,  # type: ignore[arg-type]
                         exclude_from_base=outside)
        nets = self.nets(table, key, rated)
        for net, members in nets.items():
            inside = [c for c in members if c in outside]
            if inside:
                self.add("conflicting-keys", f"{key}.nets.{net}",
                         f"code {inside[0]!r} is excluded from the base (exclude_from_base); a net cannot count it")
        return replace(rated, nets=nets, balance=self.balance(table, key, rated))

    def numeric(self, name: str, table: dict, key: str, label: object) -> Variable | None:
        low = self.typed(table, key, "minimum", float)
        high = self.typed(table, key, "maximum", float)
        if low is not None and high is not None and low > high:
            self.add("bad-value", f"{key}.minimum", f"minimum {low} is above maximum {high}")
        if label is None:
            return None
        return Variable(
            name,
            "numeric",
            str(label),
            minimum=None if low is None else float(low),
            maximum=None if high is None else float(high),
        )

    def items(self, table: dict, key: str) -> tuple[dict[str, str] | None, dict[str, tuple[str, ...]]]:
        """A multi set's items: column -> label, or column -> { label, waves } (the waves that asked it)."""
        value = self.typed(table, key, "items", dict)
        if value is None:
            return None, {}
        if not value:
            self.add("bad-value", f"{key}.items", "is empty; list at least one entry")
            return None, {}
        items: dict[str, str] = {}
        item_waves: dict[str, tuple[str, ...]] = {}
        for column, entry in value.items():
            where = f"{key}.items.{column}"
            if isinstance(entry, str):
                items[column] = entry
            elif isinstance(entry, dict):
                self.keys(entry, where, _ITEM_KEYS, ("label",))
                label = self.typed(entry, where, "label", str)
                if label is not None:
                    items[column] = label
                if "waves" in entry:
                    item_waves[column] = self.string_list(entry, where, "waves")
            else:
                self.add("wrong-type", where, f"must be a label or a table {{ label, waves }}, not {entry!r}", value=entry)
        return (items if len(items) == len(value) else None), item_waves

    def routing(self, raw: object, variables: dict[str, Variable], wave_ids: tuple[str, ...]) -> dict[str, Variable]:
        """Read `asked_if` and `waves` once every variable is known (a condition may name a later one)."""
        if not isinstance(raw, dict):
            return variables
        columns = _condition_columns(variables)
        out = dict(variables)
        for name, variable in variables.items():
            table = raw[name]
            key = f"variables.{name}"
            waves = self.wave_list(table, key, wave_ids) if "waves" in table else None
            item_waves = {
                item: listed
                for item, waves_of_item in variable.item_waves.items()
                if (listed := self.wave_list({"waves": list(waves_of_item)}, f"{key}.items.{item}", wave_ids))
            }
            condition = self.condition(table, key, columns, variable) if "asked_if" in table else None
            column = self.wave_columns(table, key, wave_ids) if "column" in table else {}
            recode = self.recodes(table, key, wave_ids, variable) if "recode" in table else {}
            out[name] = replace(
                variable, asked_if=condition, waves=waves, item_waves=item_waves, column=column, recode=recode
            )
        for wave_id in wave_ids:  # a renamed column may not be another variable's column in that wave
            owner = {c: v.name for v in out.values() for c in v.wave_columns(wave_id) if wave_id not in v.column}
            for variable in out.values():
                source = variable.column.get(wave_id)
                if source is not None and variable.asked_in(wave_id) and source in owner:
                    self.add("duplicate-column", f"variables.{variable.name}.column.{wave_id}",
                             f"wave {wave_id}'s column '{source}' is already read by variables.{owner[source]}")
        return out

    def derived(self, raw: object, variables: dict[str, Variable]) -> dict[str, Variable]:
        """`[derived.<name>]`: single-choice variables whose code is the first `when` condition that holds."""
        if not isinstance(raw, dict):
            self.add("wrong-type", "derived", "must be a table of derived variables ([derived.<name>] blocks)")
            return {}
        columns = _condition_columns(variables)
        out: dict[str, Variable] = {}
        for name, table in raw.items():
            key = f"derived.{name}"
            if not isinstance(table, dict):
                self.add("wrong-type", key, "must be a table with label, type, values and when")
                continue
            if name in variables:
                self.add("duplicate-column", key, f"'{name}' is already a codebook variable (variables.{name})")
                continue
            self.keys(table, key, _DERIVED_KEYS, ("label", "type", "values", "when"))
            if table.get("type", "single") != "single":
                self.add("bad-value", f"{key}.type", "a derived variable is single-choice (type = \"single\")",
                         value=table.get("type"))
                continue
            variable = self.variable(name, {k: v for k, v in table.items() if k in _DERIVED_KEYS[:4]}, key)
            when = self.typed(table, key, "when", dict)
            if variable is None or when is None:
                continue
            conditions: dict[Code, Condition] = {}
            for code_key, text in when.items():
                code = self.code_list([code_key], f"{key}.when.{code_key}", variable, variable.valid_codes)
                condition = self.condition(when, f"{key}.when", columns, variable, name=code_key)
                if code and condition is not None:
                    conditions[code[0]] = condition
            if not when:
                self.add("bad-value", f"{key}.when", "give a condition for at least one code")
            if conditions:
                out[name] = replace(variable, when=conditions)
        return out

    def wave_columns(self, table: dict, key: str, wave_ids: tuple[str, ...]) -> dict[str, str]:
        raw = self.typed(table, key, "column", dict)
        out: dict[str, str] = {}
        for wave_id, column in (raw or {}).items():
            where = f"{key}.column.{wave_id}"
            if wave_id not in wave_ids:
                self.add("bad-value", where, f"'{wave_id}' is not a wave of the spec ({', '.join(wave_ids)})", value=wave_id)
            elif not isinstance(column, str) or not column:
                self.add("wrong-type", where, f"must be the column's name in that wave's file, not {column!r}", value=column)
            else:
                out[wave_id] = column
        return out

    def recodes(self, table: dict, key: str, wave_ids: tuple[str, ...], variable: Variable) -> dict[str, dict[Code, Code]]:
        raw = self.typed(table, key, "recode", dict)
        out: dict[str, dict[Code, Code]] = {}
        for wave_id, mapping in (raw or {}).items():
            where = f"{key}.recode.{wave_id}"
            if wave_id not in wave_ids:
                self.add("bad-value", where, f"'{wave_id}' is not a wave of the spec ({', '.join(wave_ids)})", value=wave_id)
                continue
            if not isinstance(mapping, dict) or not mapping:
                self.add("wrong-type", where, "must be a table {code in the file = codebook code}, e.g. { 6 = 5, 7 = 5 }")
                continue
            codes: dict[Code, Code] = {}
            for source, target in mapping.items():
                old = self.code(source, f"{where}.{source}", variable)
                new = self.code_list([target], f"{where}.{source}", variable, variable.valid_codes)
                if old is not None and new:
                    codes[old] = new[0]
            out[wave_id] = codes
        return out

    def wave_list(self, table: dict, key: str, wave_ids: tuple[str, ...]) -> tuple[str, ...] | None:
        listed = self.string_list(table, key, "waves")
        unknown = [w for w in listed if w not in wave_ids]
        for w in unknown:
            self.add("bad-value", f"{key}.waves", f"'{w}' is not a wave of the spec ({', '.join(wave_ids)})", value=w)
        if "waves" in table and isinstance(table["waves"], list) and not table["waves"]:
            self.add("bad-value", f"{key}.waves", "lists no wave; list the waves that asked it, or drop the key")
        return tuple(w for w in listed if w in wave_ids) or None

    def condition(
        self, table: dict, key: str, columns: dict[str, ColumnInfo], variable: Variable, *, name: str = "asked_if"
    ) -> Condition | None:
        text = self.typed(table, key, name, str)
        if text is None:
            return None
        try:
            parsed = parse(text)
            for column, position in name_positions(parsed.tree):
                if column in variable.columns:
                    raise ConditionError(f"'{variable.name}' cannot be filtered on its own answers", text, position)
            return bind(parsed, columns)
        except ConditionError as exc:
            self.add("bad-condition", f"{key}.{name}", exc.render(), value=text)
            return None

    def labels(self, table: dict, key: str, name: str) -> dict[str, str] | None:
        value = self.typed(table, key, name, dict)
        if value is None:
            return None
        if not value:
            self.add("bad-value", f"{key}.{name}", "is empty; list at least one entry")
            return None
        bad = [k for k, v in value.items() if not isinstance(v, str)]
        for k in bad:
            self.add("wrong-type", f"{key}.{name}.{k}", f"the label must be a string, not {value[k]!r}", value=value[k])
        return None if bad else dict(value)

    def code_list(self, raw: object, key: str, variable: Variable, allowed: tuple[Code, ...]) -> tuple[Code, ...]:
        """Codes given as a TOML array, converted to the variable's code type and checked against `allowed`."""
        if not isinstance(raw, list):
            self.add("wrong-type", key, f"must be an array of codes, not {type(raw).__name__} {raw!r}")
            return ()
        out: list[Code] = []
        for item in raw:
            code = self.code(item, key, variable)
            if code is None:
                continue
            if code not in allowed:
                shown = ", ".join(str(c) for c in _ranges(allowed))
                self.add(
                    "undeclared-code",
                    key,
                    f"code {code!r} is not a valid code of '{variable.name}' (valid: {shown})",
                    value=code,
                )
                continue
            out.append(code)
        return tuple(out)

    def code(self, item: object, key: str, variable: Variable) -> Code | None:
        if variable.int_coded:
            if isinstance(item, int) and not isinstance(item, bool):
                return item
            if isinstance(item, str) and _INT_LITERAL.match(item):
                return int(item)
            self.add("wrong-type", key, f"codes of '{variable.name}' are integers; got {item!r}", value=item)
            return None
        if isinstance(item, (str, int)) and not isinstance(item, bool):
            return str(item)
        self.add("wrong-type", key, f"codes of '{variable.name}' are strings; got {item!r}", value=item)
        return None

    def item_nets(self, table: dict, key: str, items: dict[str, str]) -> dict[str, tuple[Code, ...]]:
        """A multi set's nets: label -> its items."""
        raw = self.typed(table, key, "nets", dict)
        nets: dict[str, tuple[Code, ...]] = {}
        for label, members in (raw or {}).items():
            where = f"{key}.nets.{label}"
            if label == ANY_ITEM_LABEL:
                self.add("bad-value", where, f"'{ANY_ITEM_LABEL}' is the set's own net of every item; choose another label")
            if not isinstance(members, list) or not members or not all(isinstance(m, str) for m in members):
                self.add("wrong-type", where, f"must list item columns of the set, e.g. [\"{next(iter(items))}\"]")
                continue
            unknown = [m for m in members if m not in items]
            for m in unknown:
                self.add("bad-value", where, f"'{m}' is not an item of the set ({', '.join(items)})", value=m)
            if not unknown:
                nets[label] = tuple(dict.fromkeys(members))
        return nets

    def balance(self, table: dict, key: str, variable: Variable) -> dict[str, tuple[tuple[Code, ...], tuple[Code, ...]]]:
        """Balance scores: label -> { plus = [codes], minus = [codes] } (disjoint, inside the base)."""
        raw = self.typed(table, key, "balance", dict)
        out: dict[str, tuple[tuple[Code, ...], tuple[Code, ...]]] = {}
        allowed = tuple(c for c in variable.valid_codes if c not in variable.exclude_from_base)
        for label, sides in (raw or {}).items():
            where = f"{key}.balance.{label}"
            if not isinstance(sides, dict) or set(sides) != {"plus", "minus"}:
                self.add("wrong-type", where, "must be a table { plus = [codes], minus = [codes] }")
                continue
            plus = self.code_list(sides["plus"], f"{where}.plus", variable, allowed)
            minus = self.code_list(sides["minus"], f"{where}.minus", variable, allowed)
            both = [c for c in plus if c in minus]
            if both:
                self.add("conflicting-keys", where, f"code {both[0]!r} is both plus and minus")
            elif plus and minus:
                out[label] = (plus, minus)
            else:
                self.add("bad-value", where, "plus and minus each need at least one code")
        return out

    def nets(self, table: dict, key: str, variable: Variable) -> dict[str, tuple[Code, ...]]:
        raw = self.typed(table, key, "nets", dict)
        if raw is None:
            return {}
        nets = {}
        for label, codes in raw.items():
            nets[label] = self.code_list(codes, f"{key}.nets.{label}", variable, variable.valid_codes)
            if isinstance(codes, list) and not codes:
                self.add("bad-value", f"{key}.nets.{label}", "a net needs at least one code")
        return nets

    # -- design --------------------------------------------------------------------------------
    def design(self, raw: object, variables: dict[str, Variable]) -> Design:
        if not isinstance(raw, dict):
            self.add("wrong-type", "design", "must be a table ([design])")
            return Design()
        self.keys(raw, "design", _DESIGN_KEYS)
        kind = self.choice(raw, "design", "kind", ("probability", "nonprobability"), "probability")
        strata = self.typed(raw, "design", "strata", str)
        psu = self.typed(raw, "design", "psu", str)
        psu_ids = self.choice(raw, "design", "psu_ids", ("within-stratum", "unique"), "within-stratum")
        base_weight = self.typed(raw, "design", "base_weight", str)
        probability = self.typed(raw, "design", "selection_probability", str)
        single_psu = self.choice(raw, "design", "single_psu", ("error", "certainty", "grand-mean", "collapse"), "error")
        if base_weight is not None and probability is not None:
            self.add(
                "conflicting-keys",
                "design.base_weight",
                "give at most one of base_weight and selection_probability (base weight = 1 / probability)",
            )
        if kind == "nonprobability" and probability is not None:
            self.add(
                "conflicting-keys",
                "design.selection_probability",
                "a nonprobability sample has no selection probabilities; drop it or give a supplied base_weight",
            )
        if strata is not None and strata == psu:
            self.add("conflicting-keys", "design.psu", f"the PSU column cannot also be the strata column '{strata}'")
        if "psu_ids" in raw and psu is None:
            self.add("conflicting-keys", "design.psu_ids", "psu_ids only applies when design.psu names a column")
        strata_var = variables.get(strata) if strata else None
        population = self.stratum_numbers(raw, "population", strata, strata_var, upper=None)
        fraction = self.stratum_numbers(raw, "sampling_fraction", strata, strata_var, upper=1.0)
        if "population" in raw and "sampling_fraction" in raw:
            self.add("conflicting-keys", "design.sampling_fraction", "give population or sampling_fraction, not both")
        if kind == "nonprobability" and (population or fraction):
            self.add(
                "conflicting-keys",
                "design.population" if population else "design.sampling_fraction",
                "a finite population correction needs a probability sample (kind = \"probability\")",
            )
        collapse = self.collapse(raw, strata, strata_var, single_psu)
        second = self.typed(raw, "design", "second_stage_fraction", float)
        if second is not None and not 0 <= second <= 1:
            self.add("bad-value", "design.second_stage_fraction", f"must lie between 0 and 1, not {second}", value=second)
            second = None
        first_stage = self.choice(raw, "design", "first_stage", ("equal", "pps"), "equal")
        inclusion = self.typed(raw, "design", "psu_inclusion_probability", str)
        if first_stage == "pps" and (population or fraction):
            self.add("conflicting-keys", "design.population" if population else "design.sampling_fraction",
                     "a size-proportional first stage (first_stage = \"pps\") takes no equal-probability correction "
                     "1 - n_h/N_h: drop it (with-replacement variance) or give psu_inclusion_probability")
        if inclusion is not None and (first_stage != "pps" or psu is None):
            self.add("conflicting-keys", "design.psu_inclusion_probability",
                     "psu_inclusion_probability applies to first_stage = \"pps\" with design.psu")
        if second is not None and (psu is None or not (population or fraction or inclusion)):
            self.add("conflicting-keys", "design.second_stage_fraction",
                     "second_stage_fraction only applies with design.psu and a finite population correction "
                     "(population, sampling_fraction or psu_inclusion_probability)")
        ratio = self.typed(raw, "design", "extreme_weight_ratio", float)
        if ratio is not None and not ratio > 1:
            self.add("bad-value", "design.extreme_weight_ratio", f"must be above 1, not {ratio}", value=ratio)
            ratio = None
        same_psus = self.typed(raw, "design", "same_psus_across_waves", bool)
        return Design(
            kind=kind,  # type: ignore[arg-type]
            strata=strata,
            psu=psu,
            psu_ids=psu_ids,  # type: ignore[arg-type]
            base_weight=base_weight,
            selection_probability=probability,
            population=population,
            sampling_fraction=fraction,
            single_psu=single_psu,  # type: ignore[arg-type]
            collapse_with=collapse,
            second_stage_fraction=float(second) if second is not None else 0.0,
            first_stage=first_stage,  # type: ignore[arg-type]
            psu_inclusion_probability=inclusion,
            extreme_weight_ratio=float(ratio) if ratio is not None else 1000.0,
            same_psus_across_waves=bool(same_psus),
        )

    def stratum_codes(self, keys: list[str], key: str, strata_var: Variable | None) -> list[Code]:
        """Stratum codes from TOML keys, typed like the strata variable's codes when it is declared."""
        if strata_var is None or not strata_var.values:
            return _codes_from_keys(keys)
        codes: list[Code] = []
        for k in keys:
            code = self.code(k, key, strata_var)
            if code is not None and code not in strata_var.values:
                self.add("undeclared-code", f"{key}.{k}", f"'{k}' is not a code of the strata variable '{strata_var.name}'")
            codes.append(code if code is not None else k)
        return codes

    def stratum_numbers(
        self, raw: dict, name: str, strata: str | None, strata_var: Variable | None, *, upper: float | None
    ) -> dict[Code, float]:
        key = f"design.{name}"
        table = self.typed(raw, "design", name, dict)
        if table is None:
            return {}
        if strata is None and len(table) != 1:
            self.add(
                "bad-value",
                key,
                "without design.strata give exactly one entry (any key, e.g. { all = 5000 }) for the whole population",
            )
        codes = self.stratum_codes(list(table), key, strata_var)
        out: dict[Code, float] = {}
        for code, (k, value) in zip(codes, table.items(), strict=True):
            if not _is_number(value):
                self.add("wrong-type", f"{key}.{k}", f"must be a number, not {value!r}", value=value)
                continue
            if value <= 0 or (upper is not None and value > upper):
                limit = "in (0, 1]" if upper is not None else "positive"
                self.add("bad-value", f"{key}.{k}", f"must be {limit}; got {value}", value=value)
                continue
            out[code] = float(value)
        return out

    def collapse(
        self, raw: dict, strata: str | None, strata_var: Variable | None, single_psu: str
    ) -> dict[Code, Code]:
        table = self.typed(raw, "design", "collapse_with", dict)
        if table is None:
            return {}
        if single_psu != "collapse":
            self.add("conflicting-keys", "design.collapse_with", "collapse_with needs single_psu = \"collapse\"")
        if strata is None:
            self.add("conflicting-keys", "design.collapse_with", "collapse_with needs design.strata")
        bad = [k for k, v in table.items() if not isinstance(v, (str, int)) or isinstance(v, bool)]
        for k in bad:
            self.add("wrong-type", f"design.collapse_with.{k}", f"must be a stratum code, not {table[k]!r}")
        keys = [k for k in table if k not in bad]
        sources = self.stratum_codes(keys, "design.collapse_with", strata_var)
        targets = self.stratum_codes([str(table[k]) for k in keys], "design.collapse_with", strata_var)
        return dict(zip(sources, targets, strict=True))

    # -- column names --------------------------------------------------------------------------
    def columns(self, respondent_id: object, design: Design, variables: dict[str, Variable]) -> None:
        owner: dict[str, str] = {}
        for variable in variables.values():
            for column in variable.columns:
                if column in owner:
                    self.add(
                        "duplicate-column",
                        f"variables.{variable.name}",
                        f"column '{column}' is already used by variables.{owner[column]}",
                    )
                owner[column] = variable.name
        if isinstance(respondent_id, str):
            if respondent_id in owner:
                self.add(
                    "duplicate-column",
                    f"variables.{owner[respondent_id]}",
                    f"column '{respondent_id}' is the respondent id; it cannot be a codebook variable",
                )
            if respondent_id in design.columns:
                self.add("duplicate-column", "design", f"the respondent id '{respondent_id}' cannot be a design column")
        for column, where in [*((c, f"variables.{owner[c]}") for c in owner), *(
            (getattr(design, k), f"design.{k}") for k in ("strata", "psu", "base_weight", "selection_probability")
        )]:
            if column in _RESERVED_COLUMNS:
                self.add(
                    "reserved-name",
                    where,
                    f"'{column}' is a column name wavebook uses itself in the study database; rename the column",
                )
        for name in ("base_weight", "selection_probability"):
            column = getattr(design, name)
            if column in owner and variables[owner[column]].type != "numeric":
                self.add(
                    "duplicate-column",
                    f"design.{name}",
                    f"'{column}' is declared as a {variables[owner[column]].type} variable; a weight must be numeric",
                )
        for name in ("strata", "psu"):
            column = getattr(design, name)
            if column in owner and variables[owner[column]].type == "multi":
                self.add("duplicate-column", f"design.{name}", f"'{column}' is an item of a multi-response set")


def _condition_columns(variables: dict[str, Variable]) -> dict[str, ColumnInfo]:
    """What a condition may read: coded variables with their codes, numeric variables, 0/1 items."""
    columns: dict[str, ColumnInfo] = {}
    for name, variable in variables.items():
        if variable.type == "multi":
            columns.update({item: ColumnInfo("int", frozenset({0, 1})) for item in variable.items})
        elif variable.type == "numeric":
            columns[name] = ColumnInfo("number")
        else:
            columns[name] = ColumnInfo("int" if variable.int_coded else "text", frozenset(variable.valid_codes))
    return {c: info for c, info in columns.items() if NAME_PATTERN.match(c)}


def _ranges(codes: tuple[Code, ...]) -> list[str]:
    """Codes for messages, runs of consecutive integers shown as 'a..b'."""
    out: list[str] = []
    run: list[int] = []
    for code in [*codes, None]:
        if isinstance(code, int) and run and code == run[-1] + 1:
            run.append(code)
            continue
        if run:
            out.append(f"{run[0]}..{run[-1]}" if len(run) > 2 else ", ".join(map(str, run)))
        run = [code] if isinstance(code, int) else []
        if isinstance(code, str):
            out.append(code)
    return out
