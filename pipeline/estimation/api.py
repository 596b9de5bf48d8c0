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

import numpy as np
import polars as pl

from pipeline.errors import DataError, Problem, SpecError
from pipeline.estimation import deff as deff_mod
from pipeline.estimation import intervals
from pipeline.estimation.design import PsuLayout, SampleDesign
from pipeline.estimation.estimands import Ratios
from pipeline.estimation.quantiles import weighted_cdfs, woodruff_interval
from pipeline.estimation.result import COLUMNS, EstimateTable, interval
from pipeline.estimation.taylor import Calibration, SquaredTotals, taylor_variance, within_psu_variance
from pipeline.estimation.totals import GroupTotals, group_totals

VARIANCE_METHODS: tuple[str, ...] = (
    "taylor", "jackknife", "stratified-jackknife", "brr", "fay", "bootstrap", "supplied"
)
# replicate methods that apply the first-stage FPC (1 - f_h) to the between-PSU deviations
# (`replicates` module docstring); they get the within-PSU term of the two-stage estimator too
FPC_REPLICATE_METHODS: tuple[str, ...] = ("jackknife", "stratified-jackknife")
WEIGHT_QUANTITY = "__weight"
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


def _as_list(value: object) -> list:
    if value is None:
        return []
    if isinstance(value, str | tuple):
        return [value]
    return list(value)


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

    def quantile(self, frame: pl.DataFrame, var: str, prob: float, point: float, dom: str, d: pl.Expr) -> None:
        base = self.q(f"base|{var}|{dom}", (_answered(var, frame) & d).cast(pl.Float64))
        below = pl.col(var).cast(pl.Float64).le(point).fill_null(False) if np.isfinite(point) else pl.lit(False)
        num = self.q(f"le|{var}|{prob!r}|{dom}", (below & d).cast(pl.Float64))
        self.cells.append(_Cell("quantile", var, f"{prob:g}", dom, num, base, base, num, num, base, prob))


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
    weight: str,
    strata: str | None = None,
    psu: str | None = None,
    population_size: str | Mapping[str, float] | float | None = None,
    sampling_fraction: str | Mapping[str, float] | float | None = None,
    psu_ids: str = "within-stratum",
    mean: str | Sequence[str] | None = None,
    total: str | Sequence[str] | None = None,
    proportion: str | Sequence[str] | None = None,
    ratio: tuple[str, str] | Sequence[tuple[str, str]] | None = None,
    quantile: tuple[str, float] | Sequence[tuple[str, float]] | None = None,
    by: str | None = None,
    variance: str = "taylor",
    replicate_cols: str | Sequence[str] | None = None,
    replicate_multiplier: float | None = None,
    replicate_method: str = "sdr",
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
) -> EstimateTable:
    """Design-based estimates as an `EstimateTable` (see `estimate` for the arguments)."""
    design = SampleDesign(
        weight=weight, strata=strata, psu=psu, psu_ids=psu_ids,  # type: ignore[arg-type]
        population_size=population_size, sampling_fraction=sampling_fraction,
        single_psu=single_psu, collapse_with=dict(collapse_with or {}),  # type: ignore[arg-type]
        second_stage_fraction=float(second_stage_fraction),
    )
    _check_request(frame, design, mean=mean, total=total, proportion=proportion, ratio=ratio, quantile=quantile,
                   by=by, variance=variance, replicate_cols=replicate_cols, classes=classes, source=source,
                   reweight=reweight, calibration_matrix=calibration_matrix)
    domains = _domains(frame, by)
    plan = _Plan()
    for dom, d in domains.items():
        for var in _as_list(mean):
            plan.mean_or_total(frame, var, dom, d, statistic="mean")
        for var in _as_list(total):
            plan.mean_or_total(frame, var, dom, d, statistic="total")
        for var in _as_list(proportion):
            plan.proportion(frame, var, dom, d, frame[var].drop_nulls().unique().sort().to_list())
        for num_col, den_col in _parse_ratios(ratio):
            plan.ratio(frame, num_col, den_col, dom, d)
    cdfs = {}
    quantiles = _parse_quantiles(quantile)
    cdf_frame, cdf_weight = frame, weight
    if quantiles and reweight is not None and classes is not None:
        final_weights = _final_weights(frame, weight=weight, classes=classes, reweight=reweight)
        cdf_frame, cdf_weight = frame.with_columns(final_weights), FINAL_WEIGHT
    for var, prob in quantiles:
        cdfs[var] = cdfs.get(var) or weighted_cdfs(cdf_frame, value=var, weight=cdf_weight, domains=domains)
        for dom, d in domains.items():
            point = float(cdfs[var][dom].quantile(prob))
            plan.quantile(frame, var, prob, point, dom, d)
    gt = group_totals(frame, plan.quantities, weight=weight, strata=strata, psu=psu, classes=classes, psu_ids=psu_ids)
    final = _final_totals(gt, reweight)
    ratios, t = _ratios(plan, gt), final.totals.sum(axis=0)
    fpc_values = design.fpc_values(frame)
    if variance == "taylor":
        layout = design.layout(final, fpc_values=fpc_values)
        calibration = None
        if calibration_matrix is not None:
            calibration = Calibration(np.asarray(calibration_matrix, dtype=np.float64), gt.column(WEIGHT_QUANTITY))
        within = None
        if layout.has_fpc and psu is not None and second_stage_fraction < 1:  # two-stage (`design` docstring)
            within = _within_psu(frame, plan, gt, final, ratios, calibration, weight=weight, strata=strata, psu=psu,
                                 classes=classes, psu_ids=psu_ids, reweight=reweight)
        theta, v = taylor_variance(final, ratios, layout, calibration=calibration, within=within)
        df: float = layout.df
        has_fpc = layout.has_fpc
    else:
        # generated replicates follow the design as the variance sees it: collapsed strata, f_h, lone PSUs
        layout = None if variance == "supplied" else design.layout(gt, fpc_values=fpc_values)
        theta = ratios.value(t)
        v, df = _replicate_variance(
            frame, gt, plan, ratios, theta, variance=variance, replicate_cols=replicate_cols,
            replicate_multiplier=replicate_multiplier, replicate_method=replicate_method, fay=fay, replicates=replicates,
            seed=seed, reweight=reweight, layout=layout, certainty=design.single_psu == "certainty", source=source,
        )
        has_fpc = layout is not None and layout.has_fpc
        if has_fpc and variance in FPC_REPLICATE_METHODS and psu is not None and second_stage_fraction < 1:
            # the jackknife scales the between-PSU deviations by (1 - f_h); the two-stage estimator then
            # adds the within-PSU term with weight f_h, as Taylor does (`design.PsuLayout.second_stage`)
            calibration = None
            if calibration_matrix is not None:
                calibration = Calibration(np.asarray(calibration_matrix, dtype=np.float64), gt.column(WEIGHT_QUANTITY))
            within = _within_psu(frame, plan, gt, final, ratios, calibration, weight=weight, strata=strata, psu=psu,
                                 classes=classes, psu_ids=psu_ids, reweight=reweight)
            v = v + layout.second_stage(within)
    return _table(plan, gt, ratios, t, theta, v, df, cdfs, level=level, method=variance, has_fpc=has_fpc)


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
    frame: pl.DataFrame, plan: _Plan, gt: GroupTotals, final: GroupTotals, ratios: Ratios,
    calibration: Calibration | None, *, weight: str, strata: str | None, psu: str | None, classes: str | None,
    psu_ids: str, reweight: Callable[[np.ndarray], np.ndarray] | None,
) -> np.ndarray:
    """(P, m) second-stage variances v2(z_hj) of the PSU totals of the linearized values (calibration
    residuals when `calibration` is given), for `PsuLayout.second_stage`."""
    squared = _squared_totals(frame, plan, gt, weight=weight, strata=strata, psu=psu, classes=classes,
                              psu_ids=psu_ids, reweight=reweight)
    return within_psu_variance(final, ratios, squared, weight_column=gt.column(WEIGHT_QUANTITY),
                               calibration=calibration)


