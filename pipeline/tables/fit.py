"""One wave's banner estimates from one grouped pass, kept so that differences get their exact variance.

A banner table is many ratio estimators theta_k = t[num_k] / t[den_k] (`pipeline.estimation.
estimands.Ratios`): a stub row's percentage or mean within a banner column is the ratio of the
totals of y * d and a * d, where y is the row's quantity, a the stub's base indicator and d the
column's domain indicator (never a row subset). `fit_wave` builds those quantities, makes ONE
`group_totals` pass by (stratum, PSU, weighting class), and keeps what the variance of any linear
combination of the estimators needs:

  Taylor      the PSU totals z_hj (P, m) of every estimator's linearized variable, or of its
              calibration residual (Deville and Sarndal 1992), so that for a difference
              theta_a - theta_b the variance is `PsuLayout.variance(z_a - z_b)`: the covariance of
              columns that share PSUs, of a column and the Total that contains it, and of
              overlapping columns is in it exactly (Binder 1983; Woodruff 1971);
  replicates  the replicate estimates theta_r (R, m) (the weighting recipe replayed per replicate;
              supplied replicate weights, `DesignInputs.replicate_columns`, used as they are),
              so a difference has replicate estimates theta_ra - theta_rb (Wolter 2007 section 1.5,
              from memory).

The independent-samples shortcut v_a + v_b is never used within a wave.

With a first-stage FPC in a two-stage design (Taylor, and the jackknife methods that apply the FPC)
the variance of each estimate adds the within-PSU term, and so does the variance of a difference,
with the within-PSU covariance of the two estimates (`pipeline.tables.within`): the caller names
the products of the two estimators' quantities (`within.Cross`); without them a difference gets
no variance rather than a wrong one.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np
import polars as pl

from pipeline.estimation import api
from pipeline.estimation.design import PsuLayout, SampleDesign
from pipeline.estimation.estimands import Ratios
from pipeline.estimation.options import VarianceOptions
from pipeline.estimation.quantiles import weighted_cdfs
from pipeline.estimation.taylor import Calibration, _fitted
from pipeline.estimation.totals import GroupTotals, group_totals
from pipeline.tables.within import Cross, WithinTerms

CHUNK_VALUES = 2**24  # largest (groups x estimators) block of linearized values held at once (128 MiB)


@dataclass
class Plan:
    """The quantity expressions of one wave and the estimators (`api._Cell`) that read them.

    Duck-typed like `api._Plan` (attributes `quantities` and `cells`), so the core's `_table` and
    `_within_psu` read it unchanged. `medians`: estimator index -> (derived column, domain
    expression) for the quantile cells, whose quantities need the weighted CDF first.
    """

    quantities: dict[str, pl.Expr]
    cells: list[api._Cell]

    @staticmethod
    def empty() -> Plan:
        return Plan({api.WEIGHT_QUANTITY: pl.lit(1.0)}, [])

    def q(self, name: str, expr: pl.Expr) -> str:
        self.quantities.setdefault(name, expr.cast(pl.Float64))
        return name

    def add(self, cell: api._Cell) -> int:
        self.cells.append(cell)
        return len(self.cells) - 1


@dataclass(frozen=True)
class DesignInputs:
    """How one wave's rows are weighted and what design the variance follows."""

    design: SampleDesign
    options: VarianceOptions
    classes: str | None = None
    reweight: Callable[[np.ndarray], np.ndarray] | None = None
    calibration_matrix: np.ndarray | None = None
    final_weight: str | None = None  # per-respondent final weights, for the weighted CDF of medians
    replicate_columns: tuple[str, ...] = ()  # supplied replicate weights (options.method "supplied"), in order


