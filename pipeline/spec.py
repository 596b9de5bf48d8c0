"""The study spec: one TOML file that declares a study, its waves, its sample design and its codebook.

`load_spec(path)` reads and validates the file and returns a `Study`. Validation collects every
problem (unknown keys, wrong types, references to undeclared variables) into one `SpecError`,
each problem naming the key (e.g. `variables.satisfaction.exclude_from_mean`).

This module defines the objects every later stage reads; sections owned by later stages
(`[[weighting]]`, `[variance]`) are parsed by those stages' own modules and kept here as raw
tables until they are (see DEVELOPERS.md).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

Code = int | str
VariableType = Literal["single", "multi", "numeric", "scale"]


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
    psu_ids: "nested" (PSU ids restart within each stratum) or "unique" (unique across strata).
    base_weight / selection_probability: at most one column name; base weight = 1 / probability.
    population: first-stage population size per stratum code (PSUs in the stratum; respondents
    in a single-stage design), for the finite population correction.
    sampling_fraction: alternatively, the first-stage sampling fraction per stratum code.
    single_psu: policy for strata with one PSU: "error", "certainty", "centre" or "collapse".
    collapse_with: for "collapse", stratum code -> partner stratum code.
    """

    kind: Literal["probability", "nonprobability"] = "probability"
    strata: str | None = None
    psu: str | None = None
    psu_ids: Literal["nested", "unique"] = "nested"
    base_weight: str | None = None
    selection_probability: str | None = None
    population: dict[Code, float] = field(default_factory=dict)
    sampling_fraction: dict[Code, float] = field(default_factory=dict)
    single_psu: Literal["error", "certainty", "centre", "collapse"] = "error"
    collapse_with: dict[Code, Code] = field(default_factory=dict)

    @property
    def columns(self) -> tuple[str, ...]:
        """The data columns the design reads."""
        return tuple(
            c for c in (self.strata, self.psu, self.base_weight, self.selection_probability) if c is not None
        )


@dataclass(frozen=True)
class Variable:
    """One codebook entry.

    type "single": one code per respondent, labelled by `values`.
    type "multi": a multiple-response set; `items` maps each item column to its label, an item
    column holds 1 (selected) or 0 (not selected); missing means not asked.
    type "numeric": a number; optional `minimum` / `maximum` bounds are checked at staging.
    type "scale": a rating scale; `values` labels the codes, `exclude_from_mean` lists codes such
    as "don't know" that are shown in distributions but excluded from means.
    nets: label -> list of codes (e.g. "Top two box" -> [9, 10]), for "single" and "scale".
    """

    name: str
    type: VariableType
    label: str
    values: dict[Code, str] = field(default_factory=dict)
    items: dict[str, str] = field(default_factory=dict)
    nets: dict[str, tuple[Code, ...]] = field(default_factory=dict)
    exclude_from_mean: tuple[Code, ...] = ()
    minimum: float | None = None
    maximum: float | None = None

    @property
    def columns(self) -> tuple[str, ...]:
        """The data columns this variable reads (the items of a multi set, else its own name)."""
        return tuple(self.items) if self.type == "multi" else (self.name,)


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

    @property
    def database_path(self) -> Path:
        """The study database file."""
        return self.database if self.database is not None else self.path.with_suffix(".duckdb")

    def wave(self, wave_id: str) -> Wave:
        """The wave with id `wave_id` (KeyError naming the known ids otherwise)."""
        for w in self.waves:
            if w.id == wave_id:
                return w
        raise KeyError(f"no wave '{wave_id}' in the spec; declared waves: {', '.join(w.id for w in self.waves)}")