def _squared_totals(
    frame: pl.DataFrame, plan: _Plan, gt: GroupTotals, *, weight: str, strata: str | None, psu: str | None,
    classes: str | None, psu_ids: str, reweight: Callable[[np.ndarray], np.ndarray] | None,
) -> SquaredTotals:
    """Sums of w_i^2 y_ik by group (w = base * f(c), the final weights), for the within-PSU term.

    A second grouped pass with the squared base weight, in the same groups as `gt`; each group is
    then scaled by f(c)^2."""
    squared_weight = "__squared_weight"
    sq = group_totals(frame.with_columns((pl.col(weight).cast(pl.Float64) ** 2).alias(squared_weight)), plan.quantities,
                      weight=squared_weight, strata=strata, psu=psu, classes=classes, psu_ids=psu_ids)
    if not (np.array_equal(sq.psu, gt.psu) and np.array_equal(sq.cls, gt.cls)):
        raise AssertionError("the squared-weight pass formed different groups")
    f = _group_factors(gt, reweight)

    def index(names: list[str | None]) -> np.ndarray:
        return np.array([gt.column(n) if n is not None else -1 for n in names], dtype=np.int64)

    cells = plan.cells
    return SquaredTotals(sq.totals * (f**2)[:, None], index([c.s_nn for c in cells]), index([c.s_nd for c in cells]),
                         index([c.s_dd for c in cells]))


