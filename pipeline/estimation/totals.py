"""The one grouped pass over respondents: weighted totals by (stratum, PSU, weighting class).

Every estimator, every Taylor variance and every replicate variance in `pipeline.estimation`
works on these group totals, never on respondent rows again (see ../shared/DESIGN.md):

    Y[g, k] = sum_{i in g} w_i * y_ik,      g = (stratum h, PSU j, weighting class c)

A quantity y_k is a polars expression evaluated per respondent: a category indicator
`(pl.col("q1") == 3).cast(pl.Float64)`, a numeric column with nulls replaced by 0 together with a
separate "answered" indicator, or either of those multiplied by a domain indicator. Domains are
therefore columns of Y, never row subsets, so a domain's variance uses every PSU of the design.

How the pass is computed (the per-respondent work is done once, in a few narrow passes):
1. each column the pass reads is coded once as integers that sort as its values do: an integer
   column of a narrow range by arithmetic (code = value - min, no sort), any other by dense rank
   (`_Factor`). Combinations of columns are mixed-radix codes made dense with one bincount, and
   keep each combination's code in every column, so the values of a combination are decoded
   from the codes, never looked up in the rows. The group key g = (stratum, PSU, class) is
   such a combination: integers 0..G-1 in sorted order;
2. quantities are split by the set S of columns they read (`Expr.meta.root_names`). For a
   row-wise expression y_k = phi_k(x_S), the respondents of g with the same values u of x_S
   share y_k, so Y[g, k] = sum_u W[g, u] phi_k(u) with W[g, u] the weight total of the
   respondents of g whose x_S equals u. W comes from one weighted bincount over (g, u) and the
   counts N[g, u] of the non-zero-weight respondents from one unweighted bincount (run beside it
   in a second thread); phi_k is evaluated on the U distinct value combinations only. A quantity
   non-zero on one combination (a category, in a banner column or not) takes the row W[., u]
   times its value, copied into place; the others take Y = W @ Phi, one matrix product (dense,
   or sparse when G x U is large), the counts likewise with 1[phi_k(u) != 0]. A banner of 10
   columns by a question of 10 codes is then one bincount over 100 combinations instead of 100
   weighted sums over n rows;
3. an expression that is not provably row-wise (any node outside `_ROW_WISE_FUNCTIONS`, e.g. an
   aggregation, a window, a shift), or that reads columns with many distinct value combinations
   (a continuous measure: more than MAX_COMBINATIONS in a sample of rows), is evaluated on the
   full frame and summed per group index by a polars group_by, at most `BATCH_CELLS` values at a time;
4. results are staged with one contiguous row per quantity, (K, G), and transposed into the
   C-ordered (G, K) matrices at the end (totals and counts at once, in two threads).
The result equals the direct sum to rounding (property-tested against it).
"""

from __future__ import annotations

import functools
import json
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import polars as pl

from pipeline.errors import DataError, Problem

if TYPE_CHECKING:
    from scipy import sparse

DENSE_CELLS = 2**23  # largest G x U weight matrix built dense (64 MiB); above it, a sparse matrix
BATCH_CELLS = 2**24  # largest block of evaluated quantity values held at once (128 MiB)
SPARSE_SHARE = 0.25  # quantity values multiplied as a sparse matrix when at most this share is non-zero
MAX_COMBINATIONS = 512  # columns with more distinct value combinations (in a sample) are summed row by row
SAMPLE_ROWS = 4096  # rows looked at to count the combinations
_ROW_WISE_FUNCTIONS = frozenset(
    {"FillNull", "Abs", "Negate", "Sign", "Floor", "Ceil", "Log", "Exp", "IsNull", "IsNotNull", "IsNan",
     "IsNotNan", "IsFinite", "IsInfinite", "Not", "AnyHorizontal", "AllHorizontal", "IsIn", "IsBetween", "Pow",
     "Clip", "Round"}
)


