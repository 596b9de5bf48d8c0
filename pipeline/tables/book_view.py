"""The banner tables as the book shows them: the latest wave of every table, with letters and flags.

`banner_views(tables, study)` turns `BannerTables` into `BannerView` objects, the only thing the
partial `templates/_banners.html.j2` receives (as `book.banners`). A cell shows its estimate
(percentages to one decimal, means and medians to two), the letters of the columns it is
significantly higher than (upper case at the first level, lower case at the second), and a flag:
`SUPPRESSED_SYMBOL` and no number for a suppressed or empty cell, `LOW_BASE_SYMBOL` beside a cell on
a low base (not tested). No respondent-level value reaches the view.
"""

from __future__ import annotations

from dataclasses import dataclass

import polars as pl

from pipeline.staging.spec import Study
from pipeline.tables import BannerTables

SUPPRESSED_SYMBOL = "*"
LOW_BASE_SYMBOL = "!"


@dataclass(frozen=True)
class BannerCell:
    """One cell: text (no number when suppressed), marks (letters), flag ("", "suppressed" or "low-base")."""

    text: str
    marks: str
    flag: str


@dataclass(frozen=True)
class BannerRow:
    label: str
    cells: tuple[BannerCell, ...]


@dataclass(frozen=True)
class BannerView:
    """One table: anchor, stub label, wave label, break label per column, column labels and letters,
    unweighted bases, rows, and the Rao-Scott line per break."""

    anchor: str
    label: str
    wave: str
    breaks: tuple[str, ...]
    columns: tuple[str, ...]
    letters: tuple[str, ...]
    bases: tuple[str, ...]
    rows: tuple[BannerRow, ...]
    independence: tuple[str, ...]


def _cell(c: dict | None) -> BannerCell:
    if c is None:
        return BannerCell("", "", "")
    if "suppressed" in c["flags"] or "empty_column" in c["flags"]:
        return BannerCell(SUPPRESSED_SYMBOL, "", "suppressed")
    text = "" if c["estimate"] is None else (f"{c['estimate']:.1f}" if c["statistic"] in ("percent", "balance")
                                             else f"{c['estimate']:,.2f}")
    marks = c["sig_higher_than"] + c["sig_higher_than_lighter"].lower()
    return BannerCell(text, marks, "low-base" if "low_base" in c["flags"] else "")


def banner_views(tables: BannerTables, study: Study) -> tuple[BannerView, ...]:
    """The book's banner tables: each table's latest wave (module docstring)."""
    cells = tables.cells
    if cells.height == 0:
        return ()
    order = {w.id: i for i, w in enumerate(study.waves)}
    labels = {w.id: w.label for w in study.waves}
    views = []
    for index, table in enumerate(dict.fromkeys(cells["table"].to_list())):
        own = cells.filter(pl.col("table") == table)
        wave = max(set(own["wave"].to_list()), key=order.__getitem__)
        block = own.filter(pl.col("wave") == wave).sort("row")
        columns = block.select("column", "column_label", "letter", "break_variable").unique("column",
                                                                                            maintain_order=True)
        keys = columns["column"].to_list()
        first = {c["column"]: c for c in block.group_by("column", maintain_order=True).first().iter_rows(named=True)}
        bases = tuple("" if first[k]["base_unweighted"] is None else f"{first[k]['base_unweighted']:,}" for k in keys)
        rows = []
        for row in dict.fromkeys(block["row"].to_list()):
            line = {c["column"]: c for c in block.filter(pl.col("row") == row).iter_rows(named=True)}
            label = next(iter(line.values()))["row_label"]
            rows.append(BannerRow(label, tuple(_cell(line.get(k)) for k in keys)))
        tests = tables.tests.filter((pl.col("comparison") == "independence") & (pl.col("table") == table)
                                    & (pl.col("wave") == wave) & pl.col("p_value").is_not_null())
        independence = tuple(
            f"{study.variables[b].label if b in study.variables else b}: design-adjusted test of independence "
            f"(Rao-Scott F = {f:.2f} on {d1:.1f} and {d2:.1f} df), p = {p:.3g}"
            for b, f, d1, d2, p in tests.select("column_a", "statistic", "df_num", "df_den", "p_value").iter_rows())
        variable = study.variables.get(table)
        views.append(BannerView(
            anchor=f"banner-{index}", label=variable.label if variable else table, wave=labels.get(wave, wave),
            breaks=tuple(study.variables[b].label if b in study.variables else "" for b in columns["break_variable"]),
            columns=tuple(columns["column_label"].to_list()), letters=tuple(columns["letter"].to_list()),
            bases=bases, rows=tuple(rows), independence=independence))
    return tuple(views)


def legend(tables: BannerTables) -> tuple[str, ...]:
    """The legend under the banner tables."""
    spec = tables.spec
    levels = spec.levels
    first = (f"Letters: the figure is significantly higher than the lettered column of its break at the "
             f"{100 * levels[0]:g}% level" + (f" (lower case: at the {100 * levels[1]:g}% level only)"
                                              if len(levels) > 1 else "") + ", with design-based standard errors.")
    return (first,
            f"{SUPPRESSED_SYMBOL} fewer than {spec.suppress_below} respondents: not shown.",
            f"{LOW_BASE_SYMBOL} fewer than {spec.low_base} respondents: read with care, not tested.",
            tables.chance.sentence())
