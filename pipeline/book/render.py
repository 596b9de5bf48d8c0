"""The result book: one self-contained HTML page built from the tidy long cell frame.

`render_book(study, cells, out_path=...)` turns the cells (see `pipeline.topline` for their
columns) into a `BookContext` (the documented object every template receives), renders
`templates/book.html.j2` with autoescaping forced on and strict undefined variables, and writes
the page atomically through `pipeline.outputs` (a temporary file in the same folder, then a rename).

When the cells carry weighted estimates (the columns `estimate`, `ci_low`, `ci_high` added to
the same rows by the estimation stage), percentages, means and medians show the weighted
estimate with its confidence interval, and the counts beneath stay unweighted; otherwise the
book shows unweighted figures and says so.

The book holds aggregates only: counts, percentages and statistics per wave. It never receives
respondent-level rows, so it cannot show them.
"""

from __future__ import annotations

import datetime as dt
import math
import re
from dataclasses import dataclass, replace
from functools import cache
from pathlib import Path

import jinja2
import polars as pl

from pipeline import __version__
from pipeline.errors import WavebookError
from pipeline.outputs import write_text_output
from pipeline.resources import resource_dir
from pipeline.staging.spec import Design, Study, Variable, Wave

# Low-base thresholds: common practice, no source (trade rules of thumb for unweighted bases).
LOW_BASE = 50
VERY_LOW_BASE = 30

TYPE_LABELS = {
    "single": "Single choice",
    "multi": "Multiple choice",
    "rating": "Rating scale",
    "numeric": "Number",
}
REQUIRED_COLUMNS = (
    "wave", "variable", "row_kind", "row_order", "row_label", "code", "count", "base", "percent", "value", "note",
)
ESTIMATE_COLUMNS = ("estimate", "ci_low", "ci_high")
PERCENT_KINDS = ("category", "excluded", "net", "item", "missing", "not-asked")
ESTIMATED_STATISTICS = ("mean", "median")
SET_BY_WEIGHTING = "set by weighting"
NOT_ASKED_IN_WAVE = "not asked in this wave"
SET_BY_WEIGHTING_NOTE = (
    "Percentages marked 'set by weighting' equal the population figures the weights were "
    "calibrated to; they carry no sampling error of their own."
)


@dataclass(frozen=True)
class WaveColumn:
    """A wave as a table column: id, label, fieldwork dates as text, respondents staged (None: not staged)."""

    id: str
    label: str
    fieldwork: str | None
    respondents: int | None


@dataclass(frozen=True)
class Cell:
    """One table cell: the main figure as text, its confidence interval as text (weighted books),
    an optional secondary figure (the unweighted count under a percentage), the base flag:
    None, "low" (base < LOW_BASE) or "very-low" (< VERY_LOW_BASE), and the estimate's design
    effect as text (weighted books)."""

    text: str
    detail: str | None = None
    base_flag: str | None = None
    interval: str | None = None
    deff: str | None = None


@dataclass(frozen=True)
class TableRow:
    """One table row: its kind (see pipeline.topline.ROW_KINDS), label and one cell per wave."""

    kind: str
    label: str
    cells: tuple[Cell, ...]


@dataclass(frozen=True)
class Table:
    """One variable's table: rows = base, categories/items, nets, statistics, no answer; columns = waves."""

    columns: tuple[WaveColumn, ...]
    rows: tuple[TableRow, ...]
    notes: tuple[str, ...]


@dataclass(frozen=True)
class Section:
    """One variable of the codebook with its table; `anchor` is its id in the page."""

    anchor: str
    name: str
    label: str
    type_label: str
    table: Table
    has_low_base: bool


@dataclass(frozen=True)
class Caution:
    """A caution for the reader: a short title and its paragraphs."""

    title: str
    paragraphs: tuple[str, ...]