@dataclass(frozen=True)
class GroupTotals:
    """Totals of weighted quantities by group g = (stratum h, PSU j, weighting class c) -- the one grouped pass.

    Groups are sorted by (stratum, PSU, class); PSU indices are sorted by stratum, so
    `psu_stratum` is non-decreasing. `counts[g, k]` counts respondents of g with y_ik != 0 and a
    non-zero weight (a zero-weight respondent is no part of any unweighted base).
    """

    stratum: np.ndarray  # (G,) int64 stratum index 0..H-1
    psu: np.ndarray  # (G,) int64 PSU index 0..P-1, unique across strata
    cls: np.ndarray  # (G,) int64 weighting-class index 0..C-1 (all 0 when no classes)
    totals: np.ndarray  # (G, K) float64: sum_{i in g} w_i * y_ik
    counts: np.ndarray  # (G, K) int64: respondents in g with y_ik != 0 and w_i != 0
    columns: tuple[str, ...]  # names of the K quantities
    psu_stratum: np.ndarray  # (P,) stratum index of each PSU
    stratum_labels: tuple[str, ...]
    psu_labels: tuple[str, ...]
    # (G, K) float64: sum_{i in g} w_i^2 * y_ik, from the same pass when `group_totals(squared=True)`
    # (the moments of the within-PSU term, `taylor.within_psu_variance`); None otherwise
    squared: np.ndarray | None = None

    @property
    def n_strata(self) -> int:
        """H, the number of strata."""
        return len(self.stratum_labels)

    @property
    def n_psus(self) -> int:
        """P, the number of PSUs (over all strata)."""
        return len(self.psu_stratum)

    @property
    def n_classes(self) -> int:
        """C, the number of weighting classes (1 + the largest class index)."""
        return int(self.cls.max()) + 1 if len(self.cls) else 0

    @functools.cached_property
    def _column_index(self) -> dict[str, int]:
        """Quantity name -> index, built once (tables look up tens of thousands of names)."""
        return {name: k for k, name in enumerate(self.columns)}

    def column(self, name: str) -> int:
        """Index of the quantity `name` in `columns` (KeyError naming the known columns otherwise)."""
        try:
            return self._column_index[name]
        except KeyError:
            raise KeyError(f"no quantity '{name}' in the group totals; known: {', '.join(self.columns)}") from None

    def psu_totals(self, values: np.ndarray | None = None) -> np.ndarray:
        """Sum group rows within PSU: (G, m) -> (P, m); default `values` = `totals`."""
        return sum_by(self.psu, self.totals if values is None else values, self.n_psus)

    def class_totals(self, values: np.ndarray | None = None) -> np.ndarray:
        """Sum group rows within weighting class: (G, m) -> (C, m); default `values` = `totals`."""
        return sum_by(self.cls, self.totals if values is None else values, self.n_classes)


def sum_by(index: np.ndarray, values: np.ndarray, size: int) -> np.ndarray:
    """out[k] = sum of values[g] over g with index[g] == k: (G, m) -> (size, m), by one sort and `np.add.reduceat`."""
    values = np.asarray(values, dtype=np.float64)
    out = np.zeros((size, values.shape[1]))
    if len(index) == 0:
        return out
    order = np.argsort(index, kind="stable")
    ordered = index[order]
    starts = np.flatnonzero(np.r_[True, ordered[1:] != ordered[:-1]])
    out[ordered[starts]] = np.add.reduceat(values[order], starts, axis=0)
    return out


def group_totals(
    frame: pl.DataFrame,
    quantities: dict[str, pl.Expr],
    *,
    weight: str,
    strata: str | None,
    psu: str | None,
    classes: str | None = None,
    psu_ids: str = "within-stratum",
    squared: bool = False,
) -> GroupTotals:
    """The one grouped pass: Y[g, k] = sum_{i in g} w_i y_ik and the unweighted counts (module docstring).

    strata None: one stratum; psu None: every respondent is its own PSU (single-stage design).
    psu_ids "within-stratum": PSU ids restart within each stratum (a PSU is the pair (stratum, id));
    "unique": ids are unique across strata, and an id found in two strata is an error.
    classes: a column of weighting-class indices (integers 0..C-1, used as they are, so they line
    up with the weighting recipe's classes) or of labels (indexed in sorted order).
    quantities: name -> expression evaluated per respondent (row-wise expressions of columns with
    few distinct value combinations take the combination path; others are summed row by row).
    squared: also sum w_i^2 y_ik in the same pass (`GroupTotals.squared`): one more weighted
    bincount per set of columns, no second pass over the rows.

    Raises DataError listing every problem: missing design columns, missing stratum/PSU/class/weight
    values, negative or non-finite weights, PSU ids repeated across strata under "unique", and
    quantities that evaluate to null or NaN.
    """
    if psu_ids not in ("within-stratum", "unique"):
        raise ValueError(f"psu_ids must be 'within-stratum' or 'unique', not {psu_ids!r}")
    problems = [
        Problem(rule="missing-column", message=f"the design names column '{col}', which is not in the data", column=col)
        for col in (weight, strata, psu, classes)
        if col is not None and col not in frame.columns
    ]
    if problems:
        raise DataError("the data lack design columns", problems)
    problems = _design_problems(frame, weight=weight, strata=strata, psu=psu, classes=classes)
    names = tuple(quantities)
    w = frame[weight].cast(pl.Float64).to_numpy().astype(np.float64)
    cache: dict[str, _Factor] = {}
    key = _GroupKey.build(frame, strata=strata, psu=psu, classes=classes, cache=cache)
    staged = _Staged.empty(len(names), key.size, squared=squared)
    weights = _Weights(w, w * w if squared else None, None if np.all(w != 0) else w != 0)
    groups = _by_columns(quantities)
    last_use = {c: i for i, cols in enumerate(groups) for c in cols or ()}
    for i, (cols, ks) in enumerate(groups.items()):
        exprs = [(k, quantities[names[k]]) for k in ks]
        if cols is not None and _few_combinations(frame, cols):
            _combination_totals(frame, cols, exprs, key=key, weights=weights, cache=cache, out=staged)
            for c in cols:  # a column's codes are dropped after the last set of columns that reads it
                if last_use[c] == i:
                    cache.pop(c, None)
        else:
            _row_totals(frame, exprs, key=key, weights=weights, out=staged)
    bad = staged.missing
    problems += [
        Problem(
            rule="missing-quantity",
            message=f"quantity '{name}' is null or NaN (replace missing answers by 0 and add an 'answered' indicator)",
            count=int(bad[k]),
        )
        for k, name in enumerate(names)
        if bad[k]
    ]
    if problems:
        raise DataError("the data cannot be estimated from", problems)
    if psu_ids == "unique" and psu is not None:
        _check_unique_psus(key, psu=psu)
    cls = key.class_index(frame, classes=classes)
    totals, counts, squares = staged.transposed()
    return GroupTotals(
        stratum=key.stratum,
        psu=key.psu,
        cls=cls,
        totals=totals,
        counts=counts,
        columns=names,
        psu_stratum=key.psu_stratum,
        stratum_labels=key.stratum_labels,
        psu_labels=key.psu_labels,
        squared=squares,
    )


