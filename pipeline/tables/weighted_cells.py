"""Weighted, design-based estimates for every row of the topline tables.

`weighted_cells(responses, study, recipes, options)` takes the staged responses of the waves,
the fitted weighting recipe of each wave and the `[variance]` options, and returns one row per
(wave, variable, row_order) of the topline layout (`pipeline.tables.topline`) that has an estimate:

  category / net / item / missing rows: a weighted percentage, 100 * p with
      p = sum_i w_i a_i y_i / sum_i w_i a_i,   y_i = 1 when i's answer is in the row, a_i = 1 when
      i is in the row's base (answered; for "missing" rows the respondents asked, for
      "not-asked" rows every respondent of the wave; pipeline.staging.routing; for categories and
      nets of a variable with `exclude_from_base` the answers outside those codes, for the
      "excluded" rows of those codes the respondents asked);
  balance rows: 100 * the weighted mean over the base of z_i = 1[plus] - 1[minus], i.e. the
      percentage plus minus the percentage minus; its linearization is that of the difference of
      the two percentages (same denominator), so its SE is the SE of the linear contrast,
      var(p+) + var(p-) - 2 cov(p+, p-), covariance included; t interval;
  statistic "mean": the weighted mean of the answers (codes excluded from the statistics left out);
  statistic "median": the weighted median with its Woodruff (1952) interval; for a rating scale
      the interpolated median of grouped data (each answer k spread evenly over k -/+ 1/2,
      `pipeline.estimation.quantiles`), so ties at a scale point never collapse the interval;
      for a numeric question the smallest answer with at least half the weight at or below it.
A row whose variance cannot be estimated (one respondent, or all its respondents in one PSU)
has no standard error, interval or design effect; medians carry no design effect.

A percentage of a variable the weighting calibrates to population figures (a raking margin, a
post-stratification cell) is set by the weighting: its standard error is 0 up to the raking
tolerance. Such rows are flagged `set_by_weighting` (no interval, no design effect) rather than
shown with a spurious zero-width interval.

Every estimate of a wave comes from ONE call of `pipeline.estimation.estimate_table` on that
wave's rows: one grouped pass over respondents, the full design kept (rows outside a base get
a_i = 0, they are never dropped before the variance), the weighting recipe's classes passed in so
that Taylor linearization uses the calibration residuals (Deville & Sarndal 1992) and replicate
methods replay the recipe in every replicate; supplied replicate weights (`variance_arguments`) are
used as they are. Percentages get the Korn & Graubard (1998)
interval (Clopper-Pearson on the effective sample size, which behaves near 0% and 100%), means
the t interval with the design degrees of freedom.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Mapping, Sequence

import numpy as np
import polars as pl

from pipeline.estimation import estimate_table
from pipeline.estimation.api import MeanOf
from pipeline.estimation.intervals import korn_graubard_interval
from pipeline.estimation.options import VarianceOptions
from pipeline.staging.replicate_columns import staged_columns
from pipeline.staging.routing import asked_column, flagged
from pipeline.staging.spec import Study, Variable
from pipeline.weighting import FittedRecipe

ESTIMATE_SCHEMA: dict[str, pl.DataType] = {
    "wave": pl.String(),
    "variable": pl.String(),
    "row_order": pl.Int32(),
    "estimate": pl.Float64(),
    "se": pl.Float64(),
    "ci_low": pl.Float64(),
    "ci_high": pl.Float64(),
    "deff": pl.Float64(),
    "n_eff": pl.Float64(),
    "df": pl.Float64(),
    "weighted_base": pl.Float64(),
    "set_by_weighting": pl.Boolean(),
}
_WEIGHT = "__base_weight"
_CLASS = "__class"
_FINAL = "__final_weight"
PERCENT_KINDS = ("category", "excluded", "net", "item", "missing", "not-asked")
RATING_TYPES = ("scale", "rating")  # whole-number answers: medians by the grouped-data rule
# A percentage of a weighting variable whose standard error (on the 0-1 scale) is below this is
# a figure the weighting sets to its population target: calibration residuals are then exactly 0
# (Taylor) or replicate raking meets the target to its tolerance (1e-6 by default), while any
# sampling error of a real percentage is orders of magnitude larger.
SET_BY_WEIGHTING_SE = 1e-5


def _row_expressions(variable: Variable, rows: pl.DataFrame) -> list[tuple[int, str, pl.Expr | None, pl.Expr]]:
    """(row_order, kind, y, base) per estimable row of one variable's layout.

    y is the 0/1 indicator (percent rows), the -1/0/1 score (balance rows) or None for rows
    estimated from the value column (mean, median); base is the boolean base indicator.
    """
    out: list[tuple[int, str, pl.Expr | None, pl.Expr]] = []
    asked = pl.col(asked_column(variable.name)) if variable.name in flagged(variable) else pl.lit(True)
    if variable.type == "multi":
        items = list(variable.items)
        answered_any = pl.any_horizontal([pl.col(c).is_not_null() for c in items])
        for order, kind, code, label in rows.select("row_order", "row_kind", "code", "row_label").iter_rows():
            if kind == "item":
                out.append((order, kind, pl.col(code).eq(1).fill_null(False), pl.col(code).is_not_null()))
            elif kind == "net":
                members = variable.nets.get(label, tuple(items))
                out.append((order, kind, pl.any_horizontal([pl.col(c).eq(1).fill_null(False) for c in members]), answered_any))
            elif kind == "missing":
                out.append((order, kind, answered_any.not_(), asked))
            elif kind == "not-asked":
                out.append((order, kind, asked.not_(), pl.lit(True)))
        return out
    col = pl.col(variable.name)
    text = col.cast(pl.String)
    answered = col.is_not_null()
    excluded = list(variable.unscored)
    scored = col.is_not_null() & ~col.is_in(excluded) if excluded else answered
    in_base = col.is_not_null() & ~col.is_in(list(variable.exclude_from_base)) if variable.exclude_from_base else answered
    for order, kind, code, label in rows.select("row_order", "row_kind", "code", "row_label").iter_rows():
        if kind == "category":
            out.append((order, kind, text.eq(code).fill_null(False), in_base))
        elif kind == "excluded":
            out.append((order, kind, text.eq(code).fill_null(False), asked))
        elif kind == "net":
            members = [str(c) for c in variable.nets[label]]
            out.append((order, kind, text.is_in(members).fill_null(False), in_base))
        elif kind == "balance":
            plus, minus = ([str(c) for c in side] for side in variable.balance[label])
            score = text.is_in(plus).fill_null(False).cast(pl.Float64) - text.is_in(minus).fill_null(False).cast(pl.Float64)
            out.append((order, kind, score, in_base))
        elif kind == "missing":
            out.append((order, kind, answered.not_(), asked))
        elif kind == "not-asked":
            out.append((order, kind, asked.not_(), pl.lit(True)))
        elif kind == "statistic" and code in ("mean", "median"):
            out.append((order, code, None, scored))
    return out


def _wave_frame(
    responses: pl.DataFrame, study: Study, recipe: FittedRecipe, layout: pl.DataFrame, variables: Sequence[str]
) -> tuple[
    pl.DataFrame, list[MeanOf], list[str], list[str], dict[str, tuple[str, int, str]], dict[str, pl.Expr]
]:
    """The wave's respondents with the weight, the class and one derived column per mean or median
    of a value; every percentage row is a `MeanOf` request on the answer columns themselves.

    Returns (frame, percentage requests, mean columns, median columns, name -> (variable,
    row_order, kind), name -> base expression).
    """
    weights = pl.DataFrame(
        {
            "respondent_id": recipe.ids.cast(pl.String),
            _WEIGHT: recipe.adjusted_base,
            _CLASS: recipe.classes.astype(np.int64),
            _FINAL: recipe.weights,
        }
    )
    frame = responses.join(weights, on="respondent_id", how="inner", validate="1:1")
    derived: list[pl.Expr] = []
    shares: list[MeanOf] = []
    means: list[str] = []
    medians: list[str] = []
    meaning: dict[str, tuple[str, int, str]] = {}
    bases: dict[str, pl.Expr] = {}
    for name in variables:
        variable = study.variables[name]
        rows = layout.filter(pl.col("variable") == name)
        for order, kind, y, base in _row_expressions(variable, rows):
            column = f"__r{len(meaning)}"
            meaning[column] = (name, order, kind)
            bases[column] = base
            if y is None:
                # the answer itself outside-base nulled, in its own type: whole-number codes stay
                # integers, which the grouped pass codes by arithmetic (no sort); the estimators
                # cast to float64 themselves
                derived.append(pl.when(base).then(pl.col(name)).otherwise(None).alias(column))
                (medians if kind == "median" else means).append(column)
            else:
                # rows with the same base (every category of a question) share its quantity; a
                # balance score is -1/0/1, so it keeps its own squared quantity
                shares.append(MeanOf(column, y, base, _expression_key(base), indicator=kind != "balance"))
    return frame.with_columns(derived), shares, means, medians, meaning, bases


def _expression_key(expr: pl.Expr) -> str:
    """A name for an expression that two expressions share only when they are the same expression."""
    return hashlib.blake2b(expr.meta.serialize(format="json").encode(), digest_size=16).hexdigest()


def _by_stratum(values: Mapping[object, float]) -> dict[str, float] | None:
    """Stratum label -> the design's first-stage population size N_h or sampling fraction f_h."""
    return {str(k): float(v) for k, v in values.items()} if values else None


