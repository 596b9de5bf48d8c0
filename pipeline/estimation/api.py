"""`estimate()`: means, totals, proportions, ratios and quantiles with design-based standard errors.

One call does, in order:
1. builds the quantity expressions of every requested estimate, for the whole sample and for
   each domain of `by` (domain quantities are products with the domain indicator: no row subsets);
2. for quantiles, the weighted CDF of each domain, then the indicator 1[y <= q_hat] as a quantity;
3. ONE grouped pass: `group_totals` by (stratum, PSU, class);
4. estimates theta = t_num / t_den and their variances: Taylor (`taylor_variance`) or
   replicates (`pipeline.estimation.replicates`), design effects (`deff`), intervals.

Missing answers are excluded from a variable's base (and counted out of n); a domain with no
respondents who answered, or a ratio whose denominator total is 0, gives a row with a missing
estimate and the reason in `reason`.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

import numpy as np
import polars as pl

from pipeline.errors import DataError, Problem, SpecError
from pipeline.estimation import deff as deff_mod
from pipeline.estimation import intervals
from pipeline.estimation.design import PsuLayout, SampleDesign
from pipeline.estimation.estimands import Ratios
from pipeline.estimation.quantiles import WeightedCdf, weighted_cdfs, woodruff_interval
from pipeline.estimation.result import COLUMNS, EstimateTable
from pipeline.estimation.result import interval as interval_for
from pipeline.estimation.taylor import (
    Calibration,
    ProductMoments,
    SquaredTotals,
    taylor_variance,
    within_psu_variance,
)
from pipeline.estimation.totals import GroupTotals, group_totals

if TYPE_CHECKING:
    from pipeline.estimation.replicates import ReplicateFactors

VARIANCE_METHODS: tuple[str, ...] = (
    "taylor", "jackknife", "stratified-jackknife", "brr", "fay", "bootstrap", "supplied"
)
# replicate methods that apply the first-stage FPC (1 - f_h) to the between-PSU deviations
# (`replicates` module docstring); they get the within-PSU term of the two-stage estimator too
FPC_REPLICATE_METHODS: tuple[str, ...] = ("jackknife", "stratified-jackknife")
WEIGHT_QUANTITY = "__weight"
EQUAL_WEIGHT = "__equal_weight"
FINAL_WEIGHT = "__final_weight_for_cdf"


@dataclass(frozen=True)
class _Cell:
    """One requested estimate: names of its numerator, denominator, base and moment quantities."""

    statistic: str
    variable: str
    category: str
    domain: str
    num: str
    den: str | None
    base: str
    s_nn: str
    s_nd: str | None
    s_dd: str | None
    prob: float = np.nan  # quantiles only
    interpolated: bool = False  # quantiles of whole-number answers by the grouped-data rule (`quantiles`)


@dataclass(frozen=True)
class MeanOf:
    """A mean of an expression over a base: theta = sum_i w_i a_i y_i / sum_i w_i a_i.

    value: y_i, a polars expression evaluated per respondent (null or NaN only outside the base);
    base: a_i, a boolean expression (the respondents the mean is taken over); name: the row's
    `variable` in the result; base_name: means that name the same base share its quantity (the
    base of every row of one question is summed once). indicator: y is 0/1, so y^2 = y and no
    squared quantity is added (a proportion). Each is a quantity of the one grouped pass: a row
    kind of a table needs no column of its own.
    """

    name: str
    value: pl.Expr
    base: pl.Expr
    base_name: str
    indicator: bool = False


def _as_list(value: object) -> list:
    """The requests as a list, each once (a repeated identical request is estimated once)."""
    if value is None:
        return []
    if isinstance(value, str | tuple):
        return [value]
    return list(dict.fromkeys(tuple(v) if isinstance(v, list) else v for v in value))


def _answered(col: str, frame: pl.DataFrame) -> pl.Expr:
    expr = pl.col(col).is_not_null()
    if frame.schema[col].is_float():
        expr = expr & pl.col(col).is_not_nan()
    return expr


def _domains(frame: pl.DataFrame, by: str | None) -> dict[str, pl.Expr]:
    """Domain label -> boolean expression: the whole sample ("") and each level of `by` (missing as its own level)."""
    out: dict[str, pl.Expr] = {"": pl.lit(True)}
    if by is None:
        return out
    levels = frame[by].drop_nulls().unique().sort().to_list()
    for v in levels:
        out[f"{by}={v}"] = pl.col(by).eq(v).fill_null(False)
    if frame[by].null_count():
        out[f"{by}=(missing)"] = pl.col(by).is_null()
    return out


class _Plan:
    """The quantity expressions and the cells that read them."""

    def __init__(self) -> None:
        self.quantities: dict[str, pl.Expr] = {WEIGHT_QUANTITY: pl.lit(1.0)}
        self.cells: list[_Cell] = []

    def q(self, name: str, expr: pl.Expr) -> str:
        self.quantities.setdefault(name, expr.cast(pl.Float64))
        return name

    def mean_or_total(self, frame: pl.DataFrame, var: str, dom: str, d: pl.Expr, *, statistic: str) -> None:
        a = (_answered(var, frame) & d).cast(pl.Float64)
        y = pl.col(var).cast(pl.Float64).fill_null(0.0).fill_nan(0.0)
        base = self.q(f"base|{var}|{dom}", a)
        num = self.q(f"y|{var}|{dom}", y * a)
        sq = self.q(f"y2|{var}|{dom}", y * y * a)
        if statistic == "mean":
            self.cells.append(_Cell("mean", var, "", dom, num, base, base, sq, num, base))
        else:
            self.cells.append(_Cell("total", var, "", dom, num, None, base, sq, None, None))

    def proportion(self, frame: pl.DataFrame, var: str, dom: str, d: pl.Expr, categories: list) -> None:
        base = self.q(f"base|{var}|{dom}", (_answered(var, frame) & d).cast(pl.Float64))
        for c in categories:
            num = self.q(f"eq|{var}|{c}|{dom}", (pl.col(var).eq(c).fill_null(False) & d).cast(pl.Float64))
            self.cells.append(_Cell("proportion", var, str(c), dom, num, base, base, num, num, base))

    def mean_of(self, m: MeanOf) -> None:
        a = m.base.fill_null(False).cast(pl.Float64)
        base = self.q(f"base|{m.base_name}", a)
        num = self.q(f"y|{m.name}", m.value.cast(pl.Float64).fill_null(0.0).fill_nan(0.0) * a)
        sq = num if m.indicator else self.q(f"y2|{m.name}", (m.value.cast(pl.Float64) ** 2).fill_null(0.0).fill_nan(0.0) * a)
        self.cells.append(_Cell("mean", m.name, "", "", num, base, base, sq, num, base))

    def count(self, frame: pl.DataFrame, var: str, dom: str, d: pl.Expr, categories: list) -> None:
        """Weighted count of each category: the total of its indicator (a total, like `total`)."""
        base = self.q(f"base|{var}|{dom}", (_answered(var, frame) & d).cast(pl.Float64))
        for c in categories:
            num = self.q(f"eq|{var}|{c}|{dom}", (pl.col(var).eq(c).fill_null(False) & d).cast(pl.Float64))
            self.cells.append(_Cell("count", var, str(c), dom, num, None, base, num, None, None))

    def ratio(self, frame: pl.DataFrame, num_col: str, den_col: str, dom: str, d: pl.Expr) -> None:
        a = (_answered(num_col, frame) & _answered(den_col, frame) & d).cast(pl.Float64)
        y = pl.col(num_col).cast(pl.Float64).fill_null(0.0).fill_nan(0.0)
        x = pl.col(den_col).cast(pl.Float64).fill_null(0.0).fill_nan(0.0)
        key = f"{num_col}/{den_col}|{dom}"
        base = self.q(f"rbase|{key}", a)
        num = self.q(f"rnum|{key}", y * a)
        den = self.q(f"rden|{key}", x * a)
        s_nn = self.q(f"ryy|{key}", y * y * a)
        s_nd = self.q(f"rxy|{key}", x * y * a)
        s_dd = self.q(f"rxx|{key}", x * x * a)
        self.cells.append(_Cell("ratio", f"{num_col}/{den_col}", "", dom, num, den, base, s_nn, s_nd, s_dd))

    def quantile(
        self, frame: pl.DataFrame, var: str, prob: float, cdf: WeightedCdf, dom: str, d: pl.Expr, *, interpolated: bool
    ) -> None:
        """The proportion whose Woodruff interval gives the quantile's: 1[y <= q_hat], or for the
        grouped-data rule 1[y < k] + lambda 1[y = k] at q_hat = k - 1/2 + lambda (`quantiles`)."""
        base = self.q(f"base|{var}|{dom}", (_answered(var, frame) & d).cast(pl.Float64))
        y = pl.col(var).cast(pl.Float64)
        if interpolated and cdf.total > 0:
            idx, lam = cdf.interpolation_point(prob)
            k = float(cdf.values[idx])
            below = (y.lt(k).cast(pl.Float64) + float(lam) * y.eq(k).cast(pl.Float64)).fill_null(0.0)
            num = self.q(f"smooth|{var}|{prob!r}|{dom}", below * d.cast(pl.Float64))
        else:
            point = float(cdf.quantile(prob))
            below = y.le(point).fill_null(False) if np.isfinite(point) else pl.lit(False)
            num = self.q(f"le|{var}|{prob!r}|{dom}", (below & d).cast(pl.Float64))
        self.cells.append(_Cell("quantile", var, f"{prob:g}", dom, num, base, base, num, num, base, prob,
                                interpolated))


def _parse_quantiles(quantile: object) -> list[tuple[str, float]]:
    """(column, q) pairs from a pair or a list of pairs; q must lie in (0, 1)."""
    items = _as_list(quantile)
    if len(items) == 2 and isinstance(items[0], str) and not isinstance(items[1], str | tuple | list):
        items = [tuple(items)]
    out = []
    for item in items:
        col, prob = item
        if not 0.0 < float(prob) < 1.0:
            message = "quantile probability must be strictly between 0 and 1"
            problem = Problem(rule="bad-quantile", message=message, column=col, value=str(prob))
            raise SpecError("bad quantile", [problem])
        out.append((col, float(prob)))
    return out


def _parse_ratios(ratio: object) -> list[tuple[str, str]]:
    items = _as_list(ratio)
    if len(items) == 2 and all(isinstance(i, str) for i in items):
        items = [tuple(items)]
    return [(str(a), str(b)) for a, b in items]


def estimate_table(
    frame: pl.DataFrame,
    *,
    weight: str | None = None,
    strata: str | None = None,
    psu: str | None = None,
    population_size: str | Mapping[str, float] | float | None = None,
    sampling_fraction: str | Mapping[str, float] | float | None = None,
    psu_ids: str = "within-stratum",
    mean: str | Sequence[str] | None = None,
    total: str | Sequence[str] | None = None,
    count: str | Sequence[str] | None = None,
    proportion: str | Sequence[str] | None = None,
    ratio: tuple[str, str] | Sequence[tuple[str, str]] | None = None,
    quantile: tuple[str, float] | Sequence[tuple[str, float]] | None = None,
    by: str | None = None,
    variance: str = "taylor",
    replicate_cols: str | Sequence[str] | None = None,
    replicate_multiplier: float | None = None,
    replicate_method: str | None = None,
    replicate_df: int | None = None,
    replicate_multipliers: Sequence[float] | None = None,
    replicate_centre: str = "full-sample",
    fay: float = 0.0,
    replicates: int | None = None,
    seed: int | None = None,
    level: float = 0.95,
    single_psu: str = "error",
    collapse_with: Mapping[str, str] | None = None,
    classes: str | None = None,
    calibration_matrix: np.ndarray | None = None,
    reweight: Callable[[np.ndarray], np.ndarray] | None = None,
    source: str | None = None,
    second_stage_fraction: float = 0.0,
    interval: str = "korn-graubard",
    interpolate_quantiles: str | Sequence[str] | None = None,
    first_stage: str = "equal",
    psu_inclusion: str | None = None,
    means_of: Sequence[MeanOf] = (),
) -> EstimateTable:
    """Design-based estimates as an `EstimateTable` (see `estimate` for the arguments).

    means_of: `MeanOf` requests (means or proportions of expressions over a base), estimated on
    the whole sample after the other requests (`by` does not apply: a domain goes in the base).
    """
    if weight is None:  # equal weights
        frame, weight = frame.with_columns(pl.lit(1.0).alias(EQUAL_WEIGHT)), EQUAL_WEIGHT
    design = SampleDesign(
        weight=weight, strata=strata, psu=psu, psu_ids=psu_ids,  # type: ignore[arg-type]
        population_size=population_size, sampling_fraction=sampling_fraction,
        single_psu=single_psu, collapse_with=dict(collapse_with or {}),  # type: ignore[arg-type]
        second_stage_fraction=float(second_stage_fraction), first_stage=first_stage, psu_inclusion=psu_inclusion,
    )
    _check_request(frame, design, mean=mean, total=total, count=count, proportion=proportion, ratio=ratio,
                   quantile=quantile,
                   by=by, variance=variance, replicate_cols=replicate_cols, classes=classes, source=source,
                   reweight=reweight, calibration_matrix=calibration_matrix, interval=interval,
                   replicate_method=replicate_method, replicate_df=replicate_df, fay=fay, replicates=replicates, seed=seed,
                   replicate_multipliers=replicate_multipliers, replicate_centre=replicate_centre,
                   replicate_multiplier=replicate_multiplier, means_of=means_of)
    domains = _domains(frame, by)
    plan = _Plan()
    for dom, d in domains.items():
        for var in _as_list(mean):
            plan.mean_or_total(frame, var, dom, d, statistic="mean")
        for var in _as_list(total):
            plan.mean_or_total(frame, var, dom, d, statistic="total")
        for var in _as_list(proportion):
            plan.proportion(frame, var, dom, d, frame[var].drop_nulls().unique().sort().to_list())
        for var in _as_list(count):
            plan.count(frame, var, dom, d, frame[var].drop_nulls().unique().sort().to_list())
        for num_col, den_col in _parse_ratios(ratio):
            plan.ratio(frame, num_col, den_col, dom, d)
    for request in means_of:
        plan.mean_of(request)
    cdfs = {}
    quantiles = _parse_quantiles(quantile)
    cdf_frame, cdf_weight = frame, weight
    if quantiles and reweight is not None and classes is not None:
        final_weights = _final_weights(frame, weight=weight, classes=classes, reweight=reweight)
        cdf_frame, cdf_weight = frame.with_columns(final_weights), FINAL_WEIGHT
    smooth = set(_as_list(interpolate_quantiles))
    for var, prob in quantiles:
        cdfs[var] = cdfs.get(var) or weighted_cdfs(cdf_frame, value=var, weight=cdf_weight, domains=domains)
        for dom, d in domains.items():
            plan.quantile(frame, var, prob, cdfs[var][dom], dom, d, interpolated=var in smooth)
    # the within-PSU term of a two-stage design needs sums of w^2 y y': from the same pass
    within_term = ((design.has_fpc or design.first_stage != "equal") and psu is not None
                   and second_stage_fraction < 1 and variance in ("taylor", *FPC_REPLICATE_METHODS))
    gt = group_totals(frame, plan.quantities, weight=weight, strata=strata, psu=psu, classes=classes, psu_ids=psu_ids,
                      squared=within_term)
    final = _final_totals(gt, reweight)
    ratios, t = _ratios(plan, gt), final.totals.sum(axis=0)
    fpc_values = design.fpc_values(frame)
    inclusion = design.inclusion_values(frame, gt)
    if variance == "taylor":
        layout = design.layout(final, fpc_values=fpc_values, inclusion=inclusion)
        calibration = None
        if calibration_matrix is not None:
            calibration = Calibration(np.asarray(calibration_matrix, dtype=np.float64), gt.column(WEIGHT_QUANTITY))
        within = None
        if layout.has_fpc and psu is not None and second_stage_fraction < 1:  # two-stage (`design` docstring)
            within = _within_psu(plan, gt, final, ratios, calibration, reweight=reweight)
        theta, v = taylor_variance(final, ratios, layout, calibration=calibration, within=within)
        df: float = layout.df
        has_fpc = layout.has_fpc
        df_layout: PsuLayout | None = layout
    else:
        # generated replicates follow the design as the variance sees it: collapsed strata, f_h, lone PSUs
        layout = None if variance == "supplied" else design.layout(gt, fpc_values=fpc_values, inclusion=inclusion)
        theta = ratios.value(t)
        v, df = _replicate_variance(
            frame, gt, plan, ratios, theta, variance=variance, replicate_cols=replicate_cols,
            replicate_multiplier=replicate_multiplier, replicate_method=replicate_method or "sdr", fay=fay,
            replicates=replicates, replicate_df=replicate_df, replicate_multipliers=replicate_multipliers,
            replicate_centre=replicate_centre, weight=weight,
            seed=seed, reweight=reweight, layout=layout, certainty=design.single_psu == "certainty", source=source,
        )
        has_fpc = layout is not None and layout.has_fpc
        if has_fpc and variance in FPC_REPLICATE_METHODS and psu is not None and second_stage_fraction < 1:
            # the jackknife scales the between-PSU deviations by (1 - f_h); the two-stage estimator then
            # adds the within-PSU term with weight f_h, as Taylor does (`design.PsuLayout.second_stage`)
            calibration = None
            if calibration_matrix is not None:
                calibration = Calibration(np.asarray(calibration_matrix, dtype=np.float64), gt.column(WEIGHT_QUANTITY))
            within = _within_psu(plan, gt, final, ratios, calibration, reweight=reweight)
            v = v + layout.second_stage(within)
        df_layout = layout
    return _table(plan, gt, ratios, t, theta, v, df, cdfs, level=level, method=variance, has_fpc=has_fpc,
                  df_layout=df_layout, interval_kind=interval)


def _final_weights(
    frame: pl.DataFrame, *, weight: str, classes: str, reweight: Callable[[np.ndarray], np.ndarray]
) -> pl.Series:
    """Per-respondent final weights w0_i f(c_i) for the weighted CDF of quantiles (classes as in `group_totals`)."""
    cls = frame[classes]
    idx = (cls if cls.dtype.is_integer() else cls.rank("dense") - 1).to_numpy().astype(np.int64)
    w0 = frame[weight].cast(pl.Float64).to_numpy()
    f = np.asarray(reweight(np.bincount(idx, weights=w0, minlength=idx.max() + 1)[None, :]), dtype=np.float64)[0]
    return pl.Series(FINAL_WEIGHT, w0 * f[idx])


def _group_factors(gt: GroupTotals, reweight: Callable[[np.ndarray], np.ndarray] | None) -> np.ndarray:
    """(G,) the recipe's class factor f(c) of each group (1 without a recipe)."""
    if reweight is None:
        return np.ones(len(gt.cls))
    b = gt.class_totals(gt.totals[:, [gt.column(WEIGHT_QUANTITY)]])[:, 0]
    return np.asarray(reweight(b[None, :]), dtype=np.float64)[0][gt.cls]