def estimate(
    frame: pl.DataFrame,
    *,
    weight: str,
    strata: str | None = None,
    psu: str | None = None,
    population_size: str | Mapping[str, float] | float | None = None,
    sampling_fraction: str | Mapping[str, float] | float | None = None,
    psu_ids: str = "within-stratum",
    mean: str | Sequence[str] | None = None,
    total: str | Sequence[str] | None = None,
    proportion: str | Sequence[str] | None = None,
    ratio: tuple[str, str] | Sequence[tuple[str, str]] | None = None,
    quantile: tuple[str, float] | Sequence[tuple[str, float]] | None = None,
    by: str | None = None,
    variance: str = "taylor",
    replicate_cols: str | Sequence[str] | None = None,
    replicate_multiplier: float | None = None,
    replicate_method: str = "sdr",
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
) -> pl.DataFrame:
    """Design-based estimates, one row per estimate, as a polars DataFrame.

    Columns: statistic, variable, category, domain, estimate, se, ci_low, ci_high, df, deff, n,
    n_eff, reason, method. Options:
      weight (required), strata, psu, psu_ids ("within-stratum"/"unique"); for the finite population
      correction either population_size (the first-stage population size N_h: a column, a mapping
      stratum -> N_h, or one number without strata) or sampling_fraction (f_h: a column, a mapping
      stratum -> f_h, or one number for every stratum);
      second_stage_fraction: with an FPC and PSUs, the share of each selected PSU's units sampled
      (default 0, unknown: the within-PSU term is added in full; 1: whole PSUs, none is added);
      mean, total, proportion (column or list of columns), ratio ((num, den) or list of pairs),
      quantile ((column, q) or list of pairs); by (a column: adds one domain per level);
      variance: "taylor" (default) or a replicate method: "jackknife", "stratified-jackknife", "brr",
      "fay", "bootstrap", "supplied" (replicate_cols: a regular expression matched against whole
      column names or a list of names; replicate_method: how they were made, default "sdr";
      replicate_multiplier: the variance multiplier, default that of the method); fay, replicates,
      seed for the replicate methods; level: interval level (t intervals with the design df; quantiles: the
      Woodruff interval); source: the file name used in error messages; single_psu: "error",
      "certainty", "grand-mean" or "collapse" (collapse_with);
      classes + calibration_matrix: calibration residuals in Taylor (see `taylor`) and in the
      within-PSU term of the jackknife with a first-stage FPC; classes +
      reweight: `weight` then holds the adjusted base weights and reweight maps (R, C) class
      weight totals to (R, C) class factors (the weighting recipe's replay): final weights are
      base * f(class), and replicate methods replay the recipe in every replicate.
    A quantile row's deff and n_eff are those of the proportion F(q_hat) its interval comes from.
    Formulas: `taylor`, `design`, `deff`, `intervals`, `quantiles` module docstrings.
    """
    return estimate_table(
        frame, weight=weight, strata=strata, psu=psu, population_size=population_size,
        sampling_fraction=sampling_fraction, psu_ids=psu_ids, mean=mean, total=total,
        proportion=proportion, ratio=ratio, quantile=quantile, by=by, variance=variance,
        replicate_cols=replicate_cols, replicate_multiplier=replicate_multiplier, replicate_method=replicate_method,
        fay=fay, replicates=replicates, seed=seed, level=level, single_psu=single_psu,
        collapse_with=collapse_with, classes=classes, calibration_matrix=calibration_matrix,
        reweight=reweight, source=source, second_stage_fraction=second_stage_fraction,
    ).frame


