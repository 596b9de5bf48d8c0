"""The whole run of a study: stage what changed, compute the cells, render the book.

`run_study` is the library entry behind `wavebook run` (and `wavebook demo`). Its steps, in
order, are small functions so later stages slot in between staging and rendering:

  1. `load_spec`                        the validated Study
  2. `waves_to_stage` + `stage_wave`     each wave whose raw file changed (SHA-256) or all with restage
  3. `unweighted_toplines`               the tidy long cell frame (counts and bases)
  4. `fit_wave` + `store`                each staged wave weighted; weights and diagnostics stored
  5. `pipeline.tables.Tabulation`       per wave and batch of variables, from one read of the
                                         batch's columns: weighted estimates, standard errors,
                                         intervals and design effects joined onto the same cells;
                                         with `[tables]` the banner cells and tests; across waves
                                         the Total's (and each banner cell's) change
  6. `export_cells` + `write_cells`      the one cells export, `<spec stem>_cells.parquet` / `.csv`
                                         beside the book (`pipeline.tables.cells_export`); with
                                         `[tables]` also `<stem>_tests` (and the workbook)
  7. `save_results`                      the cells, the export, the tests and the book's other
                                         inputs stored (`wavebook book` re-renders from them)
  8. `render_book`                       the HTML book and its manifest.json, written atomically
"""

from __future__ import annotations

import datetime as dt
import sys
import time
from pathlib import Path

import duckdb
import numpy as np
import polars as pl

from pipeline import progress
from pipeline.book import render_book, variance_lines, weighting_section
from pipeline.book.weighting import SUPPLIED_WEIGHT_TOLERANCE, SuppliedWave
from pipeline.book.manifest import run_manifest
from pipeline.book.store import load_results, save_results
from pipeline.errors import DataError, Problem, SpecError
from pipeline.estimation.options import VarianceOptions, parse_variance
from pipeline.memory import DEFAULT_BUDGET, variable_batches
from pipeline.outputs import check_output, file_sha256, study_inputs
from pipeline.staging.database import column_types, load_responses, open_database, staged_waves
from pipeline.staging.replicate_columns import staged_columns
from pipeline.staging.spec import Study, load_spec
from pipeline.staging.stage import stage_wave
from pipeline.staging.wave_columns import wave_signature
from pipeline.tables import (
    ESTIMATE_SCHEMA,
    BannerTables,
    RememberedReplay,
    Tabulation,
    cells_export_paths,
    export_cells,
    export_paths,
    tables_spec,
    unweighted_toplines,
    write_cells,
    write_exports,
    write_workbook,
)
from pipeline.weighting import FittedRecipe, WeightingReport
from pipeline.weighting.base import design_base_weights
from pipeline.weighting.store import fit_wave, store, weighting_columns


def default_book_path(study: Study) -> Path:
    """`<spec folder>/book/<spec stem>.html`."""
    return study.path.parent / "book" / f"{study.path.stem}.html"


def book_path(study: Study, out: str | Path | None, *, force: bool = False) -> Path:
    """Where the book goes: `out` (an existing folder gets `<folder>/<spec stem>.html`) or
    `default_book_path`; checked by `pipeline.outputs.check_output` against every input of the
    study before any work is done (WavebookError output-is-input / output-exists / output-not-a-file)."""
    if out is None:
        path = default_book_path(study)
    else:
        path = Path(out)
        if path.is_dir():
            path = path / f"{study.path.stem}.html"
    return check_output(path, study_inputs(study), force=force, option="--out")


def waves_to_stage(study: Study, *, restage: bool = False) -> list[str]:
    """Ids of the waves to (re)stage, in spec order (see `stage_reasons`)."""
    return list(stage_reasons(study, restage=restage))


def stage_reasons(study: Study, *, restage: bool = False) -> dict[str, str]:
    """The waves to (re)stage, in spec order, each with why.

    A wave is staged when `restage` is set, when it is not in the database's `waves` table yet,
    when the SHA-256 of its raw file differs from the one recorded at its last staging, or when
    the spec no longer says what its staged rows hold (its column set, file names, types, codes
    or recodes changed: `pipeline.staging.wave_columns.wave_signature`).
    Raises DataError listing every wave whose raw file is missing.
    """
    missing = [
        Problem("wave-file-missing", f"the raw file of wave '{w.id}' does not exist", file=str(w.file), value=w.id)
        for w in study.waves
        if not w.file.is_file()
    ]
    if missing:
        raise DataError(f"cannot run {study.path}: wave files are missing", missing)
    if restage:
        return {w.id: "restage requested" for w in study.waves}
    if not study.database_path.is_file():
        return {w.id: "not staged yet" for w in study.waves}
    con = open_database(study, read_only=True)
    try:
        recorded = {wave: (sha, signature) for wave, sha, signature in
                    staged_waves(con).select("wave", "sha256", "spec_signature").iter_rows()}
    finally:
        con.close()
    types = column_types(study)
    reasons: dict[str, str] = {}
    for w in study.waves:
        if w.id not in recorded:
            reasons[w.id] = "not staged yet"
        elif recorded[w.id][0] != file_sha256(w.file):
            reasons[w.id] = f"its file {w.file.name} changed"
        elif recorded[w.id][1] != wave_signature(study, w.id, types):
            reasons[w.id] = "the spec changed what it holds (columns, names, codes or recodes)"
    return reasons