def _final_totals(gt: GroupTotals, reweight: Callable[[np.ndarray], np.ndarray] | None) -> GroupTotals:
    """The group totals under final weights: `gt` itself, or with each class scaled by the recipe's factor f(c)."""
    if reweight is None:
        return gt
    return replace(gt, totals=gt.totals * _group_factors(gt, reweight)[:, None])


def _within_psu(
    plan: _Plan, gt: GroupTotals, final: GroupTotals, ratios: Ratios, calibration: Calibration | None, *,
    reweight: Callable[[np.ndarray], np.ndarray] | None,
) -> np.ndarray:
    """(P, m) second-stage variances v2(z_hj) of the PSU totals of the linearized values (calibration
    residuals when `calibration` is given), for `PsuLayout.second_stage`."""
    return within_psu_variance(final, ratios, _squared_totals(plan, gt, reweight=reweight),
                               weight_column=gt.column(WEIGHT_QUANTITY), calibration=calibration)


def _squared_totals(
    plan: _Plan, gt: GroupTotals, *, reweight: Callable[[np.ndarray], np.ndarray] | None
) -> SquaredTotals:
    """Sums of w_i^2 y_ik by group (w = base * f(c), the final weights), for the within-PSU term.

    The interface with `taylor.within_psu_variance`: the pass (`group_totals(squared=True)`)
    sums the squared base weight times every quantity in the same groups as the totals; each group
    is then scaled by f(c)^2, and each estimator names the columns of its moments y_num^2,
    y_num y_den and y_den^2 (the quantities `s_nn`, `s_nd`, `s_dd` of its cell)."""
    if gt.squared is None:
        raise AssertionError("the within-PSU term needs the squared-weight sums of the grouped pass")
    f = _group_factors(gt, reweight)

    def index(names: list[str | None]) -> np.ndarray:
        return np.array([gt.column(n) if n is not None else -1 for n in names], dtype=np.int64)

    cells = plan.cells
    return SquaredTotals(gt.squared * (f**2)[:, None], index([c.s_nn for c in cells]), index([c.s_nd for c in cells]),
                         index([c.s_dd for c in cells]))


