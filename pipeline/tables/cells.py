"""Banner cells: every stub row in every banner column of one wave, from one grouped pass.

For stub row r (a category, net, item or "missing" row: a percentage; or the mean or median of a
numeric or rating variable) and banner column d (a domain indicator, `pipeline.tables.banners`):

    percentage  p_rd = sum_i w_i y_ri a_i d_i / sum_i w_i a_i d_i         (y_ri the row's 0/1 indicator,
    mean        m_rd = sum_i w_i x_i a_i d_i / sum_i w_i a_i d_i           a_i the stub's base indicator)
    balance     100 x the mean of z_i = 1[plus] - 1[minus] (a rating's balance score), with the t interval
    median      the weighted median of x among a_i d_i = 1, with its Woodruff (1952) interval

with standard errors from the design (`pipeline.tables.fit`), the Korn and Graubard (1998) interval
for percentages and the t interval for means, both with the domain's degrees of freedom (PSUs with
domain members minus strata with domain members, `PsuLayout.domain_df`), the design effect and the
effective base n / deff (Kish 1965 section 8.2). Rows are those of the wave's topline layout
(`pipeline.tables.topline`), so the Total column of a banner table is the weighted topline. Degrees of
freedom, and the missing SE of a cell on one respondent or in one PSU, are the core's (`api._table`).

For the Rao-Scott test of a single-choice stub against a single-choice break the plan also holds
the joint proportions p_rc = t(y_r a d_c) / t(a D) (D: the respondent is in some category column
of the break), whose numerators are the cells' own.

Flags (";"-separated, as in the export): "low-base" (unweighted base below `low_base`),
"suppressed" (below `suppress_below`: the cell holds no number at all, its flag is explained in
the legend), "empty-column" (no respondent in the column's base: an empty cell with a note),
"set-by-weighting" (a percentage the weighting calibrates to a population figure: no sampling
error to show or test).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import polars as pl

from pipeline.estimation import api
from pipeline.tables.cells_export import EXPORT_SCHEMA
from pipeline.estimation.intervals import korn_graubard_interval, t_interval
from pipeline.staging.spec import Study
from pipeline.tables.banners import Banner, Column
from pipeline.tables.fit import Plan
from pipeline.tables.spec import TablesSpec
from pipeline.tables.weighted_cells import RATING_TYPES, SET_BY_WEIGHTING_SE, _row_expressions

# The export's columns (`pipeline.tables.cells_export.EXPORT_SCHEMA`) a banner cell has when it is
# estimated; the marks, the changes and the note are added by the tests, `row_kind` by the export.
CELL_COLUMNS: dict[str, pl.DataType] = {
    name: dtype for name, dtype in EXPORT_SCHEMA.items()
    if name not in ("row_kind", "sig_higher_than", "sig_higher_than_lighter", "vs_total", "change_from_previous",
                    "se_change", "change_mark", "note")
}
NUMBERS = ("estimate", "se", "ci_low", "ci_high", "df", "deff", "base_unweighted", "base_weighted", "base_effective")
EMPTY_NOTE = "no respondents in this column"


@dataclass(frozen=True)
class CellRef:
    """Where an estimator of the plan sits in the banner tables."""

    table: str
    variable: str
    row: int
    row_label: str
    banner: str
    column: Column
    statistic: str  # "percent", "balance" (100 x mean of 1[plus] - 1[minus]), "mean" or "median"
    estimator: int  # index of the estimator in the plan (joint proportions sit between stubs)


@dataclass
class WavePlan:
    """The plan of one wave: estimators, where they sit, the medians and the Rao-Scott joint cells."""

    plan: Plan = field(default_factory=Plan.empty)
    refs: list[CellRef] = field(default_factory=list)
    medians: dict[int, tuple[str, pl.Expr, bool]] = field(default_factory=dict)  # column, domain, interpolated
    derived: dict[str, pl.Expr] = field(default_factory=dict)  # derived column name -> expression
    # (table, banner, break variable) -> (row labels, column keys, (r, c) estimator indices)
    joints: dict[tuple[str, str, str], tuple[list[int], list[str], np.ndarray]] = field(default_factory=dict)
    # (estimator a, estimator b), a < b, of one stub row -> the quantities of the products of their
    # numerators and bases (y_na y_nb, y_na y_db, y_da y_nb, y_da y_db), for the within-PSU term
    cross: dict[tuple[int, int], tuple[str | None, ...]] = field(default_factory=dict)

    def pair_cross(self, a: np.ndarray, b: np.ndarray) -> list[tuple[str | None, ...]]:
        """The product quantities of each pair (a[k], b[k]) of cells of one stub row."""
        return [self.cross[(min(i, j), max(i, j))] for i, j in zip(a.tolist(), b.tolist(), strict=True)]

    def joint_cross(self, idx: np.ndarray) -> list[tuple[str | None, ...]]:
        """The product quantities of every pair of the joint cells `idx` (row-major): the stub's categories
        and the break's columns are disjoint, so y_a y_b = 0 unless a = b; every base is the joint base."""
        cells = self.plan.cells
        return [(cells[i].num if i == j else None, cells[i].num, cells[j].num, cells[i].den)
                for i in idx.tolist() for j in idx.tolist()]