def variance_options(study: Study) -> VarianceOptions:
    """The study's `[variance]` options, validated (SpecError naming every bad key)."""
    options, problems = parse_variance(study.variance)
    if problems:
        raise SpecError(f"{study.path}: the [variance] table has {len(problems)} problem(s)", problems)
    return options


def weigh_and_estimate(
    study: Study,
    cells: pl.DataFrame,
    options: VarianceOptions,
    *,
    quiet: bool = False,
    timings: dict[str, float] | None = None,
    memory_budget: int = DEFAULT_BUDGET,
    tabulation: Tabulation | None = None,
    supplied: dict[str, SuppliedWave] | None = None,
) -> tuple[pl.DataFrame, dict[str, WeightingReport], dict[str, dict[str, int]], BannerTables]:
    """Weight every staged wave (weights and diagnostics stored), then estimate every cell.

    Returns the cells with the estimate columns of `pipeline.tables.weighted_cells` joined on
    (wave, variable, row_order), the weighting report of each wave, for replicate methods each
    wave's replicate re-weighting counts (`FittedRecipe.replicate_adjustments`), and the tables
    (`Tabulation.finish`: the Total's changes, and with `[tables]` the banner cells and tests).
    Weighting warnings go to stderr. Each wave's rows are read from the database once: the
    weighting columns and the banner's break columns first (kept for the whole wave), then the
    answer columns in the batches of variables that fit `memory_budget` bytes
    (`pipeline.memory.variable_batches`, the banner fit's matrices counted: `Tabulation.batch_bytes`);
    each batch is given to `tabulation` (default: a new
    `Tabulation` of the study's `[tables]`), which estimates its toplines in one grouped pass and
    its banner cells in another. With `design.same_psus_across_waves` each batch's columns of the
    earlier wave it is stacked with are read again beside it (and the batches are sized for the
    three frames: the two waves and the stacked one).
    timings: when given, receives the seconds spent weighting ("weigh") and estimating
    ("estimates", banner tables included), summed over the waves (`bench/bench_study_run.py` reads them).
    supplied: when given and the replicate weights are supplied (`[variance] method = "supplied"`),
    receives each wave's number of replicates and how far the study's weighting moved the data's
    own weight (`supplied_weight_change`); a warning goes to stderr when that is beyond
    SUPPLIED_WEIGHT_TOLERANCE, since the replicates do not carry the study's weighting.
    """
    clock = timings if timings is not None else {}
    clock.setdefault("weigh", 0.0)
    clock.setdefault("estimates", 0.0)
    tabulation = tabulation if tabulation is not None else Tabulation(study, tables_spec(study), options)
    wave_ids = [w.id for w in study.waves if w.id in set(cells["wave"].to_list())]
    reports: dict[str, WeightingReport] = {}
    adjustments: dict[str, dict[str, int]] = {}
    estimates = [pl.DataFrame(schema=ESTIMATE_SCHEMA)]
    replicate_columns = staged_columns(study) if options.supplied else []
    kept_columns = list(dict.fromkeys(weighting_columns(study) + replicate_columns + tabulation.held_columns()))
    con = open_database(study)
    try:
        for wave_id in wave_ids:
            start = time.perf_counter()
            with progress.step(f"weighting wave {wave_id}", quiet=quiet):
                held = load_responses(con, study, [wave_id], columns=kept_columns)
                recipe, report = fit_wave(study, wave_id, con=con, data=held)
                store(con, recipe, report)
            clock["weigh"] += time.perf_counter() - start
            if options.supplied:
                change = supplied_weight_change(held, study, recipe)
                if supplied is not None:
                    supplied[wave_id] = SuppliedWave(replicates=len(replicate_columns), weight_change=change)
                if change > SUPPLIED_WEIGHT_TOLERANCE:
                    print(_supplied_warning(study, wave_id, change).render(), file=sys.stderr)
            for warning in report.warnings:
                print(warning.render(), file=sys.stderr)
            reports[wave_id] = report
            start = time.perf_counter()
            layout = cells.filter(pl.col("wave") == wave_id)
            frames = 3 if study.design.same_psus_across_waves else 1
            batches = variable_batches(study, held.height * frames, memory_budget, held_columns=held.width,
                                       extra=tabulation.batch_bytes(held, recipe, layout))
            replay = RememberedReplay(recipe.replay)
            for k, names in enumerate(batches):
                label = f"estimating wave {wave_id}" + (f" ({k + 1} of {len(batches)})" if len(batches) > 1 else "")
                with progress.step(label, quiet=quiet):
                    part = _with_columns(con, study, wave_id, held, names)
                    columns = list(dict.fromkeys(kept_columns + [c for n in names for c in study.variables[n].columns]))
                    earlier = {w: load_responses(con, study, [w], columns=columns) for w in tabulation.stack_with(wave_id)}
                    estimates.append(tabulation.add_wave(wave_id, part, recipe, layout, variables=names,
                                                         replay=replay, earlier=earlier))
                    del part, earlier
            del held
            clock["estimates"] += time.perf_counter() - start
            for warning in recipe.warnings[len(report.warnings):]:  # raised while replaying replicates
                print(warning.render(), file=sys.stderr)
            if options.method not in ("taylor", "supplied"):  # supplied replicates replay no recipe
                adjustments[wave_id] = recipe.replicate_adjustments()
    finally:
        con.close()
    start = time.perf_counter()
    tables = tabulation.finish()
    clock["estimates"] += time.perf_counter() - start
    joined = cells.join(pl.concat(estimates), on=["wave", "variable", "row_order"], how="left")
    return joined, reports, adjustments, tables