def product_moments(
    frame: pl.DataFrame,
    quantities: Mapping[str, pl.Expr],
    gt: GroupTotals,
    pairs: np.ndarray,
    *,
    weight: str,
    strata: str | None,
    psu: str | None,
    classes: str | None = None,
    psu_ids: str = "within-stratum",
    reweight: Callable[[np.ndarray], np.ndarray] | None = None,
) -> ProductMoments:
    """The squared-weight cross-products sum_{i in g} w_i^2 y_ik y_il of `pairs` (from
    `taylor.product_pairs`), for `taylor.within_psu_covariance`.

    quantities: the expressions `gt` was computed from (same names and order); w = base * f(c)
    with the recipe's class factors when `reweight` is given, as in `_squared_totals`. One more
    grouped pass with the squared base weight over the product expressions, in the groups of `gt`.
    """
    names = gt.columns
    exprs = {f"__pair{q}": (quantities[names[k]] * quantities[names[k2]]).cast(pl.Float64)
             for q, (k, k2) in enumerate(np.asarray(pairs, dtype=np.int64).tolist())}
    squared_weight = "__squared_weight"
    sq = group_totals(frame.with_columns((pl.col(weight).cast(pl.Float64) ** 2).alias(squared_weight)), exprs,
                      weight=squared_weight, strata=strata, psu=psu, classes=classes, psu_ids=psu_ids)
    if not (np.array_equal(sq.psu, gt.psu) and np.array_equal(sq.cls, gt.cls)):
        raise AssertionError("the squared-weight pass formed different groups")
    f = _group_factors(gt, reweight)
    return ProductMoments(pairs, sq.totals * (f**2)[:, None])


