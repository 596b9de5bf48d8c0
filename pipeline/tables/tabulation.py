"""The banner tabulation of a run: `Tabulation` takes each weighted wave and gives `BannerTables`.

Per wave, ONE grouped pass over the wave's respondents (`pipeline.tables.fit`) gives every cell
(`cells`), the column and Total tests (`significance`) and the Rao-Scott tests (`rao_scott`);
across waves, `wave_change` tests each cell's change.
"""

from __future__ import annotations

from dataclasses import dataclass, field

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
from pipeline.tables.fit import DesignInputs, FitState, fit_wave
from pipeline.tables.rao_scott import rao_scott
from pipeline.tables.result import BannerTables, ChanceMarks
from pipeline.tables.significance import TEST_COLUMNS, column_tests, letters, mark
from pipeline.tables.stacked import WaveRows, stacked_change_variance
from pipeline.tables.spec import TablesSpec, parse_tables
from pipeline.tables.wave_change import change_columns, wave_tests
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


def design_inputs(study: Study, recipe: FittedRecipe, options: VarianceOptions) -> DesignInputs:
    """The design and weighting of one wave as the fit needs them."""
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
        reweight=recipe.replay,
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


@dataclass
class Tabulation:
    """Banner tables of a run, wave by wave (module docstring)."""

    study: Study
    spec: TablesSpec
    options: VarianceOptions
    cells: list[pl.DataFrame] = field(default_factory=list)
    tests: list[pl.DataFrame] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    kept: dict[str, WaveRows] = field(default_factory=dict)  # waves kept for the stacked design
    stacked: dict[tuple[str, str], pl.DataFrame] = field(default_factory=dict)

    @property
    def within_applies(self) -> bool:
        """Whether variances add the within-PSU term (two-stage design, first-stage FPC, Taylor or jackknife)."""
        design = self.study.design
        fpc = bool(design.population or design.sampling_fraction)
        method = self.options.method == "taylor" or self.options.method in FPC_REPLICATE_METHODS
        return fpc and design.psu is not None and design.second_stage_fraction < 1 and method

    @property
    def banners(self) -> dict[str, Banner]:
        return {name: build_banner(self.study, b) for name, b in self.spec.banners.items()}

    def add_wave(self, wave: str, responses: pl.DataFrame, recipe: FittedRecipe, layout: pl.DataFrame) -> None:
        """Tabulate one weighted wave: cells, column and Total tests, Rao-Scott tests (one grouped pass)."""
        wp = plan_wave(self.study, self.spec, self.banners, layout, cross_cells=self.within_applies)
        if not wp.refs:
            return
        frame = wave_frame(responses, recipe).with_columns(list(wp.derived.values()))
        inputs = design_inputs(self.study, recipe, self.options)
        state = fit_wave(frame, wp.plan, wp.medians, inputs, weight=_WEIGHT)
        if self.study.design.same_psus_across_waves:
            self._stack(WaveRows(wave, frame, recipe, layout, inputs))
        cells = cell_frame(wave, wp, state, self.spec, level=self.options.level,
                           weighting_variables=set(recipe.class_frame.columns))
        tests = column_tests(cells, state, self.spec, wp)
        independence = pl.DataFrame(_independence(wave, wp, state), schema=TEST_COLUMNS, strict=False)
        if independence.height:
            independence = mark(independence.drop("p_adjusted", "significant", "significant_lighter"), self.spec,
                                group=["wave", "table", "banner", "column_a"])
        self.cells.append(letters(cells, tests))
        self.tests.append(pl.concat([tests, independence], how="vertical_relaxed"))

    def _stack(self, rows: WaveRows) -> None:
        """The stacked-design change variances of `rows`' wave from the previous and the reference wave."""
        order = [w.id for w in self.study.waves]
        earlier_ids = [w for w in order[:order.index(rows.wave)] if w in self.kept]
        wanted = set(earlier_ids[-1:]) | ({self.spec.reference_wave} & set(earlier_ids))
        for earlier in sorted(wanted, key=order.index):
            self.stacked[(rows.wave, earlier)] = stacked_change_variance(
                self.study, self.spec, self.banners, self.options, self.kept[earlier], rows, weight=_WEIGHT,
                classes=_CLASS)
        keep = {rows.wave} | ({self.spec.reference_wave} & (set(self.kept) | {rows.wave}))
        self.kept = {w: r for w, r in {**self.kept, rows.wave: rows}.items() if w in keep}

    def finish(self) -> BannerTables:
        """Every wave's cells and tests, with the wave-over-wave tests and the chance-marks count."""
        wave_ids = [w.id for w in self.study.waves]
        if not self.cells:
            empty = pl.DataFrame(schema=TEST_COLUMNS)
            return BannerTables(pl.DataFrame(), empty, ChanceMarks(0, self.spec.levels), self.spec, tuple(self.notes))
        cells = pl.concat(self.cells, how="vertical_relaxed")
        waves = wave_tests(cells, self.spec, wave_ids, self.stacked or None)
        tests = pl.concat([*self.tests, waves], how="vertical_relaxed")
        cells = change_columns(cells, waves, wave_ids).drop("estimator")
        made = int(tests["p_value"].is_not_null().sum())
        return BannerTables(cells, tests, ChanceMarks(made, self.spec.levels), self.spec, tuple(self.notes))