@dataclass(frozen=True)
class BookContext:
    """Everything `templates/book.html.j2` receives (as `book`).

    title, notes: from the spec. weighted: whether percentages, means and medians are weighted
    estimates with intervals. waves: every declared wave in spec order. design: one line per
    design fact. methodology: paragraphs on how the figures were produced. cautions: what the
    reader must keep in mind. sections: one per codebook variable, in spec order.
    low_base, very_low_base: the thresholds behind the cell flags. generated_at (UTC, text) and
    version: for the footer. weighting: the weights in summary per wave and the margins they
    meet (`pipeline.book.weighting`), None for an unweighted book. status: the one-line heading of
    what the figures are (weighted by the weighting steps, by the design weights only, or unweighted). banners: the banner tables
    (`pipeline.tables.book_view.BannerView`, latest wave of each) and banner_legend their legend,
    empty without `[tables]`.
    """

    title: str
    notes: tuple[str, ...]
    weighted: bool
    waves: tuple[WaveColumn, ...]
    design: tuple[str, ...]
    methodology: tuple[str, ...]
    cautions: tuple[Caution, ...]
    sections: tuple[Section, ...]
    low_base: int
    very_low_base: int
    generated_at: str
    version: str
    weighting: WeightingSection | None = None
    status: str = "Unweighted counts and percentages"
    banners: tuple = ()
    banner_legend: tuple[str, ...] = ()


def render_book(
    study: Study,
    cells: pl.DataFrame,
    *,
    out_path: Path,
    weighting: WeightingSection | None = None,
    variance: tuple[str, ...] = (),
    level: float = 0.95,
    banners: tuple = (),
    banner_legend: tuple[str, ...] = (),
) -> Path:
    """Render the result book of `study` from `cells` (tidy long frame) and write it to `out_path`.

    The page is rendered completely in memory first; only then is it written through
    `pipeline.outputs.write_text_output` (a temporary file in the destination folder moved over
    `out_path`, recorded as wavebook's own output), so a failure never leaves a half-written or
    missing book. The caller checks `out_path` first (`pipeline.outputs.check_output`). Returns
    `out_path`.
    """
    context = build_context(study, cells, weighting=weighting, variance=variance, level=level)
    if banners:
        context = replace(context, banners=tuple(banners), banner_legend=tuple(banner_legend))
    html = _environment().get_template("book.html.j2").render(book=context)
    return write_text_output(Path(out_path), html)


def build_context(
    study: Study,
    cells: pl.DataFrame,
    *,
    weighting: WeightingSection | None = None,
    variance: tuple[str, ...] = (),
    level: float = 0.95,
    now: dt.datetime | None = None,
) -> BookContext:
    """The `BookContext` of `study` from `cells` (columns as produced by `pipeline.topline`, plus
    the estimate columns of `pipeline.weighted_cells` in a weighted book); `weighting` and
    `variance` (sentences on how standard errors were computed) feed the methodology; `level` is
    the confidence level of the intervals."""
    missing = [c for c in REQUIRED_COLUMNS if c not in cells.columns]
    if missing:
        raise WavebookError(f"the result cells lack the column(s) {', '.join(missing)}; cannot build the book")
    weighted = all(c in cells.columns for c in ESTIMATE_COLUMNS) and cells["estimate"].is_not_null().any()
    respondents = dict(
        cells.filter(pl.col("row_kind").is_in(["missing", "not-asked"])).group_by("wave").agg(pl.col("base").max()).iter_rows()
    )
    waves = tuple(_wave_column(w, respondents.get(w.id)) for w in study.waves)
    sections = tuple(
        _section(index, variable, waves, cells.filter(pl.col("variable") == name), weighted=weighted)
        for index, (name, variable) in enumerate(study.variables.items())
    )
    generated = (now or dt.datetime.now(dt.UTC)).astimezone(dt.UTC)
    return BookContext(
        title=study.title,
        notes=tuple(study.notes),
        weighted=weighted,
        status=_status(study, weighted=weighted),
        waves=waves,
        design=_design_lines(study.design),
        methodology=_methodology(weighted=weighted) + (variance if weighted else ()),
        cautions=_cautions(study, sections, weighted=weighted, level=level, weighting=weighting),
        sections=sections,
        low_base=LOW_BASE,
        very_low_base=VERY_LOW_BASE,
        generated_at=generated.strftime("%Y-%m-%d %H:%M UTC"),
        version=__version__,
        weighting=weighting if weighted else None,
    )


@cache
def _environment() -> jinja2.Environment:
    """The template environment: autoescaping forced on for every template, strict undefined."""
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(resource_dir("templates"))),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters["thousands"] = lambda number: f"{number:,}"
    return env