def estimate(
    frame: pl.DataFrame,
    *,
    weight: str | None = None,
    strata: str | None = None,
    psu: str | None = None,
    population_size: str | Mapping[str, float] | float | None = None,
    sampling_fraction: str | Mapping[str, float] | float | None = None,
    psu_ids: str = "within-stratum",
    mean: str | Sequence[str] | None = None,
    total: str | Sequence[str] | None = None,
    count: str | Sequence[str] | None = None,
    proportion: str | Sequence[str] | None = None,
    ratio: tuple[str, str] | Sequence[tuple[str, str]] | None = None,
    quantile: tuple[str, float] | Sequence[tuple[str, float]] | None = None,
    by: str | None = None,
    variance: str = "taylor",
    replicate_cols: str | Sequence[str] | None = None,
    replicate_multiplier: float | None = None,
    replicate_method: str | None = None,
    replicate_df: int | None = None,
    replicate_multipliers: Sequence[float] | None = None,
    replicate_centre: str = "full-sample",
    fay: float = 0.0,
    replicates: int | None = None,
    seed: int | None = None,
    level: float = 0.95,
    single_psu: str = "error",
    collapse_with: Mapping[str, str] | None = None,
    classes: str | None = None,
    calibration_matrix: np.ndarray | None = None,
    reweight: Callable[[np.ndarray], np.ndarray] | None = None,
    source: str | None = None,
    second_stage_fraction: float = 0.0,
    interval: str = "korn-graubard",
    interpolate_quantiles: str | Sequence[str] | None = None,
    first_stage: str = "equal",
    psu_inclusion: str | None = None,
) -> pl.DataFrame:
    """Design-based estimates, one row per estimate, as a polars DataFrame.

    Columns: statistic, variable, category, domain, estimate, se, ci_low, ci_high, df, deff, n,
    n_eff, reason, method. Options:
      weight (default: equal weights, 1 for every row), strata, psu, psu_ids ("within-stratum"/"unique"); for the finite population
      correction either population_size (the first-stage population size N_h: a column, a mapping
      stratum -> N_h, or one number without strata) or sampling_fraction (f_h: a column, a mapping
      stratum -> f_h, or one number for every stratum);
      first_stage: "equal" (default) or "pps" (PSUs drawn with probability proportional to size: no
      FPC, or with psu_inclusion, a column of each PSU's first-stage inclusion probability, the
      (1 - pi) approximation of `design`, Taylor only);
      second_stage_fraction: with an FPC and PSUs, the share of each selected PSU's units sampled
      (default 0, unknown: the within-PSU term is added in full; 1: whole PSUs, none is added);
      mean, total, proportion, count (weighted count of each category; column or list of columns), ratio ((num, den) or list of pairs),
      quantile ((column, q) or list of pairs); by (a column: adds one domain per level);
      variance: "taylor" (default) or a replicate method: "jackknife", "stratified-jackknife", "brr",
      "fay", "bootstrap", "supplied" (replicate_cols: a regular expression matched against whole
      column names or a list of names, never matching the weight column; replicate_method: how they
      were made ("sdr" default, "jackknife", "stratified-jackknife", "brr", "fay", "bootstrap"), which
      sets the default multiplier (Wolter 2007: SDR 4/R, jackknife (R-1)/R, BRR 1/R, Fay
      1/(R (1-rho)^2), bootstrap 1/R); replicate_df: their degrees of freedom (required for "brr"
      and "fay": the number of half-sample pairs; default R - 1 otherwise);
      replicate_multiplier: the variance multiplier, default that of the method; replicate_multipliers:
      one multiplier per replicate column, for "stratified-jackknife" only (required there);
      replicate_centre: "full-sample" (default: deviations from the full-sample estimate) or
      "replicate-mean"; the rules: `replicates.supplied_option_problems`); fay, replicates,
      seed for the replicate methods; level: interval level; interval: for proportions,
      "korn-graubard" (default), "logit" or "t" (means, totals and ratios: t intervals; quantiles:
      the Woodruff interval); interpolate_quantiles: columns of whole-number answers whose quantiles
      use the grouped-data rule (`quantiles` module docstring); source: the file name used in error messages; single_psu: "error",
      "certainty", "grand-mean" or "collapse" (collapse_with);
      classes + calibration_matrix: calibration residuals in Taylor (see `taylor`) and in the
      within-PSU term of the jackknife with a first-stage FPC; classes +
      reweight: `weight` then holds the adjusted base weights and reweight maps (R, C) class
      weight totals to (R, C) class factors (the weighting recipe's replay): final weights are
      base * f(class), and replicate methods replay the recipe in every replicate.
    df: the design's for whole-sample rows; a domain's own (PSUs with respondents in its base minus
    strata with respondents in its base, at least 1) for the domains of `by`.
    reason: why an estimate, its SE or its design effect is missing (empty domain, zero
    denominator, one respondent or one PSU: no variance, a Woodruff interval collapsed on a tie, a
    quantile, which has no design effect).
    Formulas: `taylor`, `design`, `deff`, `intervals`, `quantiles` module docstrings.
    """
    return estimate_table(
        frame, weight=weight, strata=strata, psu=psu, population_size=population_size,
        sampling_fraction=sampling_fraction, psu_ids=psu_ids, mean=mean, total=total, count=count,
        proportion=proportion, ratio=ratio, quantile=quantile, by=by, variance=variance,
        replicate_cols=replicate_cols, replicate_multiplier=replicate_multiplier, replicate_method=replicate_method,
        replicate_df=replicate_df, replicate_multipliers=replicate_multipliers, replicate_centre=replicate_centre,
        fay=fay, replicates=replicates, seed=seed, level=level, single_psu=single_psu,
        collapse_with=collapse_with, classes=classes, calibration_matrix=calibration_matrix,
        reweight=reweight, source=source, second_stage_fraction=second_stage_fraction, interval=interval,
        interpolate_quantiles=interpolate_quantiles, first_stage=first_stage, psu_inclusion=psu_inclusion,
    ).frame


