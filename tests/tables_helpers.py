"""Shared set-up for the banner-table tests: a Study built in code, its layout rows, one wave tabulated."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl

from pipeline.estimation.options import VarianceOptions
from pipeline.staging.spec import Design, Study, Variable
from pipeline.tables import Tabulation
from pipeline.tables.spec import BannerSpec, TablesSpec
from pipeline.tables.topline import CELL_SCHEMA
from pipeline.weighting import fit_recipe


def layout_rows(study: Study, wave: str = "W1", frame: pl.DataFrame | None = None) -> pl.DataFrame:
    """The topline layout rows (row_order, row_kind, code, row_label) of every variable, as `pipeline.tables.topline`
    orders them; with `frame`, each row's base (respondents answering; all of them for the missing row)."""
    records = []
    for name, v in study.variables.items():
        columns = list(v.items) if v.type == "multi" else [name]
        answered = None if frame is None else int(frame.select(pl.any_horizontal(pl.col(columns).is_not_null()).sum()).item())
        rows: list[tuple[str, str, str | None]] = [("base", "Base: answered", None)]
        if v.type == "multi":
            rows += [("item", label, col) for col, label in v.items.items()]
            rows += [("net", "Any of these", None), ("missing", "Not asked", None)]
        else:
            if v.type in ("single", "rating"):
                rows += [("category", v.values.get(c, str(c)), str(c)) for c in v.valid_codes]
                rows += [("net", label, None) for label in v.nets]
            if v.type in ("numeric", "rating"):
                rows += [("statistic", s, s) for s in ("n", "mean", "median", "min", "max")]
            rows.append(("missing", "No answer", None))
        for order, (kind, label, code) in enumerate(rows):
            base = None if frame is None else frame.height if kind == "missing" else answered
            records.append((wave, name, kind, order, label, code, None, base, None, None, None))
    return pl.DataFrame(records, schema=CELL_SCHEMA, orient="row")


def make_study(variables: dict[str, Variable], *, strata: str | None = "h", psu: str | None = "psu",
               waves: tuple = ()) -> Study:
    return Study(path=Path("/nonexistent/tables_test.toml"), title="t", respondent_id="id", waves=waves,
                 design=Design(strata=strata, psu=psu), variables=variables)


def tabulate(frame: pl.DataFrame, study: Study, breaks: tuple[str, ...], *, options: VarianceOptions | None = None,
             weight: str = "w", low_base: int = 0, suppress_below: int = 0, adjust: str = "none",
             levels: tuple[float, ...] = (0.05,), wave: str = "W1", tabulation: Tabulation | None = None,
             earlier: dict[str, pl.DataFrame] | None = None) -> Tabulation:
    """Tabulate one wave of `frame` (columns respondent_id, the weight, design and variables) with no weighting steps;
    `earlier`: the rows of the earlier waves a shared-PSU design stacks it with."""
    spec = TablesSpec(levels=levels, low_base=low_base, suppress_below=suppress_below, adjust=adjust,
                      banners={"default": BannerSpec("default", breaks)})
    tab = tabulation or Tabulation(study, spec, options or VarianceOptions())
    recipe = fit_recipe(frame, [], base_weights=frame[weight].to_numpy().astype(float))
    tab.add_wave(wave, frame, recipe, layout_rows(study, wave, frame), earlier=earlier)
    return tab


def cluster_sample(rng: np.random.Generator, *, strata: int, psus: int, per_psu: int, categories: int,
                   groups: int) -> pl.DataFrame:
    """A stratified cluster sample: y (1..categories) and g (1..groups) depend on the PSU, weights vary."""
    rows = []
    for h in range(strata):
        for j in range(psus):
            shift = rng.normal()
            for i in range(per_psu):
                y = 1 + int(np.clip(np.floor(rng.normal(categories / 2 + shift, 1.2)), 0, categories - 1))
                g = 1 + int(rng.integers(0, groups))
                rows.append({"respondent_id": f"{h}-{j}-{i}", "h": str(h), "psu": str(j), "w": float(rng.uniform(1, 5)),
                             "y": y, "g": g, "x": float(rng.gamma(2.0, 10.0) + 3 * shift + (y == 1))})
    return pl.DataFrame(rows)