def _check_request(frame: pl.DataFrame, design: SampleDesign, **req: object) -> None:
    """Every problem with the request at once: unknown columns, nothing requested, unknown method."""
    source = req["source"] if isinstance(req["source"], str) else None
    problems: list[Problem] = []
    wanted: list[str] = [*design.columns]
    for key in ("mean", "total", "proportion"):
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
    if not any(_as_list(req[k]) for k in ("mean", "total", "proportion", "ratio", "quantile")):
        options.append(("ask for at least one mean, total, proportion, ratio or quantile", None))
    if req["variance"] not in VARIANCE_METHODS:
        options.append((f"variance must be one of {', '.join(VARIANCE_METHODS)}", str(req["variance"])))
    if req["variance"] == "supplied" and not req["replicate_cols"]:
        options.append(("supplied replicate weights need replicate_cols (a pattern or a list)", None))
    if req["variance"] == "supplied" and design.has_fpc:
        options.append(("supplied replicate weights carry their own variance recipe; drop the FPC", None))
    if (req["reweight"] is not None or req["calibration_matrix"] is not None) and req["classes"] is None:
        options.append(("a weighting replay or calibration matrix needs the weighting-class column (classes)", None))
    problems += [Problem(rule="bad-option", message=m, value=v) for m, v in options]
    weight = design.weight
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
    from pipeline.estimation.replicate_variance import replicate_df, replicate_variance

    if variance == "supplied":
        cols = _replicate_columns(frame, replicate_cols)
        rf = rep.supplied_factors(replicate_method, len(cols), fay=fay, multiplier=replicate_multiplier)
        rep_totals = rep.supplied_replicate_totals(frame, plan.quantities, cols, source=source)
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
    return np.where(np.isfinite(theta), v, np.nan), replicate_df(rf)


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
) -> EstimateTable:
    """Assemble the rows: estimates, SEs, intervals, design effects, bases and reasons."""
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
    srs_idx = np.array([col(f"base|{c.variable}|") if c.statistic == "total" and c.domain else col(c.base)
                        for c in cells])
    srs_n = gt.counts.sum(axis=0)[srs_idx]
    v_srs = deff_mod.srs_variance(sum_wz2=sum_wz2, sum_wz=sum_wz, base_weight=t[srs_idx], base_n=srs_n, fpc=has_fpc)
    deff = deff_mod.design_effect(v, v_srs)
    se = np.sqrt(np.maximum(v, 0.0))
    est = theta.copy()
    low, high = interval(est, se, n, df, level=level, kind="t", proportion=False)
    tcrit = float(intervals.critical_value(level, df))
    reason = np.full(len(cells), "", dtype=object)
    for i, c in enumerate(cells):
        if base_w[i] <= 0 or n[i] == 0:
            reason[i] = "no respondents in this domain with an answer" if c.domain else "no respondents with an answer"
        elif not np.isfinite(theta[i]):
            reason[i] = "denominator total is 0"
        if c.statistic == "quantile" and not reason[i]:
            cdf = cdfs[c.variable][c.domain]
            est[i] = float(cdf.quantile(c.prob))
            low[i], high[i], se[i] = woodruff_interval(cdf, c.prob, se[i], tcrit)
    missing = reason != ""
    for arr in (est, se, low, high, deff):
        arr[missing] = np.nan
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
            "df": np.full(len(cells), float(df)),
            "deff": deff,
            "n": n.astype(np.int64),
            "n_eff": deff_mod.effective_n(srs_n, deff),
            "reason": reason.astype(str).tolist(),
            "method": [method] * len(cells),
        }
    ).select(*COLUMNS, "method")
    numeric = ("estimate", "se", "ci_low", "ci_high", "deff", "n_eff")
    return EstimateTable(frame.with_columns(pl.col(c).fill_nan(None) for c in numeric))