def _key(expr: pl.Expr) -> str:
    return str(expr)


def plan_wave(study: Study, spec: TablesSpec, banners: dict[str, Banner], layout: pl.DataFrame, *,
              cross_cells: bool = False, into: WavePlan | None = None, medians: bool = True,
              joints: bool = True) -> WavePlan:
    """Every cell, median and joint proportion of one wave's banner tables (module docstring).

    cross_cells: also name the products of the quantities of every tested pair of cells (the
    within-PSU term of a two-stage design with an FPC needs them, `pipeline.tables.within`);
    into: add to this plan (the stacked waves of `pipeline.tables.stacked`); medians, joints:
    whether to plan the median cells and the Rao-Scott joint proportions.
    """
    wp = into if into is not None else WavePlan()
    plan = wp.plan
    for name, variable in study.variables.items():
        banner_spec = spec.banner_of(name)
        if banner_spec is None:
            continue
        banner = banners[banner_spec.name]
        columns = banner.for_stub(name)
        rows = layout.filter(pl.col("variable") == name)
        labels = dict(rows.select("row_order", "row_label").iter_rows())
        exprs = _row_expressions(variable, rows)
        bases = {_key(base): i for i, (_, _, _, base) in enumerate(exprs)}
        value = pl.col(name).cast(pl.Float64).fill_null(0.0).fill_nan(0.0) if variable.type != "multi" else None
        cell_index: dict[tuple[int, str], int] = {}
        pairs_of_row: dict[int, list[tuple[Column, int]]] = {}
        for column in columns:
            d = column.domain
            for order, kind, y, base in exprs:
                if kind == "median" and not medians:
                    continue
                base_q = plan.q(f"b|{name}|{bases[_key(base)]}|{column.key}", base & d)
                if kind == "median":
                    derived = f"__median|{name}"
                    wp.derived[derived] = pl.when(base).then(pl.col(name).cast(pl.Float64)).otherwise(None).alias(derived)
                    k = plan.add(api._Cell("quantile", name, "0.5", column.key, base_q, base_q, base_q,
                                           base_q, base_q, base_q, 0.5))
                    wp.medians[k] = (derived, d, variable.type in RATING_TYPES)
                    statistic = "median"
                elif kind == "mean":
                    num = plan.q(f"x|{name}|{column.key}", value * (base & d).cast(pl.Float64))
                    sq = plan.q(f"x2|{name}|{column.key}", value * value * (base & d).cast(pl.Float64))
                    k = plan.add(api._Cell("mean", name, "", column.key, num, base_q, base_q, sq, num, base_q))
                    statistic = "mean"
                elif kind == "balance":
                    inside = (base & d).cast(pl.Float64)
                    num = plan.q(f"z|{name}|{order}|{column.key}", y * inside)
                    sq = plan.q(f"z2|{name}|{order}|{column.key}", y * y * inside)
                    k = plan.add(api._Cell("mean", name, str(order), column.key, num, base_q, base_q, sq, num,
                                           base_q))
                    statistic = "balance"
                else:
                    num = plan.q(f"y|{name}|{order}|{column.key}", y & base & d)
                    k = plan.add(api._Cell("proportion", name, str(order), column.key, num, base_q, base_q,
                                           num, num, base_q))
                    statistic = "percent"
                    cell_index[(order, column.key)] = k
                wp.refs.append(CellRef(name, name, int(order), labels.get(order, ""), banner.name, column, statistic, k))
                if statistic != "median":
                    pairs_of_row.setdefault(order, []).append((column, k))
        if cross_cells:
            kinds = {order: (kind, y, base) for order, kind, y, base in exprs}
            for order, row_cells in pairs_of_row.items():
                kind, y, base = kinds[order]
                _cross_pairs(wp, name, order, kind, y, base, bases[_key(base)], value, row_cells)
        if joints and variable.type in ("single", "rating"):
            _joint_cells(wp, name, banner, columns, exprs, cell_index, study)
    return wp