@dataclass(frozen=True)
class _Weights:
    """The pass's per-respondent weights: w, w^2 when the squared moments are wanted, the non-zero mask."""

    w: np.ndarray  # (n,)
    w2: np.ndarray | None  # (n,) w * w, or None
    kept: np.ndarray | None  # (n,) w != 0, or None when every weight is non-zero


@dataclass(frozen=True)
class _Staged:
    """The results while they are filled: one contiguous row per quantity, (K, G), transposed at the end.

    counts are sums of products of integers below 2**53, so exact in float64 where a product
    computes them, and stored as integers as they are.
    """

    totals: np.ndarray  # (K, G) float64
    counts: np.ndarray  # (K, G) int64
    missing: np.ndarray  # (K,) rows where the quantity is null or NaN
    squared: np.ndarray | None  # (K, G) float64 sums of w^2 y, or None

    @staticmethod
    def empty(n_quantities: int, n_groups: int, *, squared: bool) -> _Staged:
        """Room for K quantities over G groups (every row is written once before `transposed`)."""
        return _Staged(
            np.empty((n_quantities, n_groups)),
            np.empty((n_quantities, n_groups), dtype=np.int64),
            np.zeros(n_quantities, dtype=np.int64),
            np.empty((n_quantities, n_groups)) if squared else None,
        )

    def put(
        self, batch: list[int], weighted: np.ndarray, nonzero: np.ndarray, squared: np.ndarray | None = None
    ) -> None:
        """Rows `batch` from (b, G) totals, counts and (when staged) squared-weight totals."""
        self.totals[batch], self.counts[batch] = weighted, nonzero
        if self.squared is not None:
            self.squared[batch] = squared

    def transposed(self) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        """(G, K) C-ordered totals, counts and squared totals: transposing copies, the counts in a
        second thread (numpy releases the GIL)."""
        with ThreadPoolExecutor(max_workers=1) as pool:
            counts = pool.submit(np.ascontiguousarray, self.counts.T)
            totals = np.ascontiguousarray(self.totals.T)
            squared = None if self.squared is None else np.ascontiguousarray(self.squared.T)
            return totals, counts.result(), squared


def _design_problems(
    frame: pl.DataFrame, *, weight: str, strata: str | None, psu: str | None, classes: str | None
) -> list[Problem]:
    """Missing stratum/PSU/class values and missing, non-finite or negative weights, counted in one pass."""
    w = pl.col(weight).cast(pl.Float64)
    checks = frame.select(
        *[pl.col(c).is_null().sum().alias(k) for k, c in (("s", strata), ("p", psu), ("c", classes)) if c is not None],
        w.is_null().sum().alias("w_null"),
        (~w.is_finite()).sum().alias("w_inf"),
        (w < 0).sum().alias("w_neg"),
    ).row(0, named=True)
    problems: list[Problem] = []
    for key, col, what in (("s", strata, "stratum"), ("p", psu, "PSU"), ("c", classes, "weighting class")):
        if col is not None and checks[key]:
            problems.append(
                Problem(rule="missing-design-value", message=f"missing {what} values", column=col, count=checks[key])
            )
    for key, message in (
        ("w_null", "missing weights"),
        ("w_inf", "weights that are not finite numbers"),
        ("w_neg", "negative weights"),
    ):
        if checks[key]:
            problems.append(Problem(rule="bad-weight", message=message, column=weight, count=checks[key]))
    return problems