@dataclass
class FitState:
    """Estimates of one wave, and what the variances of their differences need (module docstring)."""

    table: pl.DataFrame  # the core's EstimateTable frame, one row per estimator
    theta: np.ndarray  # (m,)
    variance: np.ndarray  # (m,)
    df: float  # design (or replicate) degrees of freedom
    domain_df: np.ndarray  # (m,)
    base_weighted: np.ndarray  # (m,) weight total of each estimator's base
    method: str
    layout: PsuLayout
    z: np.ndarray | None  # (P, m) Taylor: PSU totals of the linearized variables
    theta_r: np.ndarray | None  # (R, m) replicates
    factors: object | None  # ReplicateFactors
    within: WithinTerms | None  # the within-PSU term applies (module docstring)
    within_own: np.ndarray | None  # (P, m) c2_j(k, k) of every estimator
    columns: dict[str, int]  # quantity name -> column of the group totals

    def cross(self, rows: list[tuple[str | None, str | None, str | None, str | None]]) -> Cross:
        """`within.Cross` from quantity names (None: the product is 0)."""
        return Cross.of([tuple(-1 if n is None else self.columns[n] for n in row) for row in rows])

    def difference_variance(self, a: np.ndarray, b: np.ndarray, cross: Cross | None = None) -> np.ndarray:
        """(q,) variances of theta_a - theta_b, covariance included; NaN when the within-PSU term
        applies and `cross` (the products of a's and b's quantities) is not given."""
        a, b = np.asarray(a, dtype=np.int64), np.asarray(b, dtype=np.int64)
        if self.z is not None:
            v = self.layout.variance(self.z[:, a] - self.z[:, b])
        else:
            from pipeline.estimation.replicate_variance import replicate_variance

            v = replicate_variance(self.theta[a] - self.theta[b], self.theta_r[:, a] - self.theta_r[:, b],
                                   self.factors)
        if self.within is None:
            return v
        if cross is None:
            return np.full(len(a), np.nan)
        c2 = self.within_own[:, a] + self.within_own[:, b] - 2 * self.within.covariance_terms(a, b, cross)
        return v + self.layout.second_stage(np.maximum(c2, 0.0))

    def covariance(self, idx: np.ndarray, *, joint: bool = False) -> np.ndarray:
        """(k, k) covariance matrix of the estimators `idx`. With the within-PSU term it is known for the
        joint cells of a stub by a break only (`joint`, `WithinTerms.joint_covariance_terms`); NaN otherwise."""
        idx = np.asarray(idx, dtype=np.int64)
        if self.z is not None:
            cov = self.layout.covariance(self.z[:, idx])
        else:
            from pipeline.estimation.replicate_variance import replicate_covariance

            cov = replicate_covariance(self.theta[idx], self.theta_r[:, idx], self.factors)
        if self.within is None:
            return cov
        if not joint:
            return np.full((len(idx), len(idx)), np.nan)
        k = len(idx)
        c2 = self.within.joint_covariance_terms(idx).reshape(-1, k * k)
        return cov + self.layout.second_stage(c2).reshape(k, k)