def _cross_pairs(wp: WavePlan, name: str, order: int, kind: str, y: pl.Expr | None, base: pl.Expr, base_key: int,
                 value: pl.Expr | None, row_cells: list[tuple[Column, int]]) -> None:
    """The product quantities of every pair of one stub row's cells that a test compares.

    Two cells of one row multiply to the row's quantities in the intersection of their columns:
    the Total with a column gives the column; two columns of one single-choice break are disjoint
    (no product) or nested (the smaller one); other overlaps (items of a multiple-response break,
    nets that share codes) get the row's quantities in the intersection as new quantities.
    """
    plan = wp.plan
    total = [(c, k) for c, k in row_cells if c.kind == "total"]

    def own(k: int) -> tuple[str | None, ...]:
        cell = plan.cells[k]
        return (cell.s_nn, cell.num, cell.num, cell.base)

    def inter(a: Column, b: Column) -> tuple[str | None, ...]:
        d = a.domain & b.domain
        tag = f"{a.key}&{b.key}"
        base_q = plan.q(f"b|{name}|{base_key}|{tag}", base & d)
        if kind == "mean":
            num = plan.q(f"x|{name}|{tag}", value * (base & d).cast(pl.Float64))
            return (plan.q(f"x2|{name}|{tag}", value * value * (base & d).cast(pl.Float64)), num, num, base_q)
        if kind == "balance":
            num = plan.q(f"z|{name}|{order}|{tag}", y * (base & d).cast(pl.Float64))
            return (plan.q(f"z2|{name}|{order}|{tag}", y * y * (base & d).cast(pl.Float64)), num, num, base_q)
        num = plan.q(f"y|{name}|{order}|{tag}", y & base & d)
        return (num, num, num, base_q)

    for i, (a, ka) in enumerate(row_cells):
        if a.kind == "total":
            continue
        for tc, kt in total:
            wp.cross[(min(ka, kt), max(ka, kt))] = own(ka)
        for b, kb in row_cells[i + 1:]:
            if b.kind == "total" or b.break_variable != a.break_variable:
                continue
            if a.codes is not None and b.codes is not None:
                common = a.codes & b.codes
                products = ((None,) * 4 if not common else own(ka) if common == a.codes
                            else own(kb) if common == b.codes else inter(a, b))
            else:
                products = inter(a, b)
            wp.cross[(min(ka, kb), max(ka, kb))] = products


def _joint_cells(wp: WavePlan, name: str, banner: Banner, columns: tuple[Column, ...], exprs: list,
                 cell_index: dict[tuple[int, str], int], study: Study) -> None:
    """Joint proportions of the stub's categories by each single-choice break's categories (Rao-Scott)."""
    plan = wp.plan
    categories = [(order, base) for order, kind, _, base in exprs if kind == "category"]
    if len(categories) < 2:
        return
    answered = categories[0][1]
    for brk in banner.breaks():
        if study.variables[brk].type == "multi":
            continue
        cols = [c for c in columns if c.break_variable == brk and c.kind == "category"]
        if len(cols) < 2:
            continue
        joint_base = plan.q(f"jb|{name}|{brk}", answered & pl.any_horizontal([c.domain for c in cols]))
        idx = np.zeros((len(categories), len(cols)), dtype=np.int64)
        for i, (order, _) in enumerate(categories):
            for j, c in enumerate(cols):
                num = plan.cells[cell_index[(order, c.key)]].num
                idx[i, j] = plan.add(api._Cell("proportion", name, str(order), f"joint|{c.key}", num, joint_base,
                                               joint_base, num, num, joint_base))
        wp.joints[(name, banner.name, brk)] = ([o for o, _ in categories], [c.key for c in cols], idx)