def _dense(code: np.ndarray, size: int) -> tuple[np.ndarray, int, np.ndarray, np.ndarray]:
    """Renumber integer codes in [0, size) to 0..m-1 keeping their order.

    Returns (codes, m, the m distinct old codes sorted, the number of rows of each new code).
    """
    if size <= 4 * len(code) + 1024:
        rows = np.bincount(code, minlength=size)
        distinct = np.flatnonzero(rows)
        m = len(distinct)
        return (code if m == size else (np.cumsum(rows > 0) - 1)[code]), m, distinct, rows[distinct]
    distinct, inverse, rows = np.unique(code, return_inverse=True, return_counts=True)
    return inverse.reshape(-1), len(distinct), distinct, rows


@dataclass(frozen=True)
class _Factor:
    """A column coded as integers in [0, size) that sort as its values do (null after every value).

    An integer column of a narrow range is coded by arithmetic, code = value - offset, so no code
    need be taken (`values` decodes); any other column by dense rank, `holder` giving each code's value.
    """

    codes: np.ndarray  # (n,) int64 code of each row
    size: int  # codes lie in [0, size)
    holder: pl.Series | None = None  # rank coding: the value of each code
    offset: int = 0  # integer coding: value = code + offset
    null_code: int | None = None  # integer coding: the code of a null, when the column has nulls
    dtype: pl.DataType = pl.Int64  # integer coding: the column's dtype

    @staticmethod
    def of(series: pl.Series) -> _Factor:
        """Code a column. Floats are told apart by bit pattern (0.0 and -0.0, NaN and null stay distinct
        values) after being ordered by rank, so an expression can never see two different values as one."""
        dtype = series.dtype
        coded = series.cast(pl.UInt8) if dtype == pl.Boolean else series
        n, nulls = len(series), coded.null_count()
        if coded.dtype.is_integer() and coded.dtype != pl.UInt64 and nulls < n:
            lo, hi = int(coded.min()), int(coded.max())  # type: ignore[arg-type]
            if hi - lo <= 4 * n:
                values = coded.cast(pl.Int64).fill_null(hi + 1) if nulls else coded.cast(pl.Int64)
                codes = values.to_numpy() - lo if lo else values.to_numpy()
                null_code = hi - lo + 1 if nulls else None
                return _Factor(codes, hi - lo + 1 + bool(nulls), offset=lo, null_code=null_code, dtype=dtype)
        is_null = coded.is_null().to_numpy()
        ranks = coded.rank("dense").fill_null(0).to_numpy().astype(np.int64)
        ranks = np.where(is_null, ranks.max(initial=0) + 1, ranks)
        by_rank = (ranks, int(ranks.max(initial=0)) + 1)
        if dtype.is_float():
            bits = np.unique(coded.cast(pl.Float64).fill_null(0.0).to_numpy().view(np.int64), return_inverse=True)[1]
            codes, m, *_ = _combine([by_rank, (bits.reshape(-1), int(bits.max(initial=-1)) + 1)], n)
        else:
            codes, m, *_ = _dense(*by_rank)
        rows = np.empty(m, dtype=np.int64)
        rows[codes] = np.arange(n, dtype=np.int64)  # some row holding each code (every row of a code holds its value)
        return _Factor(codes, m, holder=series.gather(rows))

    @staticmethod
    def constant(n: int, value: object) -> _Factor:
        """One code for every row (no code at all when there are no rows)."""
        return _Factor(np.zeros(n, dtype=np.int64), 1 if n else 0, holder=pl.Series([value] if n else []))

    @staticmethod
    def row_numbers(n: int) -> _Factor:
        """Each row its own code, its value the row number."""
        return _Factor(np.arange(n, dtype=np.int64), n)

    def values(self, codes: np.ndarray) -> pl.Series:
        """The column's value of each code in `codes`, in the column's dtype."""
        if self.holder is not None:
            return self.holder.gather(codes)
        values = pl.Series(codes + self.offset, dtype=pl.Int64)
        if self.null_code is not None and (missing := np.flatnonzero(codes == self.null_code)).size:
            values = values.scatter(missing, None)
        return values.cast(self.dtype)

    @property
    def pair(self) -> tuple[np.ndarray, int]:
        """(codes, size), as `_combine` takes them."""
        return self.codes, self.size