def _wave_column(wave: Wave, respondents: int | None) -> WaveColumn:
    """A wave with its fieldwork dates as text ("2 Mar 2026 to 21 Mar 2026")."""
    dates = [d for d in (wave.fieldwork_start, wave.fieldwork_end) if d is not None]
    fieldwork = " to ".join(f"{d.day} {d:%b %Y}" for d in dates) if dates else None
    return WaveColumn(id=wave.id, label=wave.label, fieldwork=fieldwork, respondents=respondents)


def _section(
    index: int, variable: Variable, waves: tuple[WaveColumn, ...], cells: pl.DataFrame, *, weighted: bool
) -> Section:
    """One variable's section: rows in `row_order`, one cell per wave (a dash where a wave has no
    data; NOT_ASKED_IN_WAVE where the wave did not ask the variable or the multi item)."""
    by_key = {(row["row_order"], row["wave"]): row for row in cells.iter_rows(named=True)}
    layout = cells.unique("row_order", keep="first").sort("row_order").select(
        "row_order", "row_kind", "row_label", "code"
    )
    rows = []
    for order, kind, row_label, code in layout.iter_rows():
        item = code if kind == "item" else None
        row_cells = tuple(
            Cell(text=NOT_ASKED_IN_WAVE)
            if (order, w.id) not in by_key and not variable.asked_in(w.id, item)
            else _cell(by_key.get((order, w.id)), weighted=weighted)
            for w in waves
        )
        rows.append(TableRow(kind=kind, label=row_label, cells=row_cells))
    notes = tuple(note for note in cells.sort("row_order")["note"].unique(maintain_order=True).to_list() if note)
    if any(c.interval == SET_BY_WEIGHTING for r in rows for c in r.cells):
        notes += (SET_BY_WEIGHTING_NOTE,)
    slug = re.sub(r"[^a-z0-9]+", "-", variable.name.lower()).strip("-")
    return Section(
        anchor=f"v{index + 1}-{slug}" if slug else f"v{index + 1}",
        name=variable.name,
        label=variable.label,
        type_label=TYPE_LABELS.get(variable.type, variable.type),
        table=Table(columns=waves, rows=tuple(rows), notes=notes),
        has_low_base=any(c.base_flag for r in rows for c in r.cells),
    )


def _cell(row: dict | None, *, weighted: bool) -> Cell:
    """Format one cell: percentages as whole numbers with the unweighted count beneath, statistics
    to 2 decimals; in a weighted book the weighted estimate and its interval where the row has one."""
    if row is None:
        return Cell(text="–")
    flag = _base_flag(row["base"])
    kind = row["row_kind"]
    if kind == "base":
        return Cell(text=f"{row['count']:,}")
    if kind == "balance":
        if weighted and row.get("estimate") is not None:
            interval = (f"{_balance_text(row['ci_low'])} to {_balance_text(row['ci_high'])}"
                        if row["ci_low"] is not None else None)
            return Cell(text=_balance_text(row["estimate"]), base_flag=flag, interval=interval, deff=_deff_text(row))
        return Cell(text="–" if row["value"] is None else _balance_text(row["value"]), base_flag=flag)
    if weighted and row.get("estimate") is not None:
        if kind in ("missing", "not-asked", "excluded"):
            return Cell(text=_percent_text(row["estimate"]), detail=f"{row['count']:,}", base_flag=flag)
        if kind in PERCENT_KINDS and row.get("set_by_weighting"):
            text = _percent_text(row["estimate"])
            return Cell(text=text, detail=f"{row['count']:,}", base_flag=flag, interval=SET_BY_WEIGHTING)
        if kind in PERCENT_KINDS:
            interval = _percent_interval(row["ci_low"], row["ci_high"]) if row["ci_low"] is not None else None
            text = _percent_text(row["estimate"])
            return Cell(text=text, detail=f"{row['count']:,}", base_flag=flag, interval=interval, deff=_deff_text(row))
        if kind == "statistic" and row.get("code") in ESTIMATED_STATISTICS:
            interval = f"{row['ci_low']:,.2f}–{row['ci_high']:,.2f}" if row["ci_low"] is not None else None
            return Cell(text=f"{row['estimate']:,.2f}", base_flag=flag, interval=interval, deff=_deff_text(row))
    if kind == "statistic":
        value = row["value"]
        if value is None:
            return Cell(text="–", base_flag=flag)
        text = f"{value:,.0f}" if row.get("code") == "n" else f"{value:,.2f}"
        return Cell(text=text, base_flag=flag)
    if row["percent"] is None:
        return Cell(text="–", detail=f"{row['count']:,}", base_flag=flag)
    return Cell(text=_percent_text(row["percent"]), detail=f"{row['count']:,}", base_flag=flag)


