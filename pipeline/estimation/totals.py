"""The one grouped pass over respondents: weighted totals by (stratum, PSU, weighting class).

Every estimator, every Taylor variance and every replicate variance in `pipeline.estimation`
works on these group totals, never on respondent rows again (see ../shared/DESIGN.md):

    Y[g, k] = sum_{i in g} w_i * y_ik,      g = (stratum h, PSU j, weighting class c)

A quantity y_k is a polars expression evaluated per respondent: a category indicator
`(pl.col("q1") == 3).cast(pl.Float64)`, a numeric column with nulls replaced by 0 together with a
separate "answered" indicator, or either of those multiplied by a domain indicator. Domains are
therefore columns of Y, never row subsets, so a domain's variance uses every PSU of the design.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

from pipeline.errors import DataError, Problem

_S, _P, _C, _W = "__stratum", "__psu", "__class", "__weight"


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

    def column(self, name: str) -> int:
        """Index of the quantity `name` in `columns` (KeyError naming the known columns otherwise)."""
        try:
            return self.columns.index(name)
        except ValueError:
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
    psu_ids: str = "nested",
) -> GroupTotals:
    """One polars group_by over respondents: Y[g, k] = sum_{i in g} w_i y_ik and the unweighted counts.

    strata None: one stratum; psu None: every respondent is its own PSU (single-stage design).
    psu_ids "nested": PSU ids restart within each stratum (a PSU is the pair (stratum, id));
    "unique": ids are unique across strata, and an id found in two strata is an error.
    classes: a column of weighting-class indices (integers 0..C-1, used as they are, so they line
    up with the weighting recipe's classes) or of labels (indexed in sorted order).

    Raises DataError listing every problem: missing design columns, missing stratum/PSU/class/weight
    values, negative or non-finite weights, PSU ids repeated across strata under "unique", and
    quantities that evaluate to null or NaN.
    """
    if psu_ids not in ("nested", "unique"):
        raise ValueError(f"psu_ids must be 'nested' or 'unique', not {psu_ids!r}")
    problems = [
        Problem(rule="missing-column", message=f"the design names column '{col}', which is not in the data", column=col)
        for col in (weight, strata, psu, classes)
        if col is not None and col not in frame.columns
    ]
    if problems:
        raise DataError("the data lack design columns", problems)
    names = tuple(quantities)
    qcols = [f"__q{k}" for k in range(len(names))]
    rows = frame.select(
        (pl.col(strata) if strata else pl.lit("all")).alias(_S),
        (pl.col(psu) if psu else pl.int_range(pl.len(), dtype=pl.Int64)).alias(_P),
        (pl.col(classes) if classes else pl.lit(0, dtype=pl.Int64)).alias(_C),
        pl.col(weight).cast(pl.Float64).alias(_W),
        *[expr.cast(pl.Float64).alias(q) for expr, q in zip(quantities.values(), qcols, strict=True)],
    )
    problems = _row_problems(rows, names, qcols, weight=weight, strata=strata, psu=psu, classes=classes)
    if problems:
        raise DataError("the data cannot be estimated from", problems)
    grouped = (
        rows.group_by(_S, _P, _C)
        .agg(
            *[(pl.col(_W) * pl.col(q)).sum().alias(q) for q in qcols],
            *[((pl.col(_W) != 0) & (pl.col(q) != 0)).sum().cast(pl.Int64).alias(q + "_n") for q in qcols],
        )
        .sort(_S, _P, _C)
    )
    if psu_ids == "unique" and psu is not None:
        _check_unique_psus(grouped, psu=psu)
    as_indices = classes is not None and rows.schema[_C].is_integer()
    return _from_grouped(grouped, names, qcols, classes_are_indices=as_indices)


def _row_problems(
    rows: pl.DataFrame,
    names: tuple[str, ...],
    qcols: list[str],
    *,
    weight: str,
    strata: str | None,
    psu: str | None,
    classes: str | None,
) -> list[Problem]:
    """Every per-row problem, counted in one pass."""
    checks = rows.select(
        pl.col(_S).is_null().sum().alias("s"),
        pl.col(_P).is_null().sum().alias("p"),
        pl.col(_C).is_null().sum().alias("c"),
        pl.col(_W).is_null().sum().alias("w_null"),
        (~pl.col(_W).is_finite()).sum().alias("w_inf"),
        (pl.col(_W) < 0).sum().alias("w_neg"),
        *[(pl.col(q).is_null() | pl.col(q).is_nan()).sum().alias(q) for q in qcols],
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
    problems += [
        Problem(
            rule="missing-quantity",
            message=f"quantity '{name}' is null or NaN (replace missing answers by 0 and add an 'answered' indicator)",
            count=checks[q],
        )
        for name, q in zip(names, qcols, strict=True)
        if checks[q]
    ]
    return problems


def _check_unique_psus(grouped: pl.DataFrame, *, psu: str) -> None:
    """PSU ids declared unique across strata must each lie in one stratum."""
    shared = grouped.group_by(_P).agg(pl.col(_S).n_unique().alias("k")).filter(pl.col("k") > 1)
    if shared.height:
        raise DataError(
            "PSU ids repeat across strata",
            [
                Problem(
                    rule="psu-in-several-strata",
                    message="these PSU ids appear in more than one stratum although PSU ids were declared unique "
                    "across strata; if ids restart within each stratum declare them nested "
                    '(psu_ids = "nested" in the spec, --psu-ids nested on the command line)',
                    column=psu,
                    count=shared.height,
                    examples=tuple(str(v) for v in shared[_P].sort().head(5).to_list()),
                )
            ],
        )


def _from_grouped(
    grouped: pl.DataFrame, names: tuple[str, ...], qcols: list[str], *, classes_are_indices: bool
) -> GroupTotals:
    """Index the sorted group rows: strata, PSUs (new PSU whenever stratum or id changes), classes."""
    s_new = (grouped[_S] != grouped[_S].shift(1)).fill_null(True).to_numpy()
    p_new = s_new | (grouped[_P] != grouped[_P].shift(1)).fill_null(True).to_numpy()
    stratum = np.cumsum(s_new) - 1
    psu_idx = np.cumsum(p_new) - 1
    if classes_are_indices:
        cls = grouped[_C].to_numpy().astype(np.int64)
        if len(cls) and cls.min() < 0:
            problem = Problem(rule="bad-class", message="weighting-class indices must be 0..C-1", value=str(cls.min()))
            raise DataError("negative weighting-class index", [problem])
    else:
        cls = (grouped[_C].rank("dense") - 1).to_numpy().astype(np.int64)
    shape = (grouped.height, len(qcols))
    return GroupTotals(
        stratum=stratum.astype(np.int64),
        psu=psu_idx.astype(np.int64),
        cls=cls,
        totals=grouped.select(qcols).to_numpy().astype(np.float64).reshape(shape),
        counts=grouped.select([q + "_n" for q in qcols]).to_numpy().astype(np.int64).reshape(shape),
        columns=names,
        psu_stratum=stratum[p_new].astype(np.int64),
        stratum_labels=tuple(str(v) for v in grouped[_S].filter(pl.Series(s_new)).to_list()),
        psu_labels=tuple(str(v) for v in grouped[_P].filter(pl.Series(p_new)).to_list()),
    )