def supplied_weight_change(held: pl.DataFrame, study: Study, recipe: FittedRecipe) -> float:
    """max_i |w_i / b_i - 1| over the weighted respondents: how far the study's final weight w moved
    the data's own weight b (the base weight column, or 1 / the selection probability), the weight
    supplied replicate weights were made for. 0 when the spec has no weighting steps."""
    base, _ = design_base_weights(held, study)
    kept = base[recipe.kept]
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(kept > 0, recipe.weights / kept, np.where(recipe.weights > 0, np.inf, 1.0))
    return float(np.max(np.abs(ratio - 1.0))) if len(ratio) else 0.0


def _supplied_warning(study: Study, wave_id: str, change: float) -> Problem:
    weight = study.design.base_weight or f"1 / {study.design.selection_probability}"
    return Problem(
        "supplied-replicates-weighting",
        f"wave {wave_id}: the study's weighting steps change the data's own weight ({weight}) by up to "
        f"{100 * change:.3g}%; the supplied replicate weights were made for that weight and do not carry the "
        "study's weighting, so the standard errors may be too large or too small (above all for the variables "
        "the weighting controls). Drop the [[weighting]] steps to estimate with the weight the replicates were "
        "made for, or use a replicate method wavebook generates (it replays the weighting in every replicate)",
        severity="warning", file=str(study.path), column=study.design.base_weight, value=f"{100 * change:.3g}%",
    )


def _with_columns(
    con: duckdb.DuckDBPyConnection, study: Study, wave_id: str, held: pl.DataFrame, names: list[str]
) -> pl.DataFrame:
    """`held` (the wave's weighting and break columns) beside the columns of the variables `names`
    it lacks, read from the database in the same row order (checked on the respondent ids)."""
    wanted = [c for n in names for c in study.variables[n].columns if c not in held.columns]
    # (routing flags come with every read: `load_responses` adds them)
    if not wanted:
        return held
    extra = load_responses(con, study, [wave_id], columns=list(dict.fromkeys(wanted)))
    if not extra["respondent_id"].equals(held["respondent_id"]):
        raise AssertionError(f"two reads of wave {wave_id} returned its respondents in different orders")
    return held.hstack(extra.drop(c for c in extra.columns if c in held.columns))