def _balance_text(points: float) -> str:
    """A balance score in points, rounded half up, with its sign ("+12", "-3", "0")."""
    whole = _whole(points)
    return f"{whole:+d}" if whole else "0"


def _percent_interval(low: float, high: float) -> str:
    """An interval of percentages: whole numbers, or one decimal when it lies below 2% (where whole
    numbers would print "0–0" for an interval that is not empty)."""
    if high < 1.95:
        return f"{low:.1f}–{high:.1f}"
    return f"{_whole(low)}–{_whole(high)}"


def _deff_text(row: dict) -> str | None:
    """The design effect to 2 decimals, or None where it is undefined (e.g. a 0% or 100% cell)."""
    deff = row.get("deff")
    return f"{deff:.2f}" if deff is not None and math.isfinite(deff) else None


def _percent_text(percent: float) -> str:
    """A percentage rounded half up to a whole number; "<1%" for a non-zero share below 0.5%."""
    if 0 < percent < 0.5:
        return "<1%"
    return f"{_whole(percent)}%"


def _whole(number: float) -> int:
    """`number` rounded half up to a whole number (12.5 -> 13; Python's round() would give 12)."""
    return math.floor(number + 0.5)


def _base_flag(base: int | None) -> str | None:
    """ "very-low" below VERY_LOW_BASE, "low" below LOW_BASE, else None (a base of 0 is shown as a dash)."""
    if base is None or base == 0:
        return None
    if base < VERY_LOW_BASE:
        return "very-low"
    if base < LOW_BASE:
        return "low"
    return None


def _design_lines(design: Design) -> tuple[str, ...]:
    """The declared sample design, one plain sentence per fact."""
    if design.kind == "nonprobability":
        lines = ["Non-probability sample (quota or online panel): every respondent has the same base weight."]
    else:
        lines = ["Probability sample."]
    lines.append(f"Strata: column '{design.strata}'." if design.strata else "No stratification declared.")
    if design.psu:
        ids = "restart within each stratum" if design.psu_ids == "within-stratum" else "unique across strata"
        lines.append(f"Primary sampling units: column '{design.psu}' (ids {ids}).")
    else:
        lines.append("Each respondent is their own primary sampling unit.")
    if design.base_weight:
        lines.append(f"Base weights: column '{design.base_weight}'.")
    elif design.selection_probability:
        lines.append(f"Base weights: 1 / selection probability (column '{design.selection_probability}').")
    else:
        lines.append("Base weights: equal for every respondent.")
    if design.first_stage == "pps" and design.psu_inclusion_probability:
        lines.append(
            "First-stage units drawn with probability proportional to size: each unit's squared deviation is "
            f"multiplied by one minus its inclusion probability (column '{design.psu_inclusion_probability}'), "
            "the usual approximation for such samples."
        )
    elif design.first_stage == "pps":
        lines.append(
            "First-stage units drawn with probability proportional to size: standard errors use the "
            "with-replacement formula, with no finite population correction (slightly conservative)."
        )
    elif design.population:
        lines.append("Finite population correction from the declared population of first-stage units per stratum.")
    elif design.sampling_fraction:
        lines.append("Finite population correction from the declared sampling fractions per stratum.")
    else:
        lines.append("No finite population correction declared.")
    return tuple(lines)


MEDIAN_WEIGHTED = (
    "The median of a rating scale is the interpolated median of grouped answers: each answer k "
    "counts as spread evenly from k - 0.5 to k + 0.5, and the median is the point with half the "
    "weight below it. The median of a number is the smallest answer with at least half the weight "
    "at or below it. Medians carry no design effect."
)
MEDIAN_UNWEIGHTED = "The median is the middle answer, or the midpoint of the two middle answers."