def cell_frame(wave: str, wp: WavePlan, state: object, spec: TablesSpec, *, level: float,
               weighting_variables: set[str]) -> pl.DataFrame:
    """The banner cells of one wave with `CELL_COLUMNS` plus `estimator` (the index into the fit)."""
    m = len(wp.refs)
    at = np.array([r.estimator for r in wp.refs], dtype=np.int64)
    table = state.table  # type: ignore[attr-defined]
    est = table["estimate"].to_numpy().astype(float)[at]
    se = table["se"].to_numpy().astype(float)[at]
    low = table["ci_low"].to_numpy().astype(float)[at]
    high = table["ci_high"].to_numpy().astype(float)[at]
    deff = table["deff"].to_numpy().astype(float)[at]
    n = table["n"].to_numpy().astype(np.int64)[at]
    df = state.domain_df[at]  # type: ignore[attr-defined]
    statistic = np.array([r.statistic for r in wp.refs])
    percent = statistic == "percent"
    mean = (statistic == "mean") | (statistic == "balance")
    if percent.any():
        low[percent], high[percent] = korn_graubard_interval(est[percent], se[percent], n[percent], df[percent],
                                                             level=level)
    if mean.any():
        low[mean], high[mean] = t_interval(est[mean], se[mean], df[mean], level=level)
    with np.errstate(invalid="ignore"):
        fixed = percent & np.array([r.variable in weighting_variables for r in wp.refs]) & (se < SET_BY_WEIGHTING_SE) \
            & (est > 0) & (est < 1)
    se[fixed], low[fixed], high[fixed], deff[fixed] = 0.0, est[fixed], est[fixed], np.nan
    with np.errstate(divide="ignore", invalid="ignore"):
        n_eff = np.where(deff > 0, n / deff, np.nan)
    scale = np.where(percent | (statistic == "balance"), 100.0, 1.0)
    flags = []
    for i in range(m):
        f = []
        if n[i] == 0:
            f.append("empty-column")
        elif n[i] < spec.suppress_below:
            f.append("suppressed")
        if 0 < n[i] < spec.low_base:
            f.append("low-base")
        if fixed[i]:
            f.append("set-by-weighting")
        flags.append(";".join(f))
    refs = wp.refs
    frame = pl.DataFrame(
        {
            "wave": [wave] * m,
            "table": [r.table for r in refs],
            "variable": [r.variable for r in refs],
            "row": [r.row for r in refs],
            "row_label": [r.row_label for r in refs],
            "banner": [r.banner for r in refs],
            "column": [r.column.key for r in refs],
            "column_label": [r.column.label for r in refs],
            "break_variable": [r.column.break_variable for r in refs],
            "letter": [r.column.letter for r in refs],
            "statistic": statistic.tolist(),
            "estimate": est * scale,
            "se": se * scale,
            "ci_low": low * scale,
            "ci_high": high * scale,
            "df": df,
            "deff": deff,
            "base_unweighted": n,
            "base_weighted": state.base_weighted[at],  # type: ignore[attr-defined]
            "base_effective": n_eff,
            "flags": flags,
        },
        schema=CELL_COLUMNS,
    ).with_columns(pl.col(c).fill_nan(None) for c in NUMBERS if c != "base_unweighted")
    hidden = pl.col("flags").str.contains("suppressed|empty-column")
    frame = frame.with_columns(
        [pl.when(hidden).then(None).otherwise(pl.col(c)).alias(c) for c in NUMBERS]
    ).with_columns(estimator=pl.Series(at))
    return frame.with_columns(
        note=pl.when(pl.col("flags").str.contains("empty-column")).then(pl.lit(EMPTY_NOTE)).otherwise(None)
    )