class RememberedReplay:
    """A weighting recipe's `replay`, each result remembered by its input: the batches of one wave
    (`pipeline.memory`) replay the same replicate class totals, and each is then computed once.

    replay is a pure function of the (R, C) class totals, so a remembered result is the result."""

    def __init__(self, replay: Callable[[np.ndarray], np.ndarray]) -> None:
        self._replay = replay
        self._results: dict[tuple[tuple[int, ...], bytes], np.ndarray] = {}

    def __call__(self, class_totals: np.ndarray) -> np.ndarray:
        totals = np.ascontiguousarray(class_totals, dtype=np.float64)
        key = (totals.shape, hashlib.blake2b(totals.tobytes(), digest_size=32).digest())
        if key not in self._results:
            self._results[key] = np.asarray(self._replay(totals), dtype=np.float64)
        return self._results[key].copy()


def variance_arguments(study: Study, options: VarianceOptions) -> dict[str, object]:
    """The `estimate_table` arguments of the study's variance method (`[variance]`).

    Supplied replicate weights are read from their staged columns `replicate_weight_1..R`
    (`pipeline.staging.replicate_columns`) and used as they are: no replay of the weighting recipe
    (they carry the weighting their producer gave them); the full-sample estimate uses the study's
    final weights. Generated replicates: method, Fay coefficient, bootstrap size and seed."""
    if not options.supplied:
        return {"variance": options.method, "fay": options.fay, "replicates": options.replicates, "seed": options.seed}
    return {
        "variance": "supplied",
        "replicate_cols": staged_columns(study),
        "replicate_method": options.replicate_method,
        "fay": options.fay,
        "replicate_multiplier": options.multiplier,
        "replicate_multipliers": options.multipliers,
        "replicate_df": options.df,
        "replicate_centre": options.centre,
    }


