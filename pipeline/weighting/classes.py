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

ROW_KEY = "__row__"


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
        cols = [self.frame[v].to_list() for v in self.variables]
        return tuple(", ".join(f"{v}={c}" for v, c in zip(self.variables, row)) for row in zip(*cols))

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
    text = data.select([pl.col(v).cast(pl.String) for v in variables])
    n = data.height
    if per_respondent:
        frame = text.with_row_index(ROW_KEY)
        return ClassIndex(variables, frame.drop(ROW_KEY), np.arange(n, dtype=np.int64), np.ones(n, dtype=np.int64), True)
    if not variables:
        return ClassIndex((), pl.DataFrame(), np.zeros(n, dtype=np.int64), np.array([n], dtype=np.int64))
    frame = text.unique().sort(list(variables)).with_row_index("__class__")
    index = text.join(frame, on=list(variables), how="left", maintain_order="left")["__class__"].to_numpy()
    index = index.astype(np.int64)
    counts = np.bincount(index, minlength=frame.height)
    return ClassIndex(variables, frame.drop("__class__"), index, counts)


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
