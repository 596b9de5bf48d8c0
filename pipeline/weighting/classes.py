"""Weighting classes and the margins defined on them.

A weighting class is one combination of the values of every variable the class-level steps use
(raking margins, post-strata, calibration margins). Those steps give every respondent of a
class the same factor, so they can be fitted and replayed on class totals alone
(see ../shared/DESIGN.md). A margin maps each class to one of its categories; collapsing merges
categories with too few respondents before the margin is used.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import polars as pl

from pipeline.errors import DataError, Problem

DENSE_KEY_LIMIT = 50_000_000  # mixed-radix class keys up to this span use a bincount, beyond it a sort


@dataclass(frozen=True)
class ClassIndex:
    """Respondents grouped into weighting classes.

    variables: the weighting variables, in order.
    frame: one row per class (C rows) with the code of each variable as text, sorted.
    index: (n,) class of each respondent, 0..C-1.
    counts: (C,) respondents per class.
    per_respondent: True when every respondent is its own class (numeric calibration).
    """

    variables: tuple[str, ...]
    frame: pl.DataFrame
    index: np.ndarray
    counts: np.ndarray
    per_respondent: bool = False

    @property
    def size(self) -> int:
        """Number of classes C."""
        return int(self.counts.shape[0])

    def labels(self) -> tuple[str, ...]:
        """A readable label per class, e.g. 'age_band=3, sex=1' ('all' when there is no variable)."""
        if not self.variables:
            return ("all",) * self.size
        parts = [pl.lit(f"{v}=") + pl.col(v) for v in self.variables]
        return tuple(self.frame.select(pl.concat_str(parts, separator=", ").alias("label"))["label"].to_list())

    def totals(self, weights: np.ndarray) -> np.ndarray:
        """(C,) sum of `weights` within each class (one grouped pass)."""
        return np.bincount(self.index, weights=weights, minlength=self.size)


def build_classes(data: pl.DataFrame, variables: Sequence[str], *, per_respondent: bool = False) -> ClassIndex:
    """Group the rows of `data` by `variables` (codes compared as text); missing values are an error."""
    variables = tuple(variables)
    problems = [
        Problem("weighting-missing", f"weighting variable '{v}' is missing for some respondents; they cannot be weighted",
                column=v, count=int(data[v].null_count()))
        for v in variables
        if data[v].null_count()
    ]
    if problems:
        raise DataError("cannot form weighting classes", problems)
    n = data.height
    if per_respondent:
        frame = data.select([pl.col(v).cast(pl.String) for v in variables])
        return ClassIndex(variables, frame, np.arange(n, dtype=np.int64), np.ones(n, dtype=np.int64), True)
    if not variables:
        return ClassIndex((), pl.DataFrame(), np.zeros(n, dtype=np.int64), np.array([n], dtype=np.int64))
    key = np.zeros(n, dtype=np.int64)
    levels: list[pl.Series] = []
    for v in variables:
        codes, values = _dense_codes(data[v])
        key = key * len(values) + codes
        levels.append(values)
    span = int(np.prod([len(lv) for lv in levels], dtype=np.float64))
    if span <= DENSE_KEY_LIMIT:
        present = np.bincount(key, minlength=span) > 0
        keys = np.flatnonzero(present)
        index = (np.cumsum(present) - 1)[key]
    else:
        keys, index = np.unique(key, return_inverse=True)
    columns = {}
    rest = keys
    for v, values in zip(reversed(variables), reversed(levels)):
        rest, digit = np.divmod(rest, len(values))
        columns[v] = values.gather(digit).cast(pl.String)
    frame = pl.DataFrame({v: columns[v] for v in variables})
    index = index.astype(np.int64)
    return ClassIndex(variables, frame, index, np.bincount(index, minlength=frame.height))


def _dense_codes(series: pl.Series) -> tuple[np.ndarray, pl.Series]:
    """(n,) index of each value among the sorted distinct values, and those values."""
    if series.dtype.is_integer():
        values = series.to_numpy()
        low = int(values.min())
        if int(values.max()) - low < DENSE_KEY_LIMIT:
            present = np.bincount(values - low) > 0
            return (np.cumsum(present) - 1)[values - low], pl.Series(np.flatnonzero(present) + low)
    distinct = series.unique().sort()
    codes = series.to_frame("v").join(distinct.to_frame("v").with_row_index("i"), on="v", how="left",
                                       maintain_order="left")["i"]
    return codes.to_numpy().astype(np.int64), distinct


@dataclass(frozen=True)
class Margin:
    """One margin on a class index: category of each class and the target of each category.

    name: "age_band x sex"; categories: labels such as "3 x 2" (merged codes joined by "+").
    of_class: (C,) category of each class; targets: (K,) targets, proportions or counts (`kind`).
    """

    name: str
    variables: tuple[str, ...]
    categories: tuple[str, ...]
    of_class: np.ndarray
    targets: np.ndarray
    kind: str

    @property
    def size(self) -> int:
        """Number of categories K."""
        return len(self.categories)

    def indicator(self) -> np.ndarray:
        """(C, K) 0/1 matrix: class c belongs to category k."""
        out = np.zeros((self.of_class.shape[0], self.size))
        out[np.arange(self.of_class.shape[0]), self.of_class] = 1.0
        return out

    def sums(self, class_totals: np.ndarray) -> np.ndarray:
        """(K,) totals by category of (C,) class totals."""
        return np.bincount(self.of_class, weights=class_totals, minlength=self.size)


def group_label(codes: Sequence[str]) -> str:
    """Label of a merged category: its codes joined by '+'."""
    return "+".join(codes)
