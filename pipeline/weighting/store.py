"""Weigh a staged wave of a study and store its weights and diagnostics in the study database.

Tables (sql/weighting_schema_*.sql): `weights(wave, respondent_id, weight)` and the diagnostics
`weighting_steps`, `weighting_margins`, `weighting_largest`, `weighting_response`,
`weighting_notes`. A wave's rows in all of them are replaced in ONE transaction.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import polars as pl

from pipeline.errors import SpecError, WavebookError
from pipeline.outputs import write_output, write_text_output
from pipeline.sqlfiles import sql
from pipeline.weighting.base import design_base_weights
from pipeline.weighting.diagnostics import StepReport, WeightingReport, WeightSummary
from pipeline.weighting.recipe import FittedRecipe, fit_recipe, largest
from pipeline.weighting.steps import parse_steps, steps_for_wave

if TYPE_CHECKING:
    import duckdb

    from pipeline.staging.spec import Study

TABLES = ("weights", "weighting_steps", "weighting_margins", "weighting_largest", "weighting_response", "weighting_notes")
ID = "respondent_id"


def build_report(recipe: FittedRecipe, *, wave: str, n_input: int) -> WeightingReport:
    """The WeightingReport of a fitted recipe (summaries, per-step reports, 10 largest weights)."""
    return WeightingReport(
        wave=wave, n_input=n_input, n_weighted=int(recipe.weights.size), dropped=dict(recipe.dropped),
        base=recipe.base_summary, final=WeightSummary.of(recipe.weights), steps=tuple(recipe.reports),
        largest=largest(recipe), warnings=tuple(recipe.warnings),
    )


def weighting_columns(study: Study) -> list[str]:
    """The `responses` columns the weighting reads: the design's, then those of every variable a
    step names (margins, post-strata, nonresponse status and classes, calibration numerics)."""
    names: list[str] = []
    for step in parse_steps(study.weighting, study.step_context()):
        for field in ("status", "classes", "cells", "margins", "numeric"):
            value = getattr(step, field, ())
            if isinstance(value, str):
                names.append(value)
            elif isinstance(value, dict):
                names += list(value)
            else:
                names += [n for v in value for n in ((v,) if isinstance(v, str) else v)]
    columns = [c for c in study.design.columns if c != study.respondent_id]
    columns += [c for n in names if n in study.variables for c in study.variables[n].columns]
    return list(dict.fromkeys(columns))


def fit_wave(
    study: Study, wave_id: str, *, con: duckdb.DuckDBPyConnection, data: pl.DataFrame | None = None
) -> tuple[FittedRecipe, WeightingReport]:
    """Fit the study's weighting on one staged wave (nothing written); the recipe and its report.

    data: the wave's staged rows with at least `weighting_columns(study)` (read here when None)."""
    from pipeline.staging.database import load_responses

    context = study.step_context()
    steps = steps_for_wave(parse_steps(study.weighting, context), wave_id, source=str(study.path))
    if data is None:
        data = load_responses(con, study, [wave_id], columns=weighting_columns(study))
    base, _ = design_base_weights(data, study, id_column=ID)
    recipe = fit_recipe(data, steps, base_weights=base, id_column=ID, code_order=context.code_order(set(study.variables)))
    return recipe, build_report(recipe, wave=wave_id, n_input=data.height)


def _summary_row(wave: str, position: int, stage: str, s: WeightSummary, step: StepReport | None = None) -> dict:
    return {
        "wave": wave, "position": position, "stage": stage, "n": s.n, "total": s.total, "minimum": s.minimum,
        "maximum": s.maximum, "mean": s.mean, "cv": s.cv, "deff": s.deff, "n_eff": s.n_eff,
        "efficiency_pct": s.efficiency_pct, "iterations": step.iterations if step else None,
        "converged": step.converged if step else None, "trimmed": step.trimmed if step else None,
    }


def _frames(recipe: FittedRecipe, report: WeightingReport) -> dict[str, pl.DataFrame]:
    wave = report.wave
    steps = [_summary_row(wave, 0, "base", report.base)]
    steps += [_summary_row(wave, i + 1, s.kind, s.summary, s) for i, s in enumerate(report.steps)]
    steps.append(_summary_row(wave, len(report.steps) + 1, "final", report.final))
    margins = [
        {"wave": wave, "position": i + 1, **m.__dict__} for i, s in enumerate(report.steps) for m in s.margins
    ]
    response = [{"wave": wave, **r.__dict__} for s in report.steps for r in s.response]
    notes = [{"wave": wave, "position": i + 1, "severity": "note", "message": n}
             for i, s in enumerate(report.steps) for n in s.collapsed]
    notes += [{"wave": wave, "position": None, "severity": p.severity, "message": p.render()} for p in report.warnings]
    notes += [{"wave": wave, "position": None, "severity": "note", "message": f"{n} {reason} not weighted"}
              for reason, n in report.dropped.items() if n]
    largest_rows = [
        {"wave": wave, "rank": w.rank, "weight": w.weight, "ratio_to_mean": w.ratio_to_mean,
         "profile": ", ".join(f"{k}={v}" for k, v in w.profile.items())}
        for w in report.largest
    ]
    weights = pl.DataFrame({"wave": pl.Series([wave] * recipe.weights.size, dtype=pl.String),
                            "respondent_id": recipe.ids.cast(pl.String), "weight": recipe.weights})
    return {
        "weights": weights,
        "weighting_steps": pl.DataFrame(steps, infer_schema_length=None),
        "weighting_margins": pl.DataFrame(margins, infer_schema_length=None),
        "weighting_largest": pl.DataFrame(largest_rows, infer_schema_length=None),
        "weighting_response": pl.DataFrame(response, infer_schema_length=None),
        "weighting_notes": pl.DataFrame(notes, schema={"wave": pl.String, "position": pl.Int64, "severity": pl.String,
                                                       "message": pl.String}),
    }