def _check_request(frame: pl.DataFrame, design: SampleDesign, **req: object) -> None:
    """Every problem with the request at once: unknown columns, nothing requested, unknown method."""
    source = req["source"] if isinstance(req["source"], str) else None
    problems: list[Problem] = []
    wanted: list[str] = [*design.columns]
    for key in ("mean", "total", "count", "proportion"):
        wanted += _as_list(req[key])
    for a, b in _parse_ratios(req["ratio"]):
        wanted += [a, b]
    wanted += [c for c, _ in _parse_quantiles(req["quantile"])]
    if req["by"] is not None:
        wanted.append(str(req["by"]))
    if req["classes"] is not None:
        wanted.append(str(req["classes"]))
    for col in dict.fromkeys(wanted):
        if col not in frame.columns:
            problems.append(Problem(rule="missing-column", message="column not in the data", file=source, column=col))
    options = []
    if not any(_as_list(req[k]) for k in ("mean", "total", "count", "proportion", "ratio", "quantile")) and not req["means_of"]:
        options.append(("ask for at least one mean, total, count, proportion, ratio or quantile", None))
    if req["variance"] not in VARIANCE_METHODS:
        options.append((f"variance must be one of {', '.join(VARIANCE_METHODS)}", str(req["variance"])))
    if req["interval"] not in INTERVAL_KINDS:
        options.append((f"interval must be one of {', '.join(INTERVAL_KINDS)}", str(req["interval"])))
    supplied = req["variance"] == "supplied"
    made_with = (req["replicate_method"] or "sdr") if supplied else req["variance"]
    if supplied and not req["replicate_cols"]:
        options.append(("supplied replicate weights need replicate_cols (a pattern or a list)", None))
    for key, given, applies, where in (
        ("replicate_cols", req["replicate_cols"] is not None, supplied, 'variance = "supplied"'),
        ("replicate_method", req["replicate_method"] is not None, supplied, 'variance = "supplied"'),
        ("replicate_df", req["replicate_df"] is not None, supplied, 'variance = "supplied"'),
        ("replicate_multipliers", req["replicate_multipliers"] is not None, supplied, 'variance = "supplied"'),
        ("replicate_centre", req["replicate_centre"] != "full-sample", supplied, 'variance = "supplied"'),
        ("fay", bool(req["fay"]), supplied or made_with == "fay", "the fay method"),
        ("replicates", req["replicates"] is not None, req["variance"] == "bootstrap", 'variance = "bootstrap"'),
        ("seed", req["seed"] is not None, req["variance"] == "bootstrap", 'variance = "bootstrap"'),
    ):
        if given and not applies:
            options.append((f"{key} applies to {where} only; it does not apply to {made_with}", None))
    if supplied:  # the rules of supplied replicate weights (`replicates.supplied_option_problems`)
        from pipeline.estimation.replicates import supplied_option_problems

        names = {"replicate_method": "replicate_method", "fay": "fay", "multiplier": "replicate_multiplier",
                 "multipliers": "replicate_multipliers", "df": "replicate_df", "centre": "replicate_centre"}
        for key, message, value in supplied_option_problems(
            made_with, fay=req["fay"], multiplier=req["replicate_multiplier"],
            multipliers=None if req["replicate_multipliers"] is None else list(req["replicate_multipliers"]),  # type: ignore[call-overload]
            df=req["replicate_df"], centre=req["replicate_centre"],
        ):
            options.append((f"{names[key]}: {message}", None if value is None else str(value)))
    if req["variance"] != "taylor" and design.psu_inclusion is not None:
        options.append(("the (1 - pi) approximation of a pps first stage is for Taylor linearization; replicate "
                        "methods use the with-replacement form: drop the PSU inclusion probabilities", None))
    if req["variance"] == "supplied" and design.has_fpc:
        options.append(("supplied replicate weights carry their own variance recipe; drop the FPC", None))
    if (req["reweight"] is not None or req["calibration_matrix"] is not None) and req["classes"] is None:
        options.append(("a weighting replay or calibration matrix needs the weighting-class column (classes)", None))
    problems += [Problem(rule="bad-option", message=m, value=v) for m, v in options]
    weight = design.weight
    if supplied and isinstance(req["replicate_cols"], str) and re.fullmatch(req["replicate_cols"], weight):
        message = (f"the replicate-column pattern also matches the full-sample weight column '{weight}'; "
                   "anchor it so only the replicate columns match")
        problems.append(Problem(rule="bad-option", message=message, file=source, column=weight,
                                value=str(req["replicate_cols"])))
    if weight in frame.columns and not frame.schema[weight].is_numeric():
        message = f"the weight column is not numeric ({frame.schema[weight]})"
        problems.append(Problem(rule="bad-weight", message=message, file=source, column=weight))
    if problems:
        raise SpecError("the estimation request is invalid", problems)