def run_study(
    spec_path: str | Path,
    *,
    out: str | Path | None = None,
    restage: bool = False,
    quiet: bool = False,
    force: bool = False,
    memory_budget: int = DEFAULT_BUDGET,
    single_file: bool | None = None,
    xlsx: bool = False,
) -> Path:
    """Run the study spec at `spec_path` and return the path of the book written.

    Stages the waves `waves_to_stage` selects (a summary per wave unless `quiet`, and every
    staging warning, go to stderr), computes the toplines of every staged wave, weights each
    wave and estimates every cell with its standard error, interval and design effect
    (`weigh_and_estimate`, within `memory_budget` bytes of respondent-level work), writes the tidy
    cells export (`pipeline.tables.export_cells`: the Total of every variable and, with `[tables]`,
    every banner cell) beside the book, stores the book's inputs (`save_results`) and renders the
    book to `book_path(study, out, force=force)`, which is checked first (`single_file` as in
    `render_book`), with the run manifest. With `[tables]`, the tests export `<book stem>_tests`
    is written beside the book (checked first too), and with `xlsx` the workbook
    `<book stem>_tables.xlsx` (`pipeline.tables.workbook`). Raises SpecError / DataError with every problem found.
    """
    started = dt.datetime.now(dt.UTC)
    study = load_spec(spec_path)
    out_path = book_path(study, out, force=force)
    for path in cells_export_paths(out_path, study.path.stem):  # the cells export beside the book
        check_output(path, study_inputs(study), force=force, option="--out")
    options = variance_options(study)
    spec = tables_spec(study)
    if xlsx and spec is None:
        problem = Problem("no-tables", "--xlsx writes the banner tables, but the spec has no [tables] table",
                          file=str(study.path))
        raise SpecError(f"{study.path}: nothing to write to a workbook", [problem])
    exports = export_paths(out_path, xlsx=xlsx) if spec is not None else []
    for path in exports:
        check_output(path, study_inputs(study), force=force, option="--out")
    for wave_id, reason in stage_reasons(study, restage=restage).items():
        if reason.startswith("the spec changed"):
            print(f"wave {wave_id}: {reason} since it was staged; restaging it from {study.wave(wave_id).file}",
                  file=sys.stderr)
        report = stage_wave(study, wave_id, quiet=quiet)
        if not quiet:
            print(report.summary(), file=sys.stderr)
        for warning in report.warnings:
            print(warning.render(), file=sys.stderr)
    with progress.step("computing toplines", quiet=quiet):
        con = open_database(study, read_only=True)
        try:
            cells = unweighted_toplines(con, study)
        finally:
            con.close()
    supplied: dict[str, SuppliedWave] = {}
    cells, reports, adjustments, tables = weigh_and_estimate(
        study, cells, options, quiet=quiet, memory_budget=memory_budget, tabulation=Tabulation(study, spec, options),
        supplied=supplied,
    )
    calibrated = any(s.kind in ("poststratify", "rake", "calibrate") for r in reports.values() for s in r.steps)
    weighting = weighting_section(study, reports)
    variance = variance_lines(
        options, study, calibrated=calibrated, replicate_adjustments=adjustments,
        replicates={w: options.replicates or 500 for w in adjustments} if options.method == "bootstrap" else None,
        supplied=supplied,
    )
    export = export_cells(cells, tables)
    if spec is not None:
        with progress.step("writing the tests export", quiet=quiet):
            write_exports(tables, exports[:2])
            if xlsx:
                write_workbook(export, tables, study, exports[2])
        variance = (*variance, tables.chance.sentence(), *tables.notes)
    manifest = run_manifest(study, options, started=started, finished=dt.datetime.now(dt.UTC))
    tests = tables.tests if spec is not None else None
    save_results(study, cells, export=export, tests=tests, weighting=weighting, variance=variance,
                 level=options.level, manifest=manifest)
    with progress.step("writing the book", quiet=quiet):
        write_cells(export, out_path, study.path.stem)
        return render_book(
            study,
            export,
            tests=tests,
            out_path=out_path,
            weighting=weighting,
            variance=variance,
            level=options.level,
            single_file=single_file,
            manifest=manifest,
        )


def rebuild_book(
    spec_path: str | Path,
    *,
    out: str | Path | None = None,
    single_file: bool | None = None,
    quiet: bool = False,
    force: bool = False,
) -> Path:
    """Render the book again from the results the last `run_study` stored, without staging,
    weighting or estimating; the output is checked as in `run_study`. Returns the book's path."""
    study = load_spec(spec_path)
    out_path = book_path(study, out, force=force)
    stored = load_results(study)
    with progress.step("writing the book", quiet=quiet):
        return render_book(
            study,
            stored.export if stored.export is not None else export_cells(stored.cells),
            tests=stored.tests,
            out_path=out_path,
            weighting=stored.weighting,
            variance=stored.variance,
            level=stored.level,
            single_file=single_file,
            manifest=stored.manifest,
        )
