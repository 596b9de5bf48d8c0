"""The book's tables: one variable's tidy cells turned into rows, columns, cells and a legend.

A `Table` has columns (`Column`: the waves today; banner columns slot in as more columns with a
letter and a group) and rows (`TableRow`). A row's `Cell` is one line, the figure; its precision
(interval, standard error, design effect, unweighted count) sits in the row's `DetailRow`s,
which the page hides until the reader switches them on. A cell may carry significance letters
(`letters`: the columns it is significantly higher than, from the cells column
`sig_higher_than`) and a wave-change mark (`change`: "up" / "down" from the cells column
`wave_change`); the table's legend explains every symbol the table uses, once.

Rows of kind "missing" ("No answer") and "not-asked" that are 0 in every column are left out
and the legend says so. Cells whose `flags` contain "suppressed" print SUPPRESSED; a wave that
did not ask the variable (or the multi item) prints NOT_ASKED_IN_WAVE.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

import polars as pl

from pipeline.book.charts import DotChart, dot_chart
from pipeline.book.numbers import count_text, half_up, percent_texts, ratio_text, statistic_interval, statistic_number
from pipeline.staging.spec import Variable

# Low-base thresholds: common practice, no source (trade rules of thumb for unweighted bases).
LOW_BASE = 50
VERY_LOW_BASE = 30
LOW_MARK, VERY_LOW_MARK = "†", "‡"
SUPPRESSED = "×"
NO_DATA = "–"
UP, DOWN = "▲", "▼"

TYPE_LABELS = {
    "single": "Single choice",
    "multi": "Multiple choice",
    "rating": "Rating scale",
    "numeric": "Number",
}
PERCENT_KINDS = ("category", "excluded", "net", "item", "missing", "not-asked")
UNTESTED_KINDS = ("missing", "not-asked", "excluded")  # shares shown without an interval
OMITTED_WHEN_ZERO = ("missing", "not-asked")
CHART_KINDS = ("category", "net", "item")
ESTIMATED_STATISTICS = ("mean", "median")
SET_BY_WEIGHTING = "set by weighting"
NOT_ASKED_IN_WAVE = "not asked in this wave"
SET_BY_WEIGHTING_NOTE = (
    "Percentages marked 'set by weighting' equal the population figures the weights were "
    "calibrated to; they carry no sampling error of their own."
)


@dataclass(frozen=True)
class Column:
    """A table column: its key (the wave id; a banner column's key later), label, a second header
    line (fieldwork dates), and its letter for significance marks (None: not tested)."""

    key: str
    label: str
    sublabel: str | None = None
    letter: str | None = None


@dataclass(frozen=True)
class Cell:
    """One cell: the figure as text (one line) and what the detail rows and charts need.

    base_flag: None, "low" or "very-low"; interval, se, deff, count: text for the detail rows;
    letters: the letters of the columns this cell is significantly higher than; change: "up" or
    "down" against the wave before; estimate, low, high: the numbers behind the figure (for the
    charts); suppressed: the figure is withheld."""

    text: str
    base_flag: str | None = None
    interval: str | None = None
    se: str | None = None
    deff: str | None = None
    count: str | None = None
    letters: str | None = None
    change: str | None = None
    estimate: float | None = None
    low: float | None = None
    high: float | None = None
    suppressed: bool = False


@dataclass(frozen=True)
class DetailRow:
    """A precision row under a table row: kind ("interval", "se", "deff", "count"), label, texts per column."""

    kind: str
    label: str
    texts: tuple[str, ...]


@dataclass(frozen=True)
class TableRow:
    """One table row: its kind (see pipeline.tables.topline.ROW_KINDS), label, cells and detail rows."""

    kind: str
    label: str
    cells: tuple[Cell, ...]
    details: tuple[DetailRow, ...] = ()


@dataclass(frozen=True)
class Table:
    """One variable's table: columns, rows, and the legend printed under it (one line per item)."""

    caption: str
    columns: tuple[Column, ...]
    rows: tuple[TableRow, ...]
    legend: tuple[str, ...]

    @property
    def has_details(self) -> bool:
        return any(r.details for r in self.rows)


@dataclass(frozen=True)
class Section:
    """One variable of the codebook: its table, its chart, and where it lives in the book.

    anchor: its id; page: the file it is on ("" in a one-file book); href: a link to it from
    any page of the book."""

    anchor: str
    page: str
    href: str
    name: str
    label: str
    type_label: str
    table: Table
    chart: DotChart | None
    has_low_base: bool


def base_flag(base: int | None) -> str | None:
    """ "very-low" below VERY_LOW_BASE, "low" below LOW_BASE, else None (a base of 0 shows a dash)."""
    if base is None or base == 0:
        return None
    if base < VERY_LOW_BASE:
        return "very-low"
    if base < LOW_BASE:
        return "low"
    return None


def anchor_of(index: int, name: str) -> str:
    """The section id: "v<position>-<name as a slug>"."""
    slug = re.sub(r"[^a-z0-9]+", "-", name.lower()).strip("-")
    return f"v{index + 1}-{slug}" if slug else f"v{index + 1}"


def _se_text(kind: str, se: float | None) -> str | None:
    """A standard error: percentage points to 1 decimal (2 below 0.1), statistics to 2 decimals."""
    if se is None:
        return None
    if kind in PERCENT_KINDS:
        return f"{se:.2f}" if 0 < se < 0.1 else f"{se:.1f}"
    return f"{se:,.2f}"


def _letters(value: object) -> str | None:
    if value is None:
        return None
    if isinstance(value, (list, tuple)):
        value = "".join(str(v) for v in value)
    return str(value) or None


def _change(value: object) -> str | None:
    return value if value in ("up", "down") else None


def format_cell(row: dict | None, *, weighted: bool) -> Cell:
    """Format one cell of the tidy frame (None: no figures for that column)."""
    if row is None:
        return Cell(text=NO_DATA)
    flags = row.get("flags") or ""
    if "suppressed" in (flags if isinstance(flags, (list, tuple)) else str(flags).split(",")):
        return Cell(text=SUPPRESSED, suppressed=True)
    flag = base_flag(row["base"])
    kind = row["row_kind"]
    marks = {"letters": _letters(row.get("sig_higher_than")), "change": _change(row.get("wave_change"))}
    count = count_text(row["count"]) if row.get("count") is not None else None
    if kind == "base":
        return Cell(text=count_text(row["count"]))
    if kind == "balance":
        return _balance_cell(row, flag, weighted=weighted, marks=marks)
    estimate = row.get("estimate") if weighted else None
    if estimate is not None and kind in UNTESTED_KINDS:
        text, _ = percent_texts(estimate)
        return Cell(text=text, base_flag=flag, count=count, estimate=estimate)
    if estimate is not None and kind in PERCENT_KINDS:
        if row.get("set_by_weighting"):
            text, _ = percent_texts(estimate)
            return Cell(text=text, base_flag=flag, interval=SET_BY_WEIGHTING, count=count, estimate=estimate, **marks)
        low, high = row.get("ci_low"), row.get("ci_high")
        text, interval = percent_texts(estimate, low, high)
        return Cell(
            text=text, base_flag=flag, interval=interval, se=_se_text(kind, row.get("se")),
            deff=ratio_text(row.get("deff")), count=count, estimate=estimate, low=low, high=high, **marks,
        )
    if estimate is not None and kind == "statistic" and row.get("code") in ESTIMATED_STATISTICS:
        code, low, high = row["code"], row.get("ci_low"), row.get("ci_high")
        interval = statistic_interval(code, low, high) if low is not None and high is not None else None
        return Cell(
            text=statistic_number(code, estimate), base_flag=flag, interval=interval,
            se=_se_text(kind, row.get("se")), deff=ratio_text(row.get("deff")),
            estimate=estimate, low=low, high=high, **marks,
        )
    if kind == "statistic":
        value = row["value"]
        if value is None:
            return Cell(text=NO_DATA, base_flag=flag)
        return Cell(text=statistic_number(row.get("code") or "", value), base_flag=flag, estimate=value, **marks)
    if row["percent"] is None:
        return Cell(text=NO_DATA, count=count, base_flag=flag)
    text, _ = percent_texts(row["percent"])
    return Cell(text=text, count=count, base_flag=flag, estimate=row["percent"], **marks)


def balance_text(points: float) -> str:
    """A balance score in points, rounded half up, with its sign ("+12", "-3", "0")."""
    whole = int(half_up(points))
    return f"{whole:+d}" if whole else "0"


def _balance_cell(row: dict, flag: str | None, *, weighted: bool, marks: dict) -> Cell:
    """A balance score (share positive minus share negative, in points): signed whole points."""
    estimate = row.get("estimate") if weighted else None
    if estimate is None:
        value = row.get("value")
        return Cell(text=NO_DATA if value is None else balance_text(value), base_flag=flag,
                    estimate=value, **marks)
    low, high = row.get("ci_low"), row.get("ci_high")
    interval = f"{balance_text(low)} to {balance_text(high)}" if low is not None and high is not None else None
    return Cell(
        text=balance_text(estimate), base_flag=flag, interval=interval, se=_se_text("balance", row.get("se")),
        deff=ratio_text(row.get("deff")), estimate=estimate, low=low, high=high, **marks,
    )


def _details(cells: Sequence[Cell], *, level_label: str) -> tuple[DetailRow, ...]:
    """The detail rows of a table row: interval, standard error, design effect, unweighted count."""
    rows = []
    for kind, label, attribute in (
        ("interval", f"{level_label} interval", "interval"),
        ("se", "Standard error", "se"),
        ("deff", "Design effect", "deff"),
        ("count", "Respondents (n)", "count"),
    ):
        texts = tuple(getattr(c, attribute) or "" for c in cells)
        if any(texts):
            rows.append(DetailRow(kind=kind, label=label, texts=texts))
    return tuple(rows)


def _all_zero(frame_rows: Sequence[dict | None]) -> bool:
    """Whether a row counts no respondent in any column."""
    return all(r is None or not r["count"] for r in frame_rows)


def build_table(
    variable: Variable,
    columns: tuple[Column, ...],
    cells: pl.DataFrame,
    *,
    weighted: bool,
    level_label: str,
) -> Table:
    """One variable's table from its cells (rows in `row_order`; a dash where a column has no data)."""
    by_key = {(row["row_order"], row["wave"]): row for row in cells.iter_rows(named=True)}
    layout = cells.unique("row_order", keep="first").sort("row_order").select(
        "row_order", "row_kind", "row_label", "code"
    )
    rows: list[TableRow] = []
    omitted: list[str] = []
    for order, kind, row_label, code in layout.iter_rows():
        item = code if kind == "item" else None
        frame_rows = [by_key.get((order, c.key)) for c in columns]
        row_cells = tuple(
            Cell(text=NOT_ASKED_IN_WAVE)
            if r is None and not variable.asked_in(c.key, item)
            else format_cell(r, weighted=weighted)
            for r, c in zip(frame_rows, columns, strict=True)
        )
        if kind in OMITTED_WHEN_ZERO and _all_zero(frame_rows):
            omitted.append(row_label)
            continue
        details = () if kind == "base" else _details(row_cells, level_label=level_label)
        rows.append(TableRow(kind=kind, label=row_label, cells=row_cells, details=details))
    notes = [note for note in cells.sort("row_order")["note"].unique(maintain_order=True).to_list() if note]
    legend = _legend(rows, omitted, notes, weighted=weighted, level_label=level_label)
    return Table(caption=variable.label, columns=columns, rows=tuple(rows), legend=legend)


def _legend(
    rows: Sequence[TableRow], omitted: Sequence[str], notes: Sequence[str], *, weighted: bool, level_label: str
) -> tuple[str, ...]:
    """What the reader needs under this table, each item once: what the figures are, then every
    symbol the table uses, then the codebook's notes."""
    cells = [c for r in rows for c in r.cells]
    if weighted:
        lines = [
            "Weighted percentages of the base; bases and n count respondents (unweighted). "
            f"“Show precision” adds each figure's {level_label} interval, standard error, design effect and n."
        ]
    else:
        lines = ["Unweighted percentages of the base; bases count respondents. “Show precision” adds n per row."]
    if any(c.base_flag == "low" for c in cells):
        lines.append(f"{LOW_MARK} base under {LOW_BASE} respondents: read with caution.")
    if any(c.base_flag == "very-low" for c in cells):
        lines.append(f"{VERY_LOW_MARK} base under {VERY_LOW_BASE} respondents: indicative only.")
    if any(c.suppressed for c in cells):
        lines.append(f"{SUPPRESSED} withheld: too few respondents to show.")
    if any(c.letters for c in cells):
        lines.append("Letters: significantly higher than the column with that letter.")
    if any(c.change for c in cells):
        lines.append(f"{UP} / {DOWN} significantly higher / lower than the wave before.")
    if any(c.text == NO_DATA for c in cells):
        lines.append(f"{NO_DATA} no figures for this column.")
    if any(c.text == NOT_ASKED_IN_WAVE for c in cells):
        lines.append("“not asked in this wave”: the question was not part of that wave.")
    for label in omitted:
        lines.append(f"“{label}” is 0 in every column and not shown.")
    lines += notes
    if any(c.interval == SET_BY_WEIGHTING for c in cells):
        lines.append(SET_BY_WEIGHTING_NOTE)
    return tuple(lines)


def chart_of(table: Table) -> DotChart | None:
    """The dot chart of the table's latest column with figures (the Total column of a banner
    table once banners exist): its percentage rows, or None when it has none."""
    for index in range(len(table.columns) - 1, -1, -1):
        points = [
            (r.label, r.cells[index].estimate, r.cells[index].low, r.cells[index].high, r.cells[index].text)
            for r in table.rows
            if r.kind in CHART_KINDS and r.cells[index].estimate is not None and not r.cells[index].suppressed
        ]
        if points:
            return dot_chart(points, column=table.columns[index].label, percent=True)
    return None


def type_label(variable: Variable) -> str:
    return TYPE_LABELS.get(variable.type, variable.type)