def _combine(columns: list[tuple[np.ndarray, int]], n: int) -> tuple[np.ndarray, int, np.ndarray, np.ndarray]:
    """Codes of the value combinations of several coded columns, in lexicographic order.

    Returns (codes 0..m-1, m, levels, rows): levels (m, number of columns) holds each combination's
    code in each column, so values of the combinations come from the columns' values without
    looking at rows again; rows (m,) counts the rows of each combination.
    """
    code, size = None, 1
    levels, radices = np.zeros((1, 0), dtype=np.int64), []
    for values, m in columns:
        if code is not None and size * m >= 2**62:
            code, size, levels, _ = _compact(code, size, levels, radices)
            radices = []
        code, size = (values if code is None else code * m + values), size * m
        radices.append(m)
    return _compact(np.zeros(n, dtype=np.int64) if code is None else code, size, levels, radices)


def _compact(
    code: np.ndarray, size: int, levels: np.ndarray, radices: list[int]
) -> tuple[np.ndarray, int, np.ndarray, np.ndarray]:
    """Renumber mixed-radix codes code = (...(l * r_1 + d_1) * r_2 + d_2 ...) densely; the levels of each new code."""
    code, m, distinct, rows = _dense(code, size)
    digits = []
    for r in reversed(radices):
        distinct, digit = np.divmod(distinct, r)
        digits.append(digit)
    return code, m, np.column_stack([levels[distinct], *reversed(digits)]).astype(np.int64, copy=False), rows


@dataclass(frozen=True)
class _GroupKey:
    """Each respondent's group g = (stratum, PSU, class) as 0..G-1 in sorted order, and the indices per group."""

    g: np.ndarray  # (n,) group of each respondent
    size: int  # G
    stratum: np.ndarray  # (G,) stratum index (codes are dense and in sort order, so they are the indices)
    psu: np.ndarray  # (G,) PSU index
    class_code: np.ndarray  # (G,) rank of the class value among the classes present
    class_values: pl.Series  # (G,) the class value of each group
    psu_stratum: np.ndarray  # (P,)
    psu_values: pl.Series  # (P,) the PSU id of each PSU (its row number when every respondent is a PSU)
    stratum_labels: tuple[str, ...]
    psu_labels: tuple[str, ...]

    @staticmethod
    def build(
        frame: pl.DataFrame,
        *,
        strata: str | None,
        psu: str | None,
        classes: str | None,
        cache: dict[str, _Factor],
    ) -> _GroupKey:
        n = frame.height
        s = _cached(frame, strata, cache) if strata else _Factor.constant(n, "all")
        p = _cached(frame, psu, cache) if psu else _Factor.row_numbers(n)
        c = _cached(frame, classes, cache) if classes else _Factor.constant(n, 0)
        g, size, levels, _ = _combine([s.pair, p.pair, c.pair], n)
        stratum, n_strata, stratum_codes, _ = _dense(levels[:, 0], s.size)
        psu_index, _, psu_levels, _ = _combine([(stratum, n_strata), (levels[:, 1], p.size)], size)
        psu_values = p.values(psu_levels[:, 1])
        return _GroupKey(
            g=g,
            size=size,
            stratum=stratum,
            psu=psu_index,
            class_code=_dense(levels[:, 2], c.size)[0],
            class_values=c.values(levels[:, 2]),
            psu_stratum=psu_levels[:, 0],
            psu_values=psu_values,
            stratum_labels=tuple(str(v) for v in s.values(stratum_codes).to_list()),
            psu_labels=tuple(str(v) for v in psu_values.to_list()),
        )

    def class_index(self, frame: pl.DataFrame, *, classes: str | None) -> np.ndarray:
        """(G,) weighting-class index: the integer class value itself, or the rank of a label among the labels."""
        if classes is None:
            return np.zeros(self.size, dtype=np.int64)
        if not frame.schema[classes].is_integer():
            return self.class_code
        cls = self.class_values.to_numpy().astype(np.int64)
        if len(cls) and cls.min() < 0:
            problem = Problem(rule="bad-class", message="weighting-class indices must be 0..C-1", value=str(cls.min()))
            raise DataError("negative weighting-class index", [problem])
        return cls


def _cached(frame: pl.DataFrame, column: str, cache: dict[str, _Factor]) -> _Factor:
    if column not in cache:
        cache[column] = _Factor.of(frame[column])
    return cache[column]


