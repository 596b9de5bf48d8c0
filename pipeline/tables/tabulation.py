"""The tables of a run: `Tabulation` takes each weighted wave, batch by batch, and gives `BannerTables`.

`add_wave(wave, rows, recipe, layout, variables=...)` is given the rows of one batch of variables
of a wave (`pipeline.memory.variable_batches`: the weighting columns and the banner's break
columns held for the wave, beside the batch's answer columns) and makes, from those rows:

  - the weighted topline estimates of the batch (`weighted_cells.wave_estimates`), returned;
  - with `[tables]`, ONE grouped pass over the wave's respondents (`pipeline.tables.fit`) for every
    cell of the batch's stubs in every banner column (`cells`), the column and Total tests
    (`significance`) and the Rao-Scott tests (`rao_scott`);
  - with `design.same_psus_across_waves`, the stacked-design variances of the changes from the
    previous (and the reference) wave (`stacked`; the earlier wave's rows of the same batch are
    given in `earlier`), for the Total of every variable and every banner cell.

Every estimate, test and variance reads only its own stub's quantities, so the results do not
depend on the batching (`tests/test_memory_budget.py`). `finish()` adds, across waves, the change
of the Total of every variable and of every banner cell (`wave_change`): independent waves the sum
of the two variances, shared PSUs the stacked variance.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import polars as pl

from pipeline.errors import SpecError
from pipeline.estimation.api import FPC_REPLICATE_METHODS
from pipeline.estimation.design import SampleDesign
from pipeline.estimation.options import VarianceOptions
from pipeline.staging.replicate_columns import staged_columns
from pipeline.staging.spec import Study
from pipeline.tables.banners import Banner, build_banner
from pipeline.tables.cells import WavePlan, cell_frame, plan_wave
from pipeline.tables.cells_export import PERCENT_KINDS, TOTAL
from pipeline.tables.fit import DesignInputs, FitState, fit_wave
from pipeline.tables.rao_scott import rao_scott
from pipeline.tables.result import BannerTables, ChanceMarks
from pipeline.tables.significance import TEST_COLUMNS, column_tests, letters, mark
from pipeline.tables.stacked import WaveRows, stacked_change_variance
from pipeline.tables.spec import BannerSpec, TablesSpec, parse_tables
from pipeline.tables.wave_change import change_columns, wave_tests
from pipeline.tables.weighted_cells import ESTIMATE_SCHEMA, wave_estimates
from pipeline.weighting import FittedRecipe

_WEIGHT = "__base_weight"
_CLASS = "__class"
_FINAL = "__final_weight"


def tables_spec(study: Study) -> TablesSpec | None:
    """The study's validated tables spec (None without `[tables]`); SpecError naming every problem."""
    spec, problems = parse_tables(study)
    if problems:
        raise SpecError(f"{study.path}: the [tables] spec has {len(problems)} problem(s)", problems)
    return spec


def _by_stratum(values: dict) -> dict[str, float] | None:
    return {str(k): float(v) for k, v in values.items()} if values else None


def design_inputs(study: Study, recipe: FittedRecipe, options: VarianceOptions,
                  replay: Callable[[np.ndarray], np.ndarray] | None = None) -> DesignInputs:
    """The design and weighting of one wave as the fit needs them (`replay`: the recipe's replay to
    use, default `recipe.replay`; a `RememberedReplay` shared with the topline estimates)."""
    design = study.design
    calibration = recipe.calibration_matrix()
    return DesignInputs(
        design=SampleDesign(
            weight=_WEIGHT, strata=design.strata, psu=design.psu, psu_ids=design.psu_ids,
            population_size=_by_stratum(design.population), sampling_fraction=_by_stratum(design.sampling_fraction),
            single_psu=design.single_psu, collapse_with={str(k): str(v) for k, v in design.collapse_with.items()},
            second_stage_fraction=design.second_stage_fraction, first_stage=design.first_stage,
            psu_inclusion=design.psu_inclusion_probability,
        ),
        options=options,
        classes=_CLASS,
        reweight=recipe.replay if replay is None else replay,
        calibration_matrix=None if calibration.shape[1] == 0 else calibration,
        final_weight=_FINAL,
        replicate_columns=tuple(staged_columns(study)) if options.supplied else (),
    )


def wave_frame(responses: pl.DataFrame, recipe: FittedRecipe) -> pl.DataFrame:
    """The wave's weighted respondents with base weight, class and final weight columns."""
    weights = pl.DataFrame({
        "respondent_id": recipe.ids.cast(pl.String),
        _WEIGHT: recipe.adjusted_base,
        _CLASS: recipe.classes.astype(np.int64),
        _FINAL: recipe.weights,
    })
    return responses.join(weights, on="respondent_id", how="inner", validate="1:1")