def create_weighting_tables(con: duckdb.DuckDBPyConnection) -> None:
    """Create `weights` and the `weighting_*` tables when absent.

    A `weights` table made by an earlier version with a primary key is rebuilt without it, once,
    keeping its rows (`sql/weighting_schema_weights.sql` says why there is no index)."""
    for name in ("weights", "steps", "margins", "largest", "response", "notes"):
        con.execute(sql(f"weighting_schema_{name}.sql"))
    if con.execute(sql("weighting_weights_indexed.sql")).fetchone()[0]:
        con.begin()
        try:
            for step in ("copy", "drop", "rename"):
                con.execute(sql(f"weighting_rebuild_{step}.sql"))
            con.commit()
        except BaseException:
            con.rollback()
            raise


def store(con: duckdb.DuckDBPyConnection, recipe: FittedRecipe, report: WeightingReport) -> None:
    """Replace the wave's rows of every weighting table in one transaction (rolled back on any error)."""
    frames = _frames(recipe, report)
    create_weighting_tables(con)
    con.begin()
    try:
        for table in TABLES:
            con.execute(sql("weighting_delete_wave.sql", table=table), {"wave": report.wave})
            frame = frames[table]
            if frame.height:
                view = f"__wavebook_{table}"
                con.register(view, frame)
                try:
                    con.execute(sql("weighting_insert_frame.sql", table=table, frame=view))
                finally:
                    con.unregister(view)
        con.commit()
    except BaseException:
        con.rollback()
        raise


def weigh_wave(study: Study, wave_id: str, *, con: duckdb.DuckDBPyConnection) -> WeightingReport:
    """Fit the study's `[[weighting]]` steps on a staged wave and store its weights and diagnostics.

    Base weights come from the design (pipeline.weighting.base); with no steps the final weights are
    the base weights (still stored, with diagnostics). The wave's rows are replaced atomically.
    """
    recipe, report = fit_wave(study, wave_id, con=con)
    store(con, recipe, report)
    return report


def export_weights(con: duckdb.DuckDBPyConnection, wave_ids: list[str], path: Path) -> int:
    """Write `respondent_id, wave, weight` of the waves to CSV or Parquet (by extension), atomically; returns rows."""
    frame = con.sql(sql("weighting_export.sql"), params={"waves": wave_ids}).pl()
    write_frame(frame, path)
    return frame.height


def export_replicates(study: Study, wave_id: str, *, con: duckdb.DuckDBPyConnection, path: Path) -> int:
    """Write respondent_id, wave, weight and replicate_1..replicate_R of one wave to `path`, and the
    variance recipe to `<path>.replicates.json` (`pipeline.estimation.replicate_export`); returns R."""
    import json

    from pipeline.estimation.replicate_export import replicate_weights
    from pipeline.estimation.design import SampleDesign
    from pipeline.estimation.options import parse_variance
    from pipeline.staging.database import load_responses

    options, problems = parse_variance(study.variance)
    if problems:
        raise SpecError(f"{study.path}: the [variance] table has {len(problems)} problem(s)", problems)
    recipe, _ = fit_wave(study, wave_id, con=con)
    d = study.design
    design = SampleDesign(weight="__unused", strata=d.strata, psu=d.psu, psu_ids=d.psu_ids,
                          population_size=_stratum_values(d.population), sampling_fraction=_stratum_values(d.sampling_fraction),
                          single_psu=d.single_psu, collapse_with={str(k): str(v) for k, v in d.collapse_with.items()},
                          second_stage_fraction=d.second_stage_fraction, first_stage=d.first_stage)
    responses = load_responses(con, study, [wave_id])
    export = replicate_weights(responses, design, recipe, method=options.method, fay=options.fay,
                               replicates=options.replicates, seed=options.seed, fpc_values=design.fpc_values(responses))
    frame = pl.DataFrame({"respondent_id": export.ids, "wave": [wave_id] * len(export.ids),
                          "weight": recipe.weights}).with_columns(
        pl.Series(f"replicate_{r + 1}", export.weights[:, r]) for r in range(export.weights.shape[1]))
    write_frame(frame, path)
    write_text_output(replicate_sidecar(path), json.dumps({"wave": wave_id, **export.metadata()}, indent=1))
    return int(export.weights.shape[1])


def replicate_sidecar(path: Path) -> Path:
    """`<path>.replicates.json`: the variance recipe beside an export of replicate weights (checked
    with `pipeline.outputs.check_output` like the export itself)."""
    return path.with_name(f"{path.name}.replicates.json")


def _stratum_values(values: dict) -> dict[str, float] | None:
    return {str(k): float(v) for k, v in values.items()} if values else None


def write_frame(frame: pl.DataFrame, path: Path) -> None:
    """Write a frame to `path` (.csv or .parquet) through `pipeline.outputs.write_output` (a
    temporary file renamed into place, recorded as wavebook's own output). The caller checks
    `path` first with `pipeline.outputs.check_output`."""
    suffix = path.suffix.lower()
    if suffix not in (".csv", ".parquet"):
        raise WavebookError(f"cannot write {path}: the file name must end in .csv or .parquet")
    write_output(path, frame.write_csv if suffix == ".csv" else frame.write_parquet)


def weights_array(frame: pl.DataFrame, column: str) -> np.ndarray:
    """A weight column as float64 (missing as NaN, so base-weight checks report it)."""
    return frame[column].cast(pl.Float64, strict=False).fill_null(float("nan")).to_numpy().astype(float)