def linearized_psu_totals(gt: GroupTotals, ratios: Ratios, *, calibration: Calibration | None) -> np.ndarray:
    """(P, m) PSU totals of the linearized variables (or calibration residuals) of `ratios`.

    Equal to `gt.psu_totals(taylor.linearized_group_totals(gt, ratios, calibration=...))`, but each
    ratio reads only its two columns: z_g = Y[g, num] / t_den - theta Y[g, den] / t_den (Woodruff
    1971), in blocks of estimators, so no dense (K, m) gradient is formed.
    """
    t = gt.totals.sum(axis=0)
    theta = ratios.value(t)
    den = ratios.denominators(t)
    with np.errstate(divide="ignore", invalid="ignore"):
        a = np.where(den != 0, np.where(ratios.is_total, 1.0, 1.0 / den), 0.0)
        b = np.where((den != 0) & ~ratios.is_total, -theta / den, 0.0)
    a, b = np.nan_to_num(a), np.nan_to_num(b)
    m = len(ratios)
    out = np.zeros((gt.n_psus, m))
    step = max(1, CHUNK_VALUES // max(1, gt.totals.shape[0]))
    den_idx = np.maximum(ratios.den, 0)
    for lo in range(0, m, step):
        sl = slice(lo, min(m, lo + step))
        z = gt.totals[:, ratios.num[sl]] * a[sl] + gt.totals[:, den_idx[sl]] * b[sl]
        if calibration is not None:
            w_g = gt.totals[:, calibration.weight_column]
            z = z - w_g[:, None] * _fitted(gt, z, calibration)[gt.cls]
        out[:, sl] = gt.psu_totals(z)
    return out


def fit_wave(frame: pl.DataFrame, plan: Plan, medians: Mapping[int, tuple[str, pl.Expr, bool]],
             inputs: DesignInputs, *, weight: str) -> FitState:
    """The one grouped pass of a wave and the estimates, variances and state of `plan` (module docstring).

    medians: estimator index -> (column, domain, interpolated): the quantity of a median is the
    proportion below it, 1[y <= q] or, for whole-number answers by the grouped-data rule,
    1[y < k] + lambda 1[y = k] (`pipeline.estimation.quantiles`), as in the core's `estimate_table`.
    Degrees of freedom are the core's: a domain's own (PSUs minus strata with domain members).
    """
    design, options = inputs.design, inputs.options
    cdfs: dict[str, dict[str, object]] = {}
    if medians:
        cdf_weight = inputs.final_weight or weight
        wanted: dict[str, dict[str, pl.Expr]] = {}  # column -> domain -> indicator: one CDF pass per column
        for k, (column, d, _) in medians.items():
            wanted.setdefault(column, {})[plan.cells[k].domain] = d
        found = {column: weighted_cdfs(frame, value=column, weight=cdf_weight, domains=domains)
                 for column, domains in wanted.items()}
        for k, (column, d, interpolated) in medians.items():
            cell = plan.cells[k]
            cdf = found[column][cell.domain]
            cdfs.setdefault(cell.variable, {})[cell.domain] = cdf
            y = pl.col(column)
            if interpolated and cdf.total > 0:
                idx, lam = cdf.interpolation_point(0.5)
                at = float(cdf.values[idx])
                below = (y.lt(at).cast(pl.Float64) + float(lam) * y.eq(at).cast(pl.Float64)).fill_null(0.0)
                num = plan.q(f"smooth|{column}|{cell.domain}", below * d.cast(pl.Float64))
            else:
                point = float(cdf.quantile(0.5))
                below = y.le(point).fill_null(False) if np.isfinite(point) else pl.lit(False)
                num = plan.q(f"le|{column}|{cell.domain}", (below & d).cast(pl.Float64))
            plan.cells[k] = api._Cell("quantile", cell.variable, "0.5", cell.domain, num, cell.base, cell.base,
                                      num, num, cell.base, 0.5, interpolated)
    # the squared-weight sums of the within-PSU term come from the same pass (used only in a two-stage design)
    gt = group_totals(frame, plan.quantities, weight=weight, strata=design.strata, psu=design.psu,
                      classes=inputs.classes, psu_ids=design.psu_ids,
                      squared=design.psu is not None and design.second_stage_fraction < 1)
    final = api._final_totals(gt, inputs.reweight)
    ratios = api._ratios(plan, gt)  # type: ignore[arg-type]
    t = final.totals.sum(axis=0)
    theta = ratios.value(t)
    layout = design.layout(gt, fpc_values=design.fpc_values(frame), inclusion=design.inclusion_values(frame, gt))
    calibration = None
    if inputs.calibration_matrix is not None:
        calibration = Calibration(np.asarray(inputs.calibration_matrix, dtype=np.float64),
                                  gt.column(api.WEIGHT_QUANTITY))
    two_stage = layout.has_fpc and design.psu is not None and design.second_stage_fraction < 1
    method = options.method
    z = theta_r = rf = None
    if method == "taylor":
        z = linearized_psu_totals(final, ratios, calibration=calibration)
        v = np.where(np.isfinite(theta), layout.variance(z), np.nan)
        df: float = float(layout.df)
    else:
        from pipeline.estimation import replicates as rep
        from pipeline.estimation.replicate_variance import replicate_df, replicate_variance

        if method == "supplied":  # the weights shipped with the data, used as they are (`api.supplied_replicates`)
            rf, rep_totals = api.supplied_replicates(
                frame, plan.quantities, list(inputs.replicate_columns), weight=weight,
                method=str(options.replicate_method), fay=options.fay, multiplier=options.multiplier,
                multipliers=options.multipliers, df=options.df, centre=options.centre,
            )
        else:
            rf = rep.make_replicates(
                method, layout.psu_stratum, fay=options.fay, replicates=options.replicates, seed=options.seed,
                sampling_fraction=layout.fraction if layout.has_fpc else None, stratum_labels=layout.stratum_labels,
                single_psu="certainty" if design.single_psu == "certainty" else "error",
            )
            rep_totals = rep.replicate_totals(gt, rf, reweight=inputs.reweight,
                                              base=api.WEIGHT_QUANTITY if inputs.reweight else None)
        theta_r = ratios.value(rep_totals)
        v = np.where(np.isfinite(theta), replicate_variance(theta, theta_r, rf), np.nan)
        df = float(replicate_df(rf))
    within = within_own = None
    if two_stage and (method == "taylor" or method in api.FPC_REPLICATE_METHODS):
        squared = api._squared_totals(plan, gt, reweight=inputs.reweight).totals  # type: ignore[arg-type]
        u = z if z is not None else linearized_psu_totals(final, ratios, calibration=calibration)
        within = WithinTerms.build(final, squared, ratios, calibration, u, weight_column=gt.column(api.WEIGHT_QUANTITY))
        col = gt.column
        own = Cross.of([(col(c.s_nn), col(c.s_nd), col(c.s_nd), col(c.s_dd)) for c in plan.cells])
        every = np.arange(len(plan.cells))
        within_own = within.covariance_terms(every, every, own)
        v = v + layout.second_stage(np.maximum(within_own, 0.0))
    table = api._table(plan, gt, ratios, t, theta, v, df, cdfs, level=options.level,  # type: ignore[arg-type]
                       method=method, has_fpc=layout.has_fpc, df_layout=None if method == "supplied" else layout,
                       interval_kind="t").frame
    base_idx = np.array([gt.column(c.base) for c in plan.cells], dtype=np.int64)
    return FitState(
        table=table, theta=theta, variance=v, df=df, domain_df=table["df"].to_numpy().astype(np.float64),
        base_weighted=t[base_idx], method=method, layout=layout, z=z, theta_r=theta_r, factors=rf,
        within=within, within_own=within_own, columns=gt._column_index,
    )