def _is_row_wise(node: object) -> bool:
    """Whether a serialised polars expression is built only from row-wise nodes (`_ROW_WISE_FUNCTIONS`).

    Anything else (aggregations, windows, shifts, ranges, Series literals, regex column selections,
    or a serialisation this code does not know) answers False, which only costs speed.
    """
    if not isinstance(node, dict) or len(node) != 1:
        return False
    kind, body = next(iter(node.items()))
    if kind == "Column":
        return isinstance(body, str) and not (body.startswith("^") and body.endswith("$"))
    if kind == "Literal":
        return isinstance(body, dict) and set(body) <= {"Dyn", "Scalar"}
    if kind == "Alias":
        return isinstance(body, list) and len(body) == 2 and _is_row_wise(body[0])
    if not isinstance(body, dict):
        return False
    if kind == "Cast":
        return _is_row_wise(body.get("expr"))
    if kind == "BinaryExpr":
        return _is_row_wise(body.get("left")) and _is_row_wise(body.get("right"))
    if kind == "Ternary":
        return all(_is_row_wise(body.get(k)) for k in ("predicate", "truthy", "falsy"))
    if kind == "Function":
        inputs = body.get("input")
        return (
            _function_name(body.get("function")) in _ROW_WISE_FUNCTIONS
            and isinstance(inputs, list)
            and all(_is_row_wise(i) for i in inputs)
        )
    return False


def _function_name(function: object) -> str | None:
    """The name of a serialised polars function: "FillNull", {"Pow": ...} -> "Pow", {"Boolean": "IsNull"} -> "IsNull"."""
    if isinstance(function, str):
        return function
    if not isinstance(function, dict) or len(function) != 1:
        return None
    name, inner = next(iter(function.items()))
    if name != "Boolean":
        return name
    if isinstance(inner, dict) and len(inner) == 1:
        return next(iter(inner))
    return inner if isinstance(inner, str) else None


@functools.lru_cache(maxsize=16384)
def _serialised_row_wise(text: str) -> bool:
    """`_is_row_wise` of a serialised expression, remembered: the next wave asks about the same expressions."""
    return _is_row_wise(json.loads(text))


def _by_columns(quantities: dict[str, pl.Expr]) -> dict[tuple[str, ...] | None, list[int]]:
    """Quantity indices by the sorted set of columns they read; None collects the not provably row-wise ones."""
    out: dict[tuple[str, ...] | None, list[int]] = {}
    for k, expr in enumerate(quantities.values()):
        try:
            row_wise = _serialised_row_wise(expr.meta.serialize(format="json"))
        except Exception:  # noqa: BLE001 -- an expression polars cannot serialise takes the full-frame path
            row_wise = False
        key = tuple(sorted(set(expr.meta.root_names()))) if row_wise else None
        out.setdefault(key, []).append(k)
    return out


def _few_combinations(frame: pl.DataFrame, columns: tuple[str, ...]) -> bool:
    """Whether `columns` take few enough distinct value combinations for the combination path.

    Judged on SAMPLE_ROWS evenly spaced rows (a guess that only decides speed, never the result).
    """
    if not columns:
        return True
    n = frame.height
    sample = frame.select(columns)
    if n > SAMPLE_ROWS:
        sample = sample.gather(np.linspace(0, n - 1, SAMPLE_ROWS).astype(np.int64))
    return sample.n_unique() <= MAX_COMBINATIONS


def _combination_totals(
    frame: pl.DataFrame,
    columns: tuple[str, ...],
    exprs: list[tuple[int, pl.Expr]],
    *,
    key: _GroupKey,
    weights: _Weights,
    cache: dict[str, _Factor],
    out: _Staged,
) -> None:
    """Totals of row-wise quantities of `columns`: W[g, u] from one bincount, the quantities on the U combinations."""
    combos = _Combos.build(frame, columns, cache=cache)
    pairs = _PairMatrix.build(key.g, key.size, combos.u, combos.size, weights)
    for batch, values in combos.evaluate(exprs):
        missing = np.isnan(values)
        out.missing[batch] = np.rint(combos.rows @ missing).astype(np.int64)
        pairs.put(np.where(missing, 0.0, values), batch, out)