def _ratios(plan: _Plan, gt: GroupTotals) -> Ratios:
    return Ratios(
        num=[gt.column(c.num) for c in plan.cells],
        den=[gt.column(c.den) if c.den is not None else -1 for c in plan.cells],
    )


def _replicate_variance(
    frame: pl.DataFrame,
    gt: GroupTotals,
    plan: _Plan,
    ratios: Ratios,
    theta: np.ndarray,
    *,
    variance: str,
    replicate_cols: str | Sequence[str] | None,
    replicate_multiplier: float | None,
    replicate_method: str,
    fay: float,
    replicates: int | None,
    seed: int | None,
    replicate_df: int | None,
    replicate_multipliers: Sequence[float] | None,
    replicate_centre: str,
    weight: str,
    reweight: Callable[[np.ndarray], np.ndarray] | None,
    layout: PsuLayout | None,
    certainty: bool,
    source: str | None,
) -> tuple[np.ndarray, float]:
    """Replicate variances and df (`pipeline.estimation.replicates` and `replicate_variance`).

    Generated replicates: PSU factors from the design's `layout` (strata after collapsing, their
    sampling fractions f_h; lone PSUs kept at factor 1 when `certainty`), replicate totals from
    the group totals (the recipe replayed per replicate when `reweight` is given). Supplied replicate weights:
    replicate totals W' Y from the weight columns, multiplier `replicate_multiplier` (default from
    `replicate_method`).
    """
    from pipeline.estimation import replicates as rep
    from pipeline.estimation.replicate_variance import replicate_df as df_of
    from pipeline.estimation.replicate_variance import replicate_variance

    if variance == "supplied":
        rf, rep_totals = supplied_replicates(
            frame, plan.quantities, replicate_cols, weight=weight, method=replicate_method, fay=fay,
            multiplier=replicate_multiplier, multipliers=replicate_multipliers, df=replicate_df,
            centre=replicate_centre, source=source,
        )
    else:
        if layout is None:
            raise ValueError("generated replicates need the design's PSU layout")
        rf = rep.make_replicates(
            variance, layout.psu_stratum, fay=fay, replicates=replicates, seed=seed,
            sampling_fraction=layout.fraction if layout.has_fpc else None, stratum_labels=layout.stratum_labels,
            single_psu="certainty" if certainty else "error",
        )
        if replicate_multiplier is not None:
            rf = replace(rf, multiplier=float(replicate_multiplier))
        rep_totals = rep.replicate_totals(gt, rf, reweight=reweight, base=WEIGHT_QUANTITY if reweight else None)
    v = replicate_variance(theta, ratios.value(rep_totals), rf)
    return np.where(np.isfinite(theta), v, np.nan), df_of(rf)