def _independence(wave: str, wp: WavePlan, state: FitState) -> list[dict]:
    """Rao-Scott rows of one wave's tests (comparison "independence")."""
    rows = []
    n_all = state.table["n"].to_numpy()
    for (table, banner, brk), (_, _, idx) in wp.joints.items():
        flat = idx.ravel()
        p = state.theta[flat].reshape(idx.shape)
        result = rao_scott(p, state.covariance(flat, joint=True), int(n_all[flat[0]]), state.df)
        rows.append({
            "comparison": "independence", "wave": wave, "wave_b": None, "table": table, "variable": table,
            "row": None, "banner": banner, "column_a": brk, "column_b": None, "difference": None,
            "se_difference": None,
            "statistic": None if result is None else result.statistic,
            "df_num": None if result is None else result.df_num,
            "df_den": None if result is None else result.df_den,
            "p_value": None if result is None else result.p_value,
        })
    return rows


# (groups x quantities) float64 matrices the banner fit of a batch holds at its peak: the grouped
# pass's totals, counts, squared sums and their staging copies, the final totals, the scaled squared
# sums and the within-PSU term's copy. A planning figure checked with bench/bench_study_run.py --banner.
FIT_COPIES = 8
_TOTAL_ONLY = "__total"  # the stacked design's banner of the variables without a banner table: the Total alone
_TOTAL_KEYS = ["wave", "table", "row"]


def _total_rows(estimates: pl.DataFrame, layout: pl.DataFrame) -> pl.DataFrame:
    """The Total rows of one batch's topline estimates as the wave tests read them (the cells'
    columns: statistic, estimate, se, df, base_unweighted, flags; percentages on 0-100)."""
    kind, code = pl.col("row_kind"), pl.col("code")
    statistic = (pl.when(kind.is_in(PERCENT_KINDS)).then(pl.lit("percent"))
                 .when(kind == "balance").then(pl.lit("balance"))
                 .when((kind == "statistic") & code.is_in(["mean", "median"])).then(code))
    return layout.select("wave", "variable", "row_order", "row_kind", "code", "base").join(
        estimates, on=["wave", "variable", "row_order"], how="inner"
    ).select(
        "wave", pl.col("variable").alias("table"), "variable", pl.col("row_order").alias("row"),
        pl.lit(TOTAL).alias("banner"), pl.lit(TOTAL).alias("column"), statistic.alias("statistic"), "estimate", "se",
        "df", pl.col("base").alias("base_unweighted"),
        pl.when(pl.col("set_by_weighting")).then(pl.lit("set-by-weighting")).otherwise(pl.lit("")).alias("flags"),
    ).filter(pl.col("statistic").is_not_null())


_COMPARISONS = {"columns": 0, "total": 1, "independence": 2, "waves": 3}


def _in_order(tests: pl.DataFrame, study: Study) -> pl.DataFrame:
    """`tests` by wave, comparison and table (spec order), each table's tests in their own order: the
    same order whatever the batches the waves were estimated in."""
    if tests.height == 0:
        return tests
    waves = {w: i for i, w in enumerate(dict.fromkeys([*(w.id for w in study.waves), *tests["wave"]]))}
    tables = {t: i for i, t in enumerate(dict.fromkeys([*study.variables, *tests["table"]]))}
    return tests.sort(pl.col("wave").replace_strict(waves, return_dtype=pl.Int64),
                      pl.col("comparison").replace_strict(_COMPARISONS, return_dtype=pl.Int64),
                      pl.col("table").replace_strict(tables, return_dtype=pl.Int64), maintain_order=True)


@dataclass(frozen=True)
class _Kept:
    """What stacking a later wave with this one needs besides its rows: recipe, topline layout, design inputs."""

    recipe: FittedRecipe
    layout: pl.DataFrame
    inputs: DesignInputs