def _status(study: Study, *, weighted: bool) -> str:
    """The book's heading line: only a study with weighting steps is headed as weighted estimates."""
    if not weighted:
        return "Unweighted counts and percentages"
    if study.weighting:
        return "Weighted estimates with confidence intervals"
    if study.design.base_weight or study.design.selection_probability:
        return "Estimates with design weights (no weighting adjustments) and confidence intervals"
    return "Estimates with equal weights and confidence intervals"


def _methodology(*, weighted: bool) -> tuple[str, ...]:
    """How the figures in the book were produced."""
    if weighted:
        first = (
            "Percentages, means and medians are WEIGHTED estimates of the population, with their "
            "confidence interval (lowest to highest) beneath each figure. Bases, the counts beneath "
            "percentages, the number of answers, minimum and maximum are UNWEIGHTED: they count "
            "respondents."
        )
    else:
        first = (
            "All figures in this book are UNWEIGHTED: every respondent counts once, whatever weights "
            "the design declares. Weighted estimates, standard errors and design effects are not "
            "shown in this version."
        )
    paragraphs = [
        first,
        "Base: the respondents of the wave who gave a valid answer to the question. Percentages of "
        "categories and nets are of that base. The 'No answer' row counts the wave's other respondents; "
        "its percentage is of all respondents of the wave.",
        "Multiple-choice questions: each item's percentage is of the respondents asked who answered "
        "that item; 'Any of these' counts respondents who chose at least one item. The 'Not asked' "
        "row counts respondents with no answer to any item.",
        "Rating scales and numbers: the mean, median, minimum and maximum use the answers given, "
        "leaving out codes such as 'don't know' where the codebook says so (noted under the table). "
        + (MEDIAN_WEIGHTED if weighted else MEDIAN_UNWEIGHTED),
    ]
    return tuple(paragraphs)


def _cautions(
    study: Study,
    sections: tuple[Section, ...],
    *,
    weighted: bool,
    level: float,
    weighting: WeightingSection | None,
) -> tuple[Caution, ...]:
    """The reader's cautions: unweighted figures, what weighting can repair, sample type, low bases,
    what a confidence interval says."""
    pct = f"{100 * level:g}"
    cautions = []
    if weighted and weighting is not None and weighting.variables:
        cautions.append(
            Caution(
                "What the weighting repairs",
                (
                    "The weights make the sample match the population on "
                    + ", ".join(weighting.variables)
                    + ". They correct for who answered only as far as answering is related to these "
                    "characteristics; differences between respondents and non-respondents on anything "
                    "else remain.",
                ),
            )
        )
    if not weighted:
        cautions.append(
            Caution(
                "Unweighted figures",
                (
                    "These figures describe the people who answered, not the population: no weights "
                    "correct for the sample design or for who chose to respond.",
                ),
            )
        )
    if study.design.kind == "nonprobability":
        cautions.append(
            Caution(
                "Non-probability sample",
                (
                    "Respondents were not selected with known probabilities (a quota sample or an "
                    "online panel). Weighting can align the sample with known population margins, "
                    "but it cannot guarantee that respondents resemble non-respondents on anything "
                    "else. Sampling-error figures computed for such samples rest on a model, not on "
                    "the selection, and should be read as approximate.",
                ),
            )
        )
    low = [s.label for s in sections if s.has_low_base]
    if low:
        cautions.append(
            Caution(
                "Low bases",
                (
                    f"Cells marked † rest on fewer than {LOW_BASE} respondents and cells marked ‡ on "
                    f"fewer than {VERY_LOW_BASE}: treat them with caution, and the second as indicative "
                    "only.",
                    "Tables with low bases: " + "; ".join(low) + ".",
                ),
            )
        )
    cautions.append(
        Caution(
            "What a confidence interval says",
            (
                f"A {pct}% confidence interval comes from a method that, over many samples drawn the same "
                f"way, would cover the population value {pct} times in 100. It does not mean there is a {pct}% "
                "chance that the population value lies in one particular interval.",
                "It covers sampling error only: not errors from who could be reached, who chose to "
                "answer, how questions were worded or how answers were recorded. Two intervals that "
                "overlap can still come from a significant difference; test the difference itself.",
            ),
        )
    )
    return tuple(cautions)