def wave_estimates(
    responses: pl.DataFrame,
    study: Study,
    recipe: FittedRecipe,
    layout: pl.DataFrame,
    options: VarianceOptions,
    *,
    wave: str,
    variables: Sequence[str] | None = None,
    replay: Callable[[np.ndarray], np.ndarray] | None = None,
) -> pl.DataFrame:
    """Design-based estimates of every estimable topline row of one wave (module docstring).

    responses: the wave's staged rows (the design columns and those of `variables`); recipe: its
    fitted weighting; layout: the topline rows of the wave (`pipeline.tables.topline.unweighted_toplines`
    filtered to the wave); variables: the variables to estimate (default every one of the study);
    replay: the recipe's replay to use (default `recipe.replay`; a `RememberedReplay` shared by the
    batches of a wave).
    Returns a frame with `ESTIMATE_SCHEMA`; percentages on the 0-100 scale.
    """
    names = list(study.variables) if variables is None else list(variables)
    frame, shares, means, medians, meaning, bases = _wave_frame(responses, study, recipe, layout, names)
    if not meaning:
        return pl.DataFrame(schema=ESTIMATE_SCHEMA)
    design = study.design
    calibration = recipe.calibration_matrix()
    table = estimate_table(
        frame,
        weight=_WEIGHT,
        strata=design.strata,
        psu=design.psu,
        psu_ids=design.psu_ids,
        population_size=_by_stratum(design.population),
        sampling_fraction=_by_stratum(design.sampling_fraction),
        single_psu=design.single_psu,
        collapse_with={str(k): str(v) for k, v in design.collapse_with.items()},
        second_stage_fraction=design.second_stage_fraction,
        first_stage=design.first_stage,
        psu_inclusion=design.psu_inclusion_probability,
        mean=means or None,
        means_of=shares,
        quantile=[(c, 0.5) for c in medians] or None,
        interpolate_quantiles=[c for c in medians if study.variables[meaning[c][0]].type in RATING_TYPES],
        **variance_arguments(study, options),
        level=options.level,
        classes=_CLASS,
        reweight=recipe.replay if replay is None else replay,
        calibration_matrix=None if calibration.shape[1] == 0 else calibration,
        source=f"wave {wave}",
    ).frame
    weighted_base = _weighted_bases(frame, bases)
    kinds = [meaning[v][2] for v in table["variable"]]
    percent = np.array([k in PERCENT_KINDS for k in kinds])
    est = table["estimate"].to_numpy().astype(float)
    se = table["se"].to_numpy().astype(float)
    low = table["ci_low"].to_numpy().astype(float)
    high = table["ci_high"].to_numpy().astype(float)
    df = table["df"].to_numpy().astype(float)
    if percent.any():
        kg_low, kg_high = korn_graubard_interval(
            est[percent], se[percent], table["n"].to_numpy()[percent], df[percent], level=options.level
        )
        low[percent], high[percent] = kg_low, kg_high
    weighting_vars = set(recipe.class_frame.columns)
    in_margin = np.array([meaning[v][0] in weighting_vars for v in table["variable"]])
    with np.errstate(invalid="ignore"):
        fixed = percent & in_margin & (se < SET_BY_WEIGHTING_SE) & (est > 0) & (est < 1)
    se[fixed], low[fixed], high[fixed] = 0.0, est[fixed], est[fixed]
    deff = table["deff"].to_numpy().astype(float)
    deff[fixed] = np.nan
    balance = np.array([k == "balance" for k in kinds])
    scale = np.where(percent | balance, 100.0, 1.0)
    return pl.DataFrame(
        {
            "wave": [wave] * table.height,
            "variable": [meaning[v][0] for v in table["variable"]],
            "row_order": [meaning[v][1] for v in table["variable"]],
            "estimate": est * scale,
            "se": se * scale,
            "ci_low": low * scale,
            "ci_high": high * scale,
            "deff": deff,
            "n_eff": table["n_eff"].to_numpy().astype(float),
            "df": df,
            "weighted_base": [weighted_base[v] for v in table["variable"]],
            "set_by_weighting": fixed,
        },
        schema=ESTIMATE_SCHEMA,
    ).with_columns(pl.col(c).fill_nan(None) for c in ("estimate", "se", "ci_low", "ci_high", "deff", "n_eff"))


def _weighted_bases(frame: pl.DataFrame, bases: dict[str, pl.Expr]) -> dict[str, float]:
    """Sum of final weights over each row's base, each distinct base summed once."""
    distinct: dict[str, pl.Expr] = {}
    for expr in bases.values():
        distinct.setdefault(expr.meta.serialize(format="json"), expr)
    keys = list(distinct)
    sums = frame.select(
        pl.col(_FINAL).filter(e.fill_null(False)).sum().alias(f"b{k}") for k, e in enumerate(distinct.values())
    ).row(0)
    total = dict(zip(keys, sums, strict=True))
    return {name: total[expr.meta.serialize(format="json")] for name, expr in bases.items()}