@dataclass
class Tabulation:
    """The tables of a run, wave by wave and batch by batch (module docstring); `spec` None: a study
    without `[tables]` (the topline estimates and the Total's changes only)."""

    study: Study
    spec: TablesSpec | None
    options: VarianceOptions
    cells: list[pl.DataFrame] = field(default_factory=list)
    tests: list[pl.DataFrame] = field(default_factory=list)
    totals: list[pl.DataFrame] = field(default_factory=list)  # Total rows of the topline estimates
    notes: list[str] = field(default_factory=list)
    kept: dict[str, _Kept] = field(default_factory=dict)  # waves kept for the stacked design
    stacked: dict[tuple[str, str], list[pl.DataFrame]] = field(default_factory=dict)

    @property
    def marks(self) -> TablesSpec:
        """The options the marks follow: `[tables]`, or its defaults for the Total's changes (level 0.05,
        tested from a base of 50, no adjustment) in a study without it."""
        return self.spec if self.spec is not None else TablesSpec()

    @property
    def within_applies(self) -> bool:
        """Whether variances add the within-PSU term (two-stage design, first-stage FPC, Taylor or jackknife)."""
        design = self.study.design
        fpc = bool(design.population or design.sampling_fraction)
        method = self.options.method == "taylor" or self.options.method in FPC_REPLICATE_METHODS
        return fpc and design.psu is not None and design.second_stage_fraction < 1 and method

    @cached_property
    def banners(self) -> dict[str, Banner]:
        spec = self.spec.banners if self.spec is not None else {}
        return {name: build_banner(self.study, b) for name, b in spec.items()}

    @cached_property
    def stacking(self) -> TablesSpec:
        """The banners of the stacked design: each stub's banner, and the Total alone for every other variable."""
        spec = self.marks
        alone = {n: _TOTAL_ONLY for n in self.study.variables if spec.banner_of(n) is None}
        return TablesSpec(levels=spec.levels, banners={**spec.banners, _TOTAL_ONLY: BannerSpec(_TOTAL_ONLY, ())},
                          stub_banner={**spec.stub_banner, **alone})

    def held_columns(self) -> list[str]:
        """The columns of every banner's break variables (read with the weighting columns, held for the wave)."""
        breaks = [v for b in (self.spec.banners.values() if self.spec is not None else ()) for v in b.breaks]
        return list(dict.fromkeys(c for v in breaks for c in self.study.variables[v].columns))

    def batch_bytes(self, held: pl.DataFrame, recipe: FittedRecipe, layout: pl.DataFrame) -> dict[str, int]:
        """Bytes the banner fit of each stub of a wave needs (for `pipeline.memory.variable_batches`):
        FIT_COPIES x groups x its quantities, plus three (PSUs x estimators) matrices (linearized PSU
        totals, the within-PSU terms), in 8-byte values; groups are the wave's (stratum, PSU, class)
        cells. `held`: the wave's design columns; {} without `[tables]`."""
        if self.spec is None:
            return {}
        design = self.study.design
        keys = [c for c in (design.strata, design.psu) if c is not None]
        frame = wave_frame(held.select("respondent_id", *keys), recipe)
        groups = frame.select(pl.struct(*keys, _CLASS).n_unique()).item()
        psus = frame.select(pl.struct(*keys).n_unique()).item() if keys else 1
        out = {}
        for name in self.study.variables:
            wp = plan_wave(self.study, self.spec, self.banners, layout.filter(pl.col("variable") == name),
                           cross_cells=self.within_applies)
            out[name] = 8 * (FIT_COPIES * groups * len(wp.plan.quantities) + 3 * psus * len(wp.plan.cells))
        return out

    def stack_with(self, wave: str) -> list[str]:
        """The earlier waves whose rows `add_wave` needs for `wave` (shared PSUs: the previous wave and
        the reference wave, among those given before); [] with independent waves."""
        if not self.study.design.same_psus_across_waves:
            return []
        order = [w.id for w in self.study.waves]
        earlier = [w for w in order[:order.index(wave)] if w in self.kept]
        reference = self.marks.reference_wave
        return sorted(set(earlier[-1:]) | ({reference} & set(earlier)), key=order.index)

    def add_wave(self, wave: str, rows: pl.DataFrame, recipe: FittedRecipe, layout: pl.DataFrame, *,
                 variables: Sequence[str] | None = None, replay: Callable[[np.ndarray], np.ndarray] | None = None,
                 earlier: Mapping[str, pl.DataFrame] | None = None) -> pl.DataFrame:
        """Estimate one weighted wave, or the batch `variables` of it (module docstring); returns the
        topline estimates (`ESTIMATE_SCHEMA`).

        rows: the wave's staged rows (design, weighting and break columns and those of the batch);
        layout: the wave's topline rows; replay: the recipe's replay shared by the batches
        (`weighted_cells.RememberedReplay`); earlier: the rows of the same columns of each wave
        `stack_with(wave)` names.
        """
        names = list(self.study.variables) if variables is None else list(variables)
        estimates = wave_estimates(rows, self.study, recipe, layout, self.options, wave=wave, variables=names,
                                   replay=replay)
        batch = layout.filter(pl.col("variable").is_in(names))
        self.totals.append(_total_rows(estimates, batch))
        inputs = design_inputs(self.study, recipe, self.options, replay)
        if self.spec is not None:
            self._banner_cells(wave, rows, recipe, batch, inputs)
        if self.study.design.same_psus_across_waves:
            later = WaveRows(wave, wave_frame(rows, recipe), recipe, batch, inputs)
            for s in self.stack_with(wave):
                kept = self.kept[s]
                rows_s = WaveRows(s, wave_frame((earlier or {})[s], kept.recipe), kept.recipe,
                                  kept.layout.filter(pl.col("variable").is_in(names)), kept.inputs)
                self.stacked.setdefault((wave, s), []).append(stacked_change_variance(
                    self.study, self.stacking, self._stacking_banners, self.options, rows_s, later, weight=_WEIGHT,
                    classes=_CLASS))
            keep = {wave, *self.stack_with(wave), self.marks.reference_wave}
            self.kept = {w: k for w, k in {**self.kept, wave: _Kept(recipe, layout, inputs)}.items() if w in keep}
        return estimates

    @cached_property
    def _stacking_banners(self) -> dict[str, Banner]:
        return {name: build_banner(self.study, b) for name, b in self.stacking.banners.items()}

    def _banner_cells(self, wave: str, rows: pl.DataFrame, recipe: FittedRecipe, layout: pl.DataFrame,
                      inputs: DesignInputs) -> None:
        """One grouped pass for every banner cell of `layout`'s stubs: cells, column and Total tests, Rao-Scott."""
        wp = plan_wave(self.study, self.spec, self.banners, layout, cross_cells=self.within_applies)
        if not wp.refs:
            return
        frame = wave_frame(rows, recipe).with_columns(list(wp.derived.values()))
        state = fit_wave(frame, wp.plan, wp.medians, inputs, weight=_WEIGHT)
        cells = cell_frame(wave, wp, state, self.spec, level=self.options.level,
                           weighting_variables=set(recipe.class_frame.columns))
        tests = column_tests(cells, state, self.spec, wp)
        independence = pl.DataFrame(_independence(wave, wp, state), schema=TEST_COLUMNS, strict=False)
        if independence.height:
            independence = mark(independence.drop("p_adjusted", "significant", "significant_lighter"), self.spec,
                                group=["wave", "table", "banner", "column_a"])
        self.cells.append(letters(cells, tests))
        self.tests.append(pl.concat([tests, independence], how="vertical_relaxed"))

    def finish(self) -> BannerTables:
        """Every wave's cells and tests, with the wave-over-wave tests of the Total of every variable and of
        every banner cell, the Total's change columns and the chance-marks count."""
        wave_ids = [w.id for w in self.study.waves]
        stacked = {k: pl.concat(v, how="vertical_relaxed") for k, v in self.stacked.items()}
        on_total = {k: v.filter(pl.col("column") == TOTAL).with_columns(banner=pl.lit(TOTAL)) for k, v in stacked.items()}
        totals = pl.concat(self.totals, how="vertical_relaxed") if self.totals else None
        total_waves = (wave_tests(totals, self.marks, wave_ids, on_total or None) if totals is not None
                       else pl.DataFrame(schema=TEST_COLUMNS))
        changes = pl.DataFrame(schema={"wave": pl.String, "table": pl.String, "row": pl.Int32})
        if totals is not None:
            changes = change_columns(totals.select(*_TOTAL_KEYS, "banner", "column"), total_waves, wave_ids).select(
                *_TOTAL_KEYS, "change_from_previous", "se_change", "change_mark")
        levels = self.marks.levels
        if not self.cells:
            made = int(total_waves["p_value"].is_not_null().sum())
            return BannerTables(pl.DataFrame(), total_waves, ChanceMarks(made, levels), self.spec, tuple(self.notes),
                                totals=changes)
        cells = pl.concat(self.cells, how="vertical_relaxed")
        in_banners = {k: v.filter(pl.col("column") != TOTAL) for k, v in stacked.items()}
        waves = wave_tests(cells.filter(pl.col("column") != TOTAL), self.spec, wave_ids, in_banners or None)
        tests = _in_order(pl.concat([*self.tests, waves, total_waves], how="vertical_relaxed"), self.study)
        # each banner's Total column is the Total: it shows the Total's change
        own_total = total_waves.drop("banner").join(cells.select("table", "banner").unique(), on="table")
        cells = change_columns(cells, pl.concat([waves, own_total.select(waves.columns)]), wave_ids).drop("estimator")
        made = int(tests["p_value"].is_not_null().sum())
        return BannerTables(cells, tests, ChanceMarks(made, levels), self.spec, tuple(self.notes), totals=changes)
