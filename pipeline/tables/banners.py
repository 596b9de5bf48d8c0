"""Banner columns as domain indicators: the Total, then each break's categories, nets or items.

A break on a single-choice or rating variable gives one column per valid code (in codebook order)
and one per net (a net overlaps the categories it sums); a break on a multiple-response set gives
one column per item (items overlap: a respondent who chose two items is in both columns). A
numeric variable cannot be a break (`pipeline.tables.spec` refuses it). Each column is a 0/1
domain expression, so every estimate in it keeps the full design.

Letters: every non-Total column of a banner gets its own letter, A, B, ..., Z, AA, AB, ... in banner
order, so a letter is never reused across breaks. A cell's significance mark lists the letters of
the columns (of its own break) it is significantly higher than.
"""

from __future__ import annotations

from dataclasses import dataclass

import polars as pl

from pipeline.staging.spec import Study, Variable
from pipeline.tables.cells_export import TOTAL, TOTAL_LABEL
from pipeline.tables.spec import BannerSpec


@dataclass(frozen=True)
class Column:
    """One banner column: key (unique in the banner), label, break variable ("" for the Total),
    kind ("total", "category", "net" or "item"), letter ("" for the Total) and domain expression."""

    key: str
    label: str
    break_variable: str
    kind: str
    letter: str
    domain: pl.Expr
    codes: frozenset | None = None  # the codes of a single-choice break's category or net column


@dataclass(frozen=True)
class Banner:
    """A banner's columns in order, the Total first."""

    name: str
    columns: tuple[Column, ...]

    def for_stub(self, stub: str) -> tuple[Column, ...]:
        """The columns of `stub`'s table: a variable's own table drops its own break."""
        return tuple(c for c in self.columns if c.break_variable != stub)

    def breaks(self) -> list[str]:
        """The break variables, in banner order."""
        return list(dict.fromkeys(c.break_variable for c in self.columns if c.break_variable))


def letter(i: int) -> str:
    """0 -> A, 25 -> Z, 26 -> AA, 27 -> AB, ... (bijective base 26)."""
    out = ""
    i += 1
    while i:
        i, r = divmod(i - 1, 26)
        out = chr(ord("A") + r) + out
    return out


def _codes(variable: Variable, codes: list) -> list:
    return [c if variable.int_coded else str(c) for c in codes]


def _break_columns(variable: Variable) -> list[tuple[str, str, str, pl.Expr, frozenset | None]]:
    """(key, label, kind, domain, codes) for each column of one break."""
    name = variable.name
    if variable.type == "multi":
        return [(f"{name}={item}", label, "item", pl.col(item).eq(1).fill_null(False), None)
                for item, label in variable.items.items()]
    col = pl.col(name) if variable.int_coded else pl.col(name).cast(pl.String)
    out = [(f"{name}={code}", variable.values.get(code, str(code)), "category",
            col.is_in(_codes(variable, [code])).fill_null(False), frozenset([code])) for code in variable.valid_codes]
    out += [(f"{name}:{label}", label, "net", col.is_in(_codes(variable, list(codes))).fill_null(False),
             frozenset(codes)) for label, codes in variable.nets.items()]
    return out


def build_banner(study: Study, spec: BannerSpec) -> Banner:
    """The columns of a banner spec (breaks validated by `pipeline.tables.spec`)."""
    columns = [Column(TOTAL, TOTAL_LABEL, "", "total", "", pl.lit(True))]
    for name in spec.breaks:
        for key, label, kind, domain, codes in _break_columns(study.variables[name]):
            columns.append(Column(key, label, name, kind, letter(len(columns) - 1), domain, codes))
    return Banner(spec.name, tuple(columns))