def supplied_replicates(
    frame: pl.DataFrame,
    quantities: Mapping[str, pl.Expr],
    replicate_cols: str | Sequence[str] | None,
    *,
    weight: str,
    method: str,
    fay: float = 0.0,
    multiplier: float | None = None,
    multipliers: Sequence[float] | None = None,
    df: int | None = None,
    centre: str = "full-sample",
    source: str | None = None,
) -> tuple[ReplicateFactors, np.ndarray]:
    """The variance recipe and the replicate totals (R, K) of `quantities` from replicate-weight columns
    shipped with the data: `replicates.supplied_factors` and `replicates.supplied_replicate_totals`.

    replicate_cols: a regular expression matched against whole column names, or a list of names;
    SpecError when they include the full-sample `weight`. Used by `estimate_table` and by the banner
    tables (`pipeline.tables.fit`), so both read the same replicates the same way.
    """
    from pipeline.estimation import replicates as rep

    cols = _replicate_columns(frame, replicate_cols)
    if weight in cols:
        problem = Problem(rule="bad-option", message="the replicate columns include the full-sample weight",
                          column=weight)
        raise SpecError("the replicate columns are invalid", [problem])
    rf = rep.supplied_factors(method, len(cols), fay=fay, multiplier=multiplier, df=df, centre=centre,
                              multipliers=None if multipliers is None else np.asarray(multipliers, dtype=np.float64))
    return rf, rep.supplied_replicate_totals(frame, dict(quantities), cols, source=source)


def _replicate_columns(frame: pl.DataFrame, replicate_cols: str | Sequence[str] | None) -> list[str]:
    """Replicate weight columns: a regular expression matched against whole names, or a list of names."""
    if isinstance(replicate_cols, str):
        pattern = re.compile(replicate_cols)
        cols = [c for c in frame.columns if pattern.fullmatch(c)]
    else:
        cols = list(replicate_cols or [])
    if not cols:
        message = "the replicate-column pattern matches no column"
        problem = Problem(rule="no-replicates", message=message, value=str(replicate_cols))
        raise SpecError("no replicate weight columns", [problem])
    return cols


NO_RESPONDENTS = "no respondents with an answer"
NO_DOMAIN_RESPONDENTS = "no respondents in this domain with an answer"
ZERO_DENOMINATOR = "denominator total is 0"
ONE_RESPONDENT = "one respondent: the variance cannot be estimated (no standard error, interval or design effect)"
ONE_PSU = ("the respondents are all in one PSU: the variance cannot be estimated (no standard error, interval or "
           "design effect)")
TIED_QUANTILE = ("the Woodruff interval collapses to a point (a tied value, or a proportion below the quantile "
                 "with no variance): no standard error or interval can be given (no design effect for a quantile)")
QUANTILE_DEFF = "no design effect for a quantile (its interval comes from the proportion below it)"
NO_SRS_VARIANCE = "no design effect: the simple-random-sampling variance is 0 or cannot be estimated"
INTERVAL_KINDS: tuple[str, ...] = ("korn-graubard", "logit", "t")
TOTALS: tuple[str, ...] = ("total", "count")  # estimates that are totals (den = -1)