def _row_totals(
    frame: pl.DataFrame, exprs: list[tuple[int, pl.Expr]], *, key: _GroupKey, weights: _Weights, out: _Staged
) -> None:
    """Totals of quantities evaluated on the full frame (as any polars select would), then summed per group.

    A polars group_by on the group index, at most BATCH_CELLS values at a time (the squared-weight
    sums, when wanted, in the same aggregation).
    """
    step = max(1, BATCH_CELLS // max(frame.height, 1))
    group = pl.Series("__g", key.g)
    weight = [pl.Series("__w", weights.w)] + ([] if weights.w2 is None else [pl.Series("__w2", weights.w2)])
    for s in range(0, len(exprs), step):
        batch = exprs[s : s + step]
        names = [f"__q{k}" for k, _ in batch]
        values = frame.with_columns(e.cast(pl.Float64).alias(q) for (_, e), q in zip(batch, names, strict=True))
        values = values.select(names).with_columns(group, *weight)
        missing = values.select((pl.col(q).is_null() | pl.col(q).is_nan()).sum() for q in names).row(0)
        squares = [] if weights.w2 is None else [(pl.col("__w2") * pl.col(q)).sum().alias(q + "_2") for q in names]
        grouped = values.group_by("__g").agg(
            *[(pl.col("__w") * pl.col(q)).sum().alias(q) for q in names],
            *[((pl.col("__w") != 0) & (pl.col(q) != 0)).sum().cast(pl.Int64).alias(q + "_n") for q in names],
            *squares,
        )
        index = grouped["__g"].to_numpy()

        def spread(columns: list[str], dtype: type) -> np.ndarray:
            block = np.zeros((len(batch), key.size), dtype=dtype)
            block[:, index] = grouped.select(columns).to_numpy().T
            return block

        rows = [k for k, _ in batch]
        squared = None if weights.w2 is None else spread([q + "_2" for q in names], np.float64)
        out.put(rows, spread(names, np.float64), spread([q + "_n" for q in names], np.int64), squared)
        out.missing[rows] = missing


@dataclass(frozen=True)
class _Combos:
    """The distinct value combinations u of a set of columns: each respondent's u, and the rows of each u."""

    u: np.ndarray  # (n,) combination of each respondent
    size: int  # U
    source: pl.DataFrame  # (U, columns) the values of each combination, in the frame's dtypes
    rows: np.ndarray  # (U,) respondents per combination

    @staticmethod
    def build(frame: pl.DataFrame, columns: tuple[str, ...], *, cache: dict[str, _Factor]) -> _Combos:
        factors = [_cached(frame, c, cache) for c in columns]
        u, size, levels, rows = _combine([f.pair for f in factors], frame.height)
        pairs = enumerate(zip(columns, factors, strict=True))
        source = pl.DataFrame([f.values(levels[:, j]).alias(c) for j, (c, f) in pairs])
        if not columns:  # a frame of no columns still needs one row per combination
            source = pl.DataFrame({"__combination": np.arange(size)})
        return _Combos(u, size, source, rows.astype(np.float64))

    def evaluate(self, exprs: list[tuple[int, pl.Expr]]) -> Iterator[tuple[list[int], np.ndarray]]:
        """(indices, (U, b) values) of the quantities, evaluated on one row per combination, b columns at a time."""
        source = self.source
        step = max(1, BATCH_CELLS // max(self.size, 1))
        for s in range(0, len(exprs), step):
            batch = exprs[s : s + step]
            names = [f"__q{k}" for k, _ in batch]
            values = source.with_columns(e.cast(pl.Float64).alias(q) for (_, e), q in zip(batch, names, strict=True))
            out = values.select(names).to_numpy().astype(np.float64).reshape(self.size, len(batch))
            yield [k for k, _ in batch], out


@dataclass(frozen=True)
class _PairMatrix:
    """W[g, u] = sum of weights and N[g, u] = number of non-zero weights of the respondents in g with combination u.

    Held dense as (U, G) when G x U <= DENSE_CELLS, else as sparse (G, U) matrices; N as integers.
    `squares` holds the sums of squared weights in the same layout when the pass wants them.
    """

    weights: np.ndarray | sparse.csr_matrix
    counts: np.ndarray | sparse.csr_matrix
    squares: np.ndarray | sparse.csr_matrix | None

    @staticmethod
    def build(g: np.ndarray, n_groups: int, u: np.ndarray, n_combos: int, weights: _Weights) -> _PairMatrix:
        def sums(pair: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
            # independent passes over the rows; numpy releases the GIL in bincount, so on a machine
            # with a free core the count (and the squared weights) run beside the weighted sum
            kept = weights.kept
            with ThreadPoolExecutor(max_workers=1) as pool:
                counted = pool.submit(np.bincount, pair if kept is None else pair[kept], None, size)
                squared = None if weights.w2 is None else pool.submit(np.bincount, pair, weights.w2, size)
                total = np.bincount(pair, weights=weights.w, minlength=size)
                return total, counted.result(), None if squared is None else squared.result()

        if n_groups * n_combos <= DENSE_CELLS:
            shape = (n_combos, n_groups)
            total, counted, squared = sums(u * n_groups + g, n_groups * n_combos)
            return _PairMatrix(
                total.reshape(shape), counted.reshape(shape), None if squared is None else squared.reshape(shape)
            )
        from scipy import sparse

        pair, m, distinct, _ = _dense(g * n_combos + u, n_groups * n_combos)
        index = np.divmod(distinct, n_combos)
        shape = (n_groups, n_combos)
        total, counted, squared = sums(pair, m)
        return _PairMatrix(
            sparse.csr_matrix((total, index), shape=shape),
            sparse.csr_matrix((counted, index), shape=shape),
            None if squared is None else sparse.csr_matrix((squared, index), shape=shape),
        )

    def put(self, phi: np.ndarray, batch: list[int], out: _Staged) -> None:
        """Rows `batch` of the totals and counts from (U, b) quantity values per combination.

        Y[k, g] = sum_u phi[u, k] W[u, g] and counts sum_u 1[phi[u, k] != 0] N[u, g] (the squared
        totals as Y with the squared-weight sums). A quantity non-zero on one combination u_k only
        (a category, in a banner column or not) has rows phi[u_k, k] W[u_k] and N[u_k], copied
        straight into place from a dense W; the others are matrix products.
        """
        from scipy import sparse

        indicator = phi != 0
        if isinstance(self.weights, np.ndarray):
            single = indicator.sum(axis=0) == 1
            if single.any():
                self._select(phi[:, single], indicator[:, single].argmax(axis=0), np.asarray(batch)[single], out)
                if single.all():
                    return
                phi, indicator, batch = phi[:, ~single], indicator[:, ~single], np.asarray(batch)[~single].tolist()
        indicator = indicator.astype(np.int64)
        if not isinstance(self.weights, np.ndarray):
            squared = None if self.squares is None else np.asarray(self.squares @ phi).T
            out.put(batch, np.asarray(self.weights @ phi).T, np.asarray(self.counts @ indicator).T, squared)
        elif np.count_nonzero(indicator) <= SPARSE_SHARE * indicator.size:  # integer counts stay integers
            phi_t = sparse.csr_matrix(phi.T)
            squared = None if self.squares is None else np.asarray(phi_t @ self.squares)
            out.put(batch, np.asarray(phi_t @ self.weights), sparse.csr_matrix(indicator.T) @ self.counts, squared)
        else:  # BLAS: counts below 2**53 multiply exactly in float64
            squared = None if self.squares is None else phi.T @ self.squares
            counts = indicator.T.astype(np.float64) @ self.counts.astype(np.float64)
            out.put(batch, phi.T @ self.weights, counts, squared)

    def _select(self, phi: np.ndarray, chosen: np.ndarray, rows: np.ndarray, out: _Staged) -> None:
        """Rows rows[i] = phi[chosen[i], i] * W[chosen[i]] and N[chosen[i]], by runs of consecutive rows."""
        scale = phi[chosen, np.arange(len(chosen))]
        starts = np.flatnonzero(np.r_[True, rows[1:] != rows[:-1] + 1])
        for a, e in zip(starts.tolist(), [*starts[1:].tolist(), len(rows)], strict=True):
            np.take(self.weights, chosen[a:e], axis=0, out=out.totals[rows[a] : rows[a] + e - a])
            np.take(self.counts, chosen[a:e], axis=0, out=out.counts[rows[a] : rows[a] + e - a])
            if self.squares is not None and out.squared is not None:
                np.take(self.squares, chosen[a:e], axis=0, out=out.squared[rows[a] : rows[a] + e - a])
        scaled = np.flatnonzero(scale != 1.0)
        if len(scaled):
            out.totals[rows[scaled]] *= scale[scaled, None]
            if out.squared is not None:
                out.squared[rows[scaled]] *= scale[scaled, None]


def _check_unique_psus(key: _GroupKey, *, psu: str) -> None:
    """PSU ids declared unique across strata must each lie in one stratum."""
    ids = key.psu_values
    per_id = pl.DataFrame({"id": ids, "h": key.psu_stratum}).group_by("id").agg(pl.col("h").n_unique().alias("k"))
    shared = per_id.filter(pl.col("k") > 1)
    if shared.height:
        raise DataError(
            "PSU ids repeat across strata",
            [
                Problem(
                    rule="psu-in-several-strata",
                    message="these PSU ids appear in more than one stratum although PSU ids were declared unique "
                    "across strata; if ids restart within each stratum declare so "
                    '(psu_ids = "within-stratum" in the spec, --psu-ids within-stratum on the command line)',
                    column=psu,
                    count=shared.height,
                    examples=tuple(str(v) for v in shared["id"].sort().head(5).to_list()),
                )
            ],
        )
