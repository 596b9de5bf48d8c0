"""The book's tables: one table's unified cells (`pipeline.book.source`) turned into rows, columns,
cells and a legend.

Each table section has up to two tables:

* the by-wave table (`wave_table`): the Total of every wave side by side, with ▲ / ▼ where the
  Total changed significantly from the wave before (the export's `change_mark`);
* the banner table (`banner_table`) of the latest wave that has one: the Total first, then each
  break's columns under the break's label, each with its letter; the bases rows on top; a cell
  lists the letters of the columns it is significantly higher than (`sig_higher_than`, capitals;
  `sig_higher_than_lighter`, lowercase: the second, lighter level only) and carries the change
  mark against the previous wave; under it the Rao-Scott test of independence of each break.

A row's `Cell` is one line, the figure; its precision (interval, standard error, design effect,
count) sits in the row's `DetailRow`s, which the page hides until the reader
switches them on. The legend under each table explains every symbol the table uses, once, and
the banner table's legend always states the test level(s) and adjustment.

Rows of kind "missing" ("No answer") and "not-asked" that count no one in any wave are left out
and the legend says so. A cell whose flags contain "suppressed" prints SUPPRESSED and no number;
an empty banner column prints NO_DATA; a wave that did not ask the variable (or the multi item)
prints NOT_ASKED_IN_WAVE.
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from pipeline.book.charts import DotChart, dot_chart
from pipeline.book.numbers import count_text, half_up, percent_texts, ratio_text, statistic_interval, statistic_number
from pipeline.book.source import TOTAL, flag_set
from pipeline.staging.spec import Variable

# Low-base thresholds of the Total: common practice, no source (trade rules of thumb for
# unweighted bases); banner columns use the spec's `low_base`.
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
BASE_KINDS = ("category", "net", "item", "statistic", "balance")  # rows whose base is a column's base
ESTIMATED_STATISTICS = ("mean", "median")
STATISTIC_CODES = {"count": "n", "mean": "mean", "median": "median", "minimum": "min", "maximum": "max"}
SET_BY_WEIGHTING = "set by weighting"
NOT_ASKED_IN_WAVE = "not asked in this wave"
SET_BY_WEIGHTING_NOTE = (
    "Percentages marked 'set by weighting' equal the population figures the weights were "
    "calibrated to; they carry no sampling error of their own."
)
ADJUSTMENTS = {
    "none": "no adjustment for the number of tests",
    "holm": "p-values adjusted within each row (Holm's step-down method)",
    "bh": "p-values adjusted within each row (Benjamini and Hochberg's false discovery rate)",
}

# Optional row fields with a percentage's texts made for the whole frame at once
# (`numbers.percent_text_exprs`, the same texts as `percent_texts`; `render._shown` adds them).
TEXT_ALONE, TEXT_SHARED, TEXT_INTERVAL = "__text", "__text_shared", "__interval"

Key = tuple[str, str, str, int, str]  # (wave, banner, column, row, statistic)


@dataclass(frozen=True)
class Column:
    """A table column: its key (a wave id, or a banner column's key), label, a second header line
    (fieldwork dates), its letter for significance marks (None: not tested) and its group (the
    break's label in a banner table)."""

    key: str
    label: str
    sublabel: str | None = None
    letter: str | None = None
    group: str | None = None


@dataclass(frozen=True)
class ColumnGroup:
    """A header over adjacent columns of a banner table: the break's label and how many columns it spans."""

    label: str
    span: int


@dataclass(frozen=True)
class Cell:
    """One cell: the figure as text (one line) and what the detail rows and charts need.

    base_flag: None, "low" or "very-low"; interval, se, deff, count: text for the detail rows; letters: the letters of the columns this cell is significantly higher than at the first
    level, lighter: those at the second level only (printed lowercase); change: "up" or "down"
    against the wave before; estimate, low, high: the numbers behind the figure (for the charts,
    in percent for percentages); suppressed: the figure is withheld."""

    text: str
    base_flag: str | None = None
    interval: str | None = None
    se: str | None = None
    deff: str | None = None
    count: str | None = None
    letters: str | None = None
    lighter: str | None = None
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
    """One table row: its kind (see pipeline.tables.topline.ROW_KINDS, plus "base" and "weighted-base"
    for a banner table's bases), label, cells and detail rows."""

    kind: str
    label: str
    cells: tuple[Cell, ...]
    details: tuple[DetailRow, ...] = ()


@dataclass(frozen=True)
class Table:
    """One table: kind ("waves" or "banner"), caption and its second part, columns (and their
    groups in a banner table), rows, the legend printed under it (one line per item) and, for a
    banner table, the independence tests (one sentence per break)."""

    kind: str
    caption: str
    caption_sub: str
    columns: tuple[Column, ...]
    rows: tuple[TableRow, ...]
    legend: tuple[str, ...]
    groups: tuple[ColumnGroup, ...] = ()
    tests: tuple[str, ...] = ()

    @property
    def has_details(self) -> bool:
        return any(r.details for r in self.rows)


@dataclass(frozen=True)
class Marks:
    """How the banner tables were tested: levels (strongest first), adjustment, minimum base for
    testing and for showing a figure (from the spec's [tables])."""

    levels: tuple[float, ...] = (0.05,)
    adjust: str = "none"
    low_base: int = LOW_BASE
    suppress_below: int = 0

    def level_text(self, index: int = 0) -> str:
        return f"{100 * self.levels[index]:g}%"


@dataclass(frozen=True)
class Section:
    """One variable of the codebook: its tables, its chart, and where it lives in the book.

    anchor: its id; page: the file it is on ("" in a one-file book); href: a link to it from
    any page of the book. table: the by-wave table; banners: the latest wave's banner table of
    each banner the variable is tabulated by (none without [tables])."""

    anchor: str
    page: str
    href: str
    name: str
    label: str
    type_label: str
    table: Table
    banners: tuple[Table, ...]
    chart: DotChart | None
    has_low_base: bool


def base_flag(flags: frozenset[str]) -> str | None:
    """ "very-low" or "low" from a cell's flags (the export's low-base flags), else None."""
    if "very_low_base" in flags:
        return "very-low"
    if "low_base" in flags:
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


def _marks(row: Mapping) -> dict:
    change = row.get("change_mark")
    return {
        "letters": row.get("sig_higher_than") or None,
        "lighter": (row.get("sig_higher_than_lighter") or "").lower() or None,
        "change": change if change in ("up", "down") else None,
    }


def format_cell(row: Mapping | None, count: Mapping | None, kind: str, *, weighted: bool) -> Cell:
    """Format one cell from its export row (None: no figures for that column) and the row of its
    unweighted count (statistic "count" of the same row and column, when there is one). Shares
    (percentages, balance scores) print as percent and points."""
    if row is None:
        return Cell(text=NO_DATA)
    flags = flag_set(row.get("flags"))
    estimate = row.get("estimate")
    if "suppressed" in flags:
        return Cell(text=SUPPRESSED, suppressed=True)
    if estimate is None or "empty_column" in flags:
        return Cell(text=NO_DATA)
    statistic = row["statistic"]
    if kind == "base":
        return Cell(text=count_text(estimate))
    flag = base_flag(flags) if flags else None
    if statistic == "count":
        return Cell(text=count_text(estimate), base_flag=flag)
    marks = _marks(row)
    low, high, se = row.get("ci_low"), row.get("ci_high"), row.get("se")
    if statistic in ("percent", "balance"):
        estimate = 100 * estimate
        low = None if low is None else 100 * low
        high = None if high is None else 100 * high
        se = None if se is None else 100 * se
    precise = weighted and se is not None
    if statistic == "balance":
        interval = f"{balance_text(low)} to {balance_text(high)}" if precise and low is not None and high is not None else None
        return Cell(
            text=balance_text(estimate), base_flag=flag, interval=interval, se=_se_text("balance", se) if precise else None,
            deff=ratio_text(row.get("deff")), estimate=estimate,
            low=low if precise else None, high=high if precise else None, **marks,
        )
    if statistic == "percent":
        shown = count.get("estimate") if count is not None else None
        count_shown = count_text(shown) if shown is not None else None
        alone = row.get(TEXT_ALONE) or percent_texts(estimate)[0]
        if kind in UNTESTED_KINDS or not precise:
            return Cell(text=alone, base_flag=flag, count=count_shown, estimate=estimate, **marks)
        if "set_by_weighting" in flags:
            return Cell(text=alone, base_flag=flag, interval=SET_BY_WEIGHTING, count=count_shown, estimate=estimate,
                        **marks)
        text, interval = row.get(TEXT_SHARED), row.get(TEXT_INTERVAL)
        if text is None or (interval is None and low is not None and high is not None):
            text, interval = percent_texts(estimate, low, high)
        return Cell(
            text=text, base_flag=flag, interval=interval, se=_se_text(kind, se), deff=ratio_text(row.get("deff")),
            count=count_shown, estimate=estimate, low=low, high=high, **marks,
        )
    code = STATISTIC_CODES.get(statistic, statistic)
    if precise and code in ESTIMATED_STATISTICS:
        interval = statistic_interval(code, low, high) if low is not None and high is not None else None
        return Cell(
            text=statistic_number(code, estimate), base_flag=flag, interval=interval, se=_se_text(kind, se),
            deff=ratio_text(row.get("deff")), estimate=estimate, low=low, high=high, **marks,
        )
    return Cell(text=statistic_number(code, estimate), base_flag=flag, estimate=estimate, **marks)


def balance_text(points: float) -> str:
    """A balance score in points, rounded half up, with its sign ("+12", "-3", "0")."""
    whole = int(half_up(points))
    return f"{whole:+d}" if whole else "0"


DETAIL_KINDS = (
    ("interval", "{level} interval", "interval"),
    ("se", "Standard error", "se"),
    ("deff", "Design effect", "deff"),
    ("count", "Respondents (n)", "count"),
)


def _details(cells: Sequence[Cell], *, level_label: str, kinds: Sequence[str]) -> tuple[DetailRow, ...]:
    """The detail rows of a table row (of `kinds`, in DETAIL_KINDS order) that have any text."""
    rows = []
    for kind, label, attribute in DETAIL_KINDS:
        if kind not in kinds:
            continue
        texts = tuple(getattr(c, attribute) or "" for c in cells)
        if any(texts):
            rows.append(DetailRow(kind=kind, label=label.format(level=level_label), texts=texts))
    return tuple(rows)


@dataclass(frozen=True)
class TableCells:
    """One table's export rows, looked up by (wave, banner, column, row, statistic), and its layout:
    (row, row kind, row label, main statistic, item name) in row order."""

    rows: dict[Key, dict]
    layout: tuple[tuple[int, str, str, str, str | None], ...]
    notes: tuple[str, ...]

    def get(self, wave: str, banner: str, column: str, row: int, statistic: str) -> dict | None:
        return self.rows.get((wave, banner, column, row, statistic))


def table_cells(variable: Variable, frame_rows: Sequence[dict]) -> TableCells:
    """Index one table's export rows; the layout is its Total rows (every wave) in row order. A
    row's main statistic is the one that is not "count" (a base row and the number of answers
    are counts)."""
    rows: dict[Key, dict] = {}
    layout: dict[int, tuple[str, str, str]] = {}
    notes: dict[str, None] = {}
    items = {label: name for name, label in variable.items.items()}
    for r in frame_rows:
        rows[(r["wave"], r["banner"], r["column"], r["row"], r["statistic"])] = r
        if r["banner"] != TOTAL:
            continue
        if r["note"]:
            notes[r["note"]] = None
        known = layout.get(r["row"])
        if known is None or known[2] == "count":
            layout[r["row"]] = (r["row_kind"], r["row_label"], r["statistic"])
    ordered = tuple(
        (row, kind, label, statistic, items.get(label) if kind == "item" else None)
        for row, (kind, label, statistic) in sorted(layout.items())
    )
    return TableCells(rows=rows, layout=ordered, notes=tuple(notes))


def _all_zero(cells: TableCells, row: int, waves: Sequence[str]) -> bool:
    """Whether a row counts no respondent in any wave's Total."""
    for wave in waves:
        count = cells.get(wave, TOTAL, TOTAL, row, "count")
        if count is not None and count.get("estimate"):
            return False
    return True


def wave_table(
    variable: Variable,
    columns: tuple[Column, ...],
    cells: TableCells,
    *,
    weighted: bool,
    level_label: str,
    marks: Marks,
) -> tuple[Table, tuple[int, ...]]:
    """The by-wave table of one variable (the Total of each wave; a dash where a wave has no
    figures) and the rows left out as zero in every wave."""
    rows: list[TableRow] = []
    omitted: list[str] = []
    omitted_rows: list[int] = []
    waves = [c.key for c in columns]
    for row, kind, label, statistic, item in cells.layout:
        if kind in OMITTED_WHEN_ZERO and _all_zero(cells, row, waves):
            omitted.append(label)
            omitted_rows.append(row)
            continue
        row_cells = tuple(
            Cell(text=NOT_ASKED_IN_WAVE)
            if cells.get(c.key, TOTAL, TOTAL, row, statistic) is None and not variable.asked_in(c.key, item)
            else format_cell(
                cells.get(c.key, TOTAL, TOTAL, row, statistic),
                cells.get(c.key, TOTAL, TOTAL, row, "count") if statistic != "count" else None,
                kind, weighted=weighted,
            )
            for c in columns
        )
        details = () if kind == "base" else _details(
            row_cells, level_label=level_label, kinds=("interval", "se", "deff", "count")
        )
        rows.append(TableRow(kind=kind, label=label, cells=row_cells, details=details))
    legend = _legend(rows, omitted, cells.notes, weighted=weighted, level_label=level_label, marks=marks,
                     low_base=LOW_BASE)
    if any(c.change for r in rows for c in r.cells):
        legend = (*legend[:1], f"{UP} / {DOWN} significantly higher / lower than in the wave before "
                  f"({marks.level_text()} level).", *legend[1:])
    table = Table(kind="waves", caption=variable.label, caption_sub="by wave, all respondents", columns=columns,
                  rows=tuple(rows), legend=legend)
    return table, tuple(omitted_rows)


@dataclass(frozen=True)
class BannerColumns:
    """A banner table's columns (Total first) with the export's (banner, column) key of each."""

    columns: tuple[Column, ...]
    keys: tuple[tuple[str, str], ...]
    groups: tuple[ColumnGroup, ...]


def banner_columns(frame_rows: Sequence[dict], wave: str, banner: str, labels: Mapping[str, str]) -> BannerColumns:
    """The Total and the columns of `banner` in `wave`, in the export's order, each under its
    break's label (`labels`: break variable -> label)."""
    seen: dict[str, dict] = {}
    for r in frame_rows:
        if r["wave"] == wave and r["banner"] == banner and r["column"] not in seen:
            seen[r["column"]] = r
    columns = [Column(key=TOTAL, label="Total")]
    keys = [(TOTAL, TOTAL)]
    groups: list[ColumnGroup] = [ColumnGroup(label="", span=1)]
    for key, r in seen.items():
        group = labels.get(r["break_variable"], r["break_variable"])
        columns.append(Column(key=key, label=r["column_label"], letter=r["letter"] or None, group=group))
        keys.append((banner, key))
        if groups[-1].label == group and len(groups) > 1:
            groups[-1] = ColumnGroup(label=group, span=groups[-1].span + 1)
        else:
            groups.append(ColumnGroup(label=group, span=1))
    return BannerColumns(columns=tuple(columns), keys=tuple(keys), groups=tuple(groups))


def _base_cells(cells: TableCells, wave: str, layout: Sequence[tuple], keys: Sequence[tuple[str, str]]) -> tuple[
        tuple[Cell, ...], tuple[Cell, ...]]:
    """The bases rows of a banner table: per column the unweighted and the weighted base of its
    rows' base (the largest base among the category, net, item and statistic rows)."""
    unweighted, weighted = [], []
    for banner, column in keys:
        best = None
        for row, kind, _, statistic, _ in layout:
            if kind not in BASE_KINDS or statistic == "count":
                continue
            r = cells.get(wave, banner, column, row, statistic)
            if r is not None and r.get("base_unweighted") is not None and (
                    best is None or r["base_unweighted"] > best["base_unweighted"]):
                best = r
        if best is None:
            unweighted.append(Cell(text=NO_DATA))
            weighted.append(Cell(text=NO_DATA))
            continue
        flag = base_flag(flag_set(best.get("flags")))
        unweighted.append(Cell(text=count_text(best["base_unweighted"]), base_flag=flag))
        shown = best.get("base_weighted")
        weighted.append(Cell(text=count_text(shown) if shown is not None else NO_DATA))
    return tuple(unweighted), tuple(weighted)


def banner_table(
    variable: Variable,
    cells: TableCells,
    frame_rows: Sequence[dict],
    *,
    wave: str,
    wave_label: str,
    previous_label: str | None,
    banner: str,
    labels: Mapping[str, str],
    omitted_rows: Sequence[int],
    weighted: bool,
    level_label: str,
    marks: Marks,
    tests: Sequence[str],
) -> Table:
    """The banner table of one variable in `wave`: the Total and the banner's columns, bases rows
    first, then every row the banner cells hold (rows left out of the by-wave table stay out)."""
    spec = banner_columns(frame_rows, wave, banner, labels)
    present = {r["row"] for r in frame_rows if r["wave"] == wave and r["banner"] == banner}
    layout = [entry for entry in cells.layout if entry[0] in present and entry[0] not in omitted_rows]
    unweighted, weighted_base = _base_cells(cells, wave, layout, spec.keys)
    rows = [TableRow(kind="base", label="Base: respondents (unweighted)", cells=unweighted)]
    if weighted and any(c.text != NO_DATA for c in weighted_base):
        rows.append(TableRow(kind="weighted-base", label="Weighted base", cells=weighted_base))
    for row, kind, label, statistic, _ in layout:
        row_cells = tuple(
            format_cell(cells.get(wave, b, c, row, statistic), None, kind, weighted=weighted) for b, c in spec.keys
        )
        details = _details(row_cells, level_label=level_label, kinds=("interval", "se", "deff"))
        rows.append(TableRow(kind=kind, label=label, cells=row_cells, details=details))
    legend = _banner_legend(rows, spec, wave_label, previous_label, weighted=weighted, level_label=level_label,
                            marks=marks)
    return Table(
        kind="banner", caption=variable.label, caption_sub=f"{wave_label}, by "
        + ", ".join(g.label for g in spec.groups[1:]), columns=spec.columns, rows=tuple(rows), legend=legend,
        groups=spec.groups, tests=tuple(tests),
    )


def _banner_legend(rows: Sequence[TableRow], spec: BannerColumns, wave_label: str, previous_label: str | None, *,
                   weighted: bool, level_label: str, marks: Marks) -> tuple[str, ...]:
    """The banner table's legend: what the figures are, how columns were tested (always), then
    every symbol the table uses."""
    cells = [c for r in rows for c in r.cells]
    first = marks.level_text(0)
    lines = [
        (f"{wave_label}: weighted percentages of each column's base" if weighted else
         f"{wave_label}: unweighted percentages of each column's base")
        + "; bases count respondents. “Show precision” adds each figure's "
        + f"{level_label} interval, standard error and design effect (n is the column's base).",
        f"Each column has a letter. Within each break every pair of columns is tested (two-sided t test on "
        f"the design-based standard error of the difference), at the {first} level"
        + (f" and, lighter, at the {marks.level_text(1)} level" if len(marks.levels) > 1 else "")
        + f"; {ADJUSTMENTS.get(marks.adjust, marks.adjust)}. Only columns with at least {marks.low_base} "
        "respondents are tested.",
    ]
    if any(c.letters for c in cells):
        lines.append(f"Capital letters (A, B, …) beside a figure: significantly higher than the column with that "
                     f"letter at the {first} level.")
    if any(c.lighter for c in cells):
        lines.append(f"Lowercase letters (a, b, …): higher than that column at the {marks.level_text(1)} level "
                     f"only (weaker evidence).")
    if not any(c.letters or c.lighter for c in cells):
        lines.append("No letters: no column is significantly higher than another of its break.")
    if any(c.change for c in cells) and previous_label:
        lines.append(f"{UP} / {DOWN} significantly higher / lower than the same column in {previous_label} "
                     f"({first} level).")
    lines += _symbol_lines(cells, marks=marks, low_base=marks.low_base)
    if any(c.interval == SET_BY_WEIGHTING for c in cells):
        lines.append(SET_BY_WEIGHTING_NOTE)
    return tuple(lines)


def _symbol_lines(cells: Sequence[Cell], *, marks: Marks, low_base: int) -> list[str]:
    """One line for each base, withheld and no-figure symbol present."""
    lines = []
    if any(c.base_flag == "low" for c in cells):
        lines.append(f"{LOW_MARK} base under {low_base} respondents: read with caution.")
    if any(c.base_flag == "very-low" for c in cells):
        lines.append(f"{VERY_LOW_MARK} base under {VERY_LOW_BASE} respondents: indicative only.")
    if any(c.suppressed for c in cells):
        below = f" (fewer than {marks.suppress_below})" if marks.suppress_below else ""
        lines.append(f"{SUPPRESSED} withheld: too few respondents{below} to show a figure.")
    if any(c.text == NO_DATA for c in cells):
        lines.append(f"{NO_DATA} no figures for this column.")
    return lines


def _legend(
    rows: Sequence[TableRow], omitted: Sequence[str], notes: Sequence[str], *, weighted: bool, level_label: str,
    marks: Marks, low_base: int,
) -> tuple[str, ...]:
    """What the reader needs under the by-wave table, each item once: what the figures are, then
    every symbol the table uses, then the codebook's notes."""
    cells = [c for r in rows for c in r.cells]
    if weighted:
        lines = [
            "Weighted percentages of the base; bases and n count respondents (unweighted). "
            f"“Show precision” adds each figure's {level_label} interval, standard error, design effect and n."
        ]
    else:
        lines = ["Unweighted percentages of the base; bases count respondents. “Show precision” adds n per row."]
    lines += _symbol_lines(cells, marks=marks, low_base=low_base)
    if any(c.text == NOT_ASKED_IN_WAVE for c in cells):
        lines.append("“not asked in this wave”: the question was not part of that wave.")
    for label in omitted:
        lines.append(f"“{label}” is 0 in every column and not shown.")
    lines += notes
    if any(c.interval == SET_BY_WEIGHTING for c in cells):
        lines.append(SET_BY_WEIGHTING_NOTE)
    return tuple(lines)


def chart_of(table: Table) -> DotChart | None:
    """The dot chart of the Total column of the table's latest wave with figures: its percentage
    rows (each figure with its change mark), or None when it has none."""
    for index in range(len(table.columns) - 1, -1, -1):
        points = []
        for r in table.rows:
            cell = r.cells[index]
            if r.kind in CHART_KINDS and cell.estimate is not None and not cell.suppressed:
                mark = {"up": f" {UP}", "down": f" {DOWN}"}.get(cell.change or "", "")
                points.append((r.label, cell.estimate, cell.low, cell.high, cell.text + mark))
        if points:
            return dot_chart(points, column=f"Total, {table.columns[index].label}", percent=True)
    return None


def type_label(variable: Variable) -> str:
    return TYPE_LABELS.get(variable.type, variable.type)