def _table(
    plan: _Plan,
    gt: GroupTotals,
    ratios: Ratios,
    t: np.ndarray,
    theta: np.ndarray,
    v: np.ndarray,
    df: float,
    cdfs: dict,
    *,
    level: float,
    method: str,
    has_fpc: bool,
    df_layout: PsuLayout | None,
    interval_kind: str,
) -> EstimateTable:
    """Assemble the rows: estimates, SEs, intervals, design effects, bases, degrees of freedom and reasons.

    Degrees of freedom: the design's (`PsuLayout.df`, or the replicate df) for whole-sample rows; a
    domain row (of `by`) gets the domain's own, PSUs with respondents in its base minus strata with
    respondents in its base, at least 1 (`PsuLayout.domain_df`), and never more than the design's.
    Supplied replicate weights carry no PSUs, so their rows keep the declared df.
    No variance: a mean, proportion, ratio or quantile whose base has one respondent or lies in a
    single PSU has a variance of 0 by construction, not by evidence: no SE, interval or design
    effect, and `reason` says why. Proportions get the interval `interval_kind` (default
    Korn-Graubard), quantiles the Woodruff interval, everything else the t interval.
    """
    cells = plan.cells
    col = gt.column
    base_idx = np.array([col(c.base) for c in cells])
    n = gt.counts.sum(axis=0)[base_idx]
    base_w = t[base_idx]
    t0 = np.append(t, 0.0)  # index len(t) stands for an absent moment (0)

    def moments(names: list[str | None]) -> np.ndarray:
        return t0[[col(name) if name is not None else len(t) for name in names]]

    s_nn, s_nd, s_dd = (moments([getattr(c, k) for c in cells]) for k in ("s_nn", "s_nd", "s_dd"))
    sum_wz2 = deff_mod.second_moment(ratios, t, s_nn=s_nn, s_nd=s_nd, s_dd=s_dd)
    sum_wz = np.where(ratios.is_total, t[ratios.num], 0.0)
    # a domain total is the total of y * 1[domain] over the whole sample, whose size is random under
    # SRS: its reference is an SRS of the variable's whole-sample base (`deff` module docstring)
    srs_idx = np.array([col(f"base|{c.variable}|") if c.statistic in TOTALS and c.domain else col(c.base)
                        for c in cells])
    srs_n = gt.counts.sum(axis=0)[srs_idx]
    v_srs = deff_mod.srs_variance(sum_wz2=sum_wz2, sum_wz=sum_wz, base_weight=t[srs_idx], base_n=srs_n, fpc=has_fpc)
    deff = deff_mod.design_effect(v, v_srs)
    n_eff = deff_mod.effective_n(srs_n, deff)
    present = gt.psu_totals((gt.counts[:, base_idx] > 0).astype(np.float64)) > 0  # (P, m)
    psus_present = present.sum(axis=0)
    design_df = np.full(len(cells), max(float(df), 1.0))
    is_domain = np.array([bool(c.domain) for c in cells])
    df_cells = design_df.copy()
    if df_layout is not None:
        df_cells = np.where(is_domain, np.minimum(design_df, df_layout.domain_df(present)), design_df)
    se = np.sqrt(np.maximum(v, 0.0))
    est = theta.copy()
    is_prop = np.array([c.statistic == "proportion" for c in cells])
    low, high = interval_for(est, se, n, df_cells, level=level, kind="t", proportion=False)
    if is_prop.any() and interval_kind != "t":
        p_low, p_high = interval_for(est[is_prop], se[is_prop], n[is_prop], df_cells[is_prop], level=level,
                                 kind=interval_kind, proportion=True)  # type: ignore[arg-type]
        low[is_prop], high[is_prop] = p_low, p_high
    tcrit = np.asarray(intervals.critical_value(level, df_cells), dtype=np.float64)
    reason = np.full(len(cells), "", dtype=object)
    missing = np.zeros(len(cells), dtype=bool)
    no_variance = np.zeros(len(cells), dtype=bool)
    no_deff = np.zeros(len(cells), dtype=bool)
    for i, c in enumerate(cells):
        if base_w[i] <= 0 or n[i] == 0:
            reason[i], missing[i] = NO_DOMAIN_RESPONDENTS if c.domain else NO_RESPONDENTS, True
        elif not np.isfinite(theta[i]):
            reason[i], missing[i] = ZERO_DENOMINATOR, True
        elif c.statistic not in TOTALS and n[i] == 1:
            reason[i], no_variance[i] = ONE_RESPONDENT, True
        elif c.statistic not in TOTALS and psus_present[i] < 2:
            reason[i], no_variance[i] = ONE_PSU, True
        if c.statistic == "quantile" and not missing[i]:
            cdf = cdfs[c.variable][c.domain]
            est[i] = float(cdf.interpolated_quantile(c.prob) if c.interpolated else cdf.quantile(c.prob))
            no_deff[i] = True
            if not no_variance[i]:
                low[i], high[i], se[i] = woodruff_interval(cdf, c.prob, se[i], float(tcrit[i]),
                                                           interpolated=c.interpolated)
                if not high[i] > low[i]:
                    reason[i], no_variance[i] = TIED_QUANTILE, True
            if not reason[i]:
                reason[i] = QUANTILE_DEFF
        elif not missing[i] and not no_variance[i] and not np.isfinite(deff[i]):
            reason[i] = NO_SRS_VARIANCE
    for arr in (est, se, low, high, deff, n_eff):
        arr[missing] = np.nan
    for arr in (se, low, high, deff, n_eff):
        arr[no_variance] = np.nan
    deff[no_deff], n_eff[no_deff] = np.nan, np.nan
    frame = pl.DataFrame(
        {
            "statistic": [c.statistic for c in cells],
            "variable": [c.variable for c in cells],
            "category": [c.category for c in cells],
            "domain": [c.domain for c in cells],
            "estimate": est,
            "se": se,
            "ci_low": low,
            "ci_high": high,
            "df": df_cells,
            "deff": deff,
            "n": n.astype(np.int64),
            "n_eff": n_eff,
            "reason": reason.astype(str).tolist(),
            "method": [method] * len(cells),
        }
    ).select(*COLUMNS, "method")
    numeric = ("estimate", "se", "ci_low", "ci_high", "deff", "n_eff")
    return EstimateTable(frame.with_columns(pl.col(c).fill_nan(None) for c in numeric))
