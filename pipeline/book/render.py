"""The result book: self-contained HTML pages built from the unified cells export.

`render_book(study, cells, tests=..., out_path=...)` turns the cells (the `<stem>_cells` frame
the run writes beside the book, `pipeline.book.source`; `pipeline.book.tables` for how they
become tables) and the tests export (the Rao-Scott lines under the banner tables) into a
`BookContext` (the documented object every template receives), renders the templates with
autoescaping forced on and strict undefined variables, and writes the book atomically.

Output (`pipeline.book.pages`): one file, or a folder with `index.html` (cover and contents) and
a page each for the methodology, every table, the trends and the appendix. By default
(`single_file=None`) a book of fewer than SINGLE_FILE_LIMIT tables is one file unless that file
would exceed PAGE_LIMIT bytes, when it becomes a folder (so no page a reader opens is larger
than needed). `manifest.json` is written beside the book when a manifest is given.

When the cells carry standard errors (a weighted run), percentages, means and medians show the
weighted estimate, its interval, standard error and design effect; the counts stay unweighted;
otherwise the book shows unweighted figures and says so.

The book holds aggregates only: counts, percentages and statistics per wave and banner column.
It never receives respondent-level rows, so it cannot show them.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import gc
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from functools import cache
from pathlib import Path

import jinja2
import polars as pl

from pipeline import __version__
from pipeline.book.manifest import SHORT_HASH, manifest_hash, manifest_json
from pipeline.book.numbers import percent_text_exprs
from pipeline.book.pages import Page, plan_pages, write_book
from pipeline.book.source import TOTAL, check_cells
from pipeline.book.tables import (
    LOW_BASE,
    VERY_LOW_BASE,
    Column,
    Marks,
    TEXT_ALONE,
    TEXT_INTERVAL,
    TEXT_SHARED,
    Section,
    anchor_of,
    banner_table,
    chart_of,
    table_cells,
    type_label,
    wave_table,
)
from pipeline.book.trends import TrendGroup, trend_groups
from pipeline.book.weighting import WeightingSection
from pipeline.resources import resource_dir
from pipeline.staging.spec import Design, Study, Wave

__all__ = ["LOW_BASE", "PAGE_LIMIT", "SINGLE_FILE_LIMIT", "VERY_LOW_BASE", "BookContext", "build_context",
           "render_book"]

SINGLE_FILE_LIMIT = 100
PAGE_LIMIT = 2_000_000  # bytes: a default one-file book larger than this becomes a folder
# The columns of the cells export the book reads (the others stay in the export).
READ_COLUMNS = ("wave", "table", "row", "row_label", "row_kind", "banner", "break_variable", "column",
                "column_label", "letter", "statistic", "estimate", "se", "ci_low", "ci_high", "deff",
                "base_unweighted", "base_weighted", "flags", "sig_higher_than", "sig_higher_than_lighter",
                "change_mark", "note")


@dataclass(frozen=True)
class WaveColumn:
    """A wave: id, label, fieldwork dates as text, respondents staged (None: not staged)."""

    id: str
    label: str
    fieldwork: str | None
    respondents: int | None


@dataclass(frozen=True)
class Caution:
    """A caution for the reader: a short title and its paragraphs."""

    title: str
    paragraphs: tuple[str, ...]


@dataclass(frozen=True)
class CodebookEntry:
    """One variable in the appendix: name, label, type and its codes with their labels."""

    name: str
    label: str
    type_label: str
    codes: tuple[tuple[str, str], ...]
    href: str


@dataclass(frozen=True)
class BookContext:
    """Everything the templates receive (as `book`).

    title, notes: from the spec. weighted: whether percentages, means and medians are weighted
    estimates with intervals. waves: every declared wave in spec order. completes: respondents
    of the latest staged wave (None when none is staged). design: one line per design fact.
    methodology: paragraphs on how the figures were produced. cautions: what the reader must keep
    in mind. sections: one per codebook variable, in spec order (by-wave table, banner tables,
    chart, link). trends: the tracked measures per table (empty with fewer than two waves).
    codebook: the appendix's codebook. low_base, very_low_base: the thresholds behind the Total's
    cell flags. marks: how the banner tables were tested (None without banner tables).
    level_label: the intervals' confidence level ("95%"). generated_at (UTC, text) and version:
    for the footer. weighting: the weights in summary per wave and the margins they meet
    (`pipeline.book.weighting`), None for an unweighted book. manifest: the run manifest (None
    when the book was rendered without one) and manifest_hash its short SHA-256. pages: the files
    of the book; links: href of each page kind ("cover", "contents", "methodology", "trends",
    "appendix"); trend_pages: a folder book's trends pages when there is more than one.
    status: the one-line heading of what the figures are (weighted by the weighting steps, by
    the design weights only, or unweighted).
    """

    title: str
    notes: tuple[str, ...]
    weighted: bool
    waves: tuple[WaveColumn, ...]
    completes: int | None
    design: tuple[str, ...]
    methodology: tuple[str, ...]
    cautions: tuple[Caution, ...]
    sections: tuple[Section, ...]
    trends: tuple[TrendGroup, ...]
    codebook: tuple[CodebookEntry, ...]
    low_base: int
    very_low_base: int
    level_label: str
    generated_at: str
    version: str
    pages: tuple[Page, ...]
    links: dict[str, str]
    trend_pages: tuple[Page, ...]
    weighting: WeightingSection | None = None
    manifest: dict | None = None
    manifest_hash: str | None = None
    status: str = "Unweighted counts and percentages"
    marks: Marks | None = None


def render_book(
    study: Study,
    cells: pl.DataFrame,
    *,
    out_path: Path,
    tests: pl.DataFrame | None = None,
    weighting: WeightingSection | None = None,
    variance: tuple[str, ...] = (),
    level: float = 0.95,
    single_file: bool | None = None,
    manifest: dict | None = None,
) -> Path:
    """Render the result book of `study` from `cells` (the unified cells export) and `tests` (the
    tests export, for the independence tests) and write it.

    `out_path` names the one-file book (e.g. book/study.html); a folder book goes to the folder
    of that name without the suffix (book/study/index.html). `single_file` None: one file below
    SINGLE_FILE_LIMIT tables and PAGE_LIMIT bytes. Every page is rendered in memory first and
    written atomically, so a failure never leaves a half-written or missing book. Returns the
    path of the page to open.
    """
    out_path = Path(out_path)
    context = build_context(
        study, cells, tests=tests, weighting=weighting, variance=variance, level=level,
        single_file=single_file is not False and len(study.variables) < SINGLE_FILE_LIMIT, manifest=manifest,
    )
    env = _environment()
    with _collector_paused():
        files = _render(env, context)
    if single_file is None and len(context.pages) == 1 and len(files[""].encode("utf-8")) > PAGE_LIMIT:
        context = paged(context, single_file=False)
        with _collector_paused():
            files = _render(env, context)
    if manifest is not None:
        files["manifest.json"] = manifest_json(manifest)
    return write_book(out_path, files, single_file=len(context.pages) == 1)


@contextmanager
def _collector_paused() -> Iterator[None]:
    """Pause Python's cycle collector while the book builds its many small objects, none of them
    cyclic (the collector would only rescan them); restored afterwards."""
    collecting = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if collecting:
            gc.enable()


def _render(env: jinja2.Environment, context: BookContext) -> dict[str, str]:
    template = env.get_template("page.html.j2")
    return {page.file: template.render(book=context, page=page) for page in context.pages}


def paged(context: BookContext, *, single_file: bool) -> BookContext:
    """`context` laid out as one file or as a folder of pages (pages, links and every href)."""
    plan = plan_pages([s.anchor for s in context.sections], single_file=single_file)
    sections = tuple(
        dataclasses.replace(s, page=plan.section_pages[s.anchor], href=plan.href(plan.section_pages[s.anchor], s.anchor))
        for s in context.sections
    )
    hrefs = {s.name: s.href for s in sections}
    by_anchor = {s.anchor: s.href for s in sections}
    return dataclasses.replace(
        context,
        sections=sections,
        trends=tuple(dataclasses.replace(g, href=by_anchor[g.anchor]) for g in context.trends),
        codebook=tuple(dataclasses.replace(e, href=hrefs[e.name]) for e in context.codebook),
        pages=plan.pages,
        links=plan.links,
        trend_pages=plan.trend_pages,
    )


def _independence_lines(tests: pl.DataFrame | None, labels: Mapping[str, str], marks: Marks | None) -> dict[
        tuple[str, str, str], tuple[str, ...]]:
    """(wave, table, banner) -> one sentence per break on the Rao-Scott test of independence."""
    if tests is None or tests.height == 0 or "comparison" not in tests.columns:
        return {}
    level = marks.level_text() if marks is not None else "5%"
    lines: dict[tuple[str, str, str], list[str]] = {}
    for r in tests.filter(pl.col("comparison") == "independence").iter_rows(named=True):
        label = labels.get(r["column_a"], r["column_a"])
        if r["statistic"] is None or r["p_value"] is None:
            text = f"Test of independence from {label}: not computed (too few respondents)."
        else:
            p = "p < 0.001" if r["p_value"] < 0.001 else f"p = {r['p_value']:.3f}"
            verdict = "significant" if r["significant"] else "not significant"
            text = (
                f"Test of independence from {label} (Rao-Scott second-order corrected F): F = {r['statistic']:.2f} "
                f"on {r['df_num']:.1f} and {r['df_den']:.1f} degrees of freedom, {p}: {verdict} at the {level} level."
            )
        lines.setdefault((r["wave"], r["table"], r["banner"]), []).append(text)
    return {k: tuple(v) for k, v in lines.items()}


def _marks(study: Study) -> Marks | None:
    """The banner tables' test settings from the spec's [tables] (None without it)."""
    from pipeline.tables import tables_spec

    spec = tables_spec(study)
    if spec is None:
        return None
    return Marks(levels=tuple(spec.levels), adjust=spec.adjust, low_base=spec.low_base,
                 suppress_below=spec.suppress_below)


def build_context(
    study: Study,
    cells: pl.DataFrame,
    *,
    tests: pl.DataFrame | None = None,
    weighting: WeightingSection | None = None,
    variance: tuple[str, ...] = (),
    level: float = 0.95,
    now: dt.datetime | None = None,
    single_file: bool = True,
    manifest: dict | None = None,
) -> BookContext:
    """The `BookContext` of `study` from `cells` (the unified cells export, `pipeline.book.source`)
    and `tests` (the tests export); `weighting` and `variance` (sentences on how standard errors
    were computed) feed the methodology; `level` is the confidence level of the intervals;
    `single_file` decides the pages and links."""
    cells = check_cells(cells)
    weighted = bool(cells["se"].is_not_null().any())
    respondents = dict(
        cells.filter((pl.col("banner") == TOTAL) & pl.col("row_kind").is_in(["missing", "not-asked"]))
        .group_by("wave").agg(pl.col("base_unweighted").max()).iter_rows()
    )
    waves = tuple(_wave_column(w, respondents.get(w.id)) for w in study.waves)
    columns = tuple(Column(key=w.id, label=w.label, sublabel=w.fieldwork) for w in waves)
    wave_labels = {w.id: w.label for w in waves}
    wave_order = [w.id for w in waves]
    level_label = f"{100 * level:g}%"
    marks = _marks(study) if (cells["banner"] != TOTAL).any() else None
    labels = {name: v.label for name, v in study.variables.items()}
    independence = _independence_lines(tests, labels, marks)
    shown = _shown(cells, wave_order).select(*READ_COLUMNS, TEXT_ALONE, TEXT_SHARED, TEXT_INTERVAL)
    by_table = {key[0]: frame.to_dicts() for key, frame in shown.partition_by("table", as_dict=True).items()}
    with _collector_paused():
        sections = _sections(study, by_table, columns, wave_order=wave_order, wave_labels=wave_labels,
                             labels=labels, weighted=weighted, level_label=level_label, marks=marks,
                             independence=independence)
    sections_t = tuple(sections)
    staged = [w.respondents for w in waves if w.respondents is not None]
    generated = (now or dt.datetime.now(dt.UTC)).astimezone(dt.UTC)
    context = BookContext(
        title=study.title,
        notes=tuple(study.notes),
        weighted=weighted,
        status=_status(study, weighted=weighted),
        waves=waves,
        completes=staged[-1] if staged else None,
        design=_design_lines(study.design),
        methodology=_methodology(weighted=weighted) + (variance if weighted else ()),
        cautions=_cautions(study, sections_t, weighted=weighted, level=level, weighting=weighting),
        sections=sections_t,
        trends=trend_groups(sections_t),
        codebook=tuple(
            CodebookEntry(
                name=name, label=v.label, type_label=type_label(v),
                codes=tuple((str(code), label) for code, label in v.values.items()), href="",
            )
            for name, v in study.variables.items()
        ),
        low_base=LOW_BASE,
        very_low_base=VERY_LOW_BASE,
        level_label=level_label,
        generated_at=generated.strftime("%Y-%m-%d %H:%M UTC"),
        version=__version__,
        pages=(),
        links={},
        trend_pages=(),
        weighting=weighting if weighted else None,
        manifest=manifest,
        manifest_hash=manifest_hash(manifest)[:SHORT_HASH] if manifest is not None else None,
        marks=marks,
    )
    return paged(context, single_file=single_file)


def _sections(study: Study, by_table: Mapping[str, list[dict]], columns: tuple[Column, ...], *,
              wave_order: Sequence[str], wave_labels: Mapping[str, str], labels: Mapping[str, str], weighted: bool,
              level_label: str, marks: Marks | None,
              independence: Mapping[tuple[str, str, str], tuple[str, ...]]) -> list[Section]:
    """One section per codebook variable: its by-wave table, banner tables and chart (page and
    href are filled in by `paged`)."""
    sections = []
    for index, (name, variable) in enumerate(study.variables.items()):
        frame_rows = by_table.get(name, [])
        indexed = table_cells(variable, frame_rows)
        table, omitted = wave_table(
            variable, columns, indexed, weighted=weighted, level_label=level_label, marks=marks or Marks()
        )
        banners = _banner_tables(
            variable, indexed, frame_rows, wave_order=wave_order, wave_labels=wave_labels, labels=labels,
            omitted=omitted, weighted=weighted, level_label=level_label, marks=marks or Marks(),
            independence=independence,
        )
        sections.append(
            Section(
                anchor=anchor_of(index, name), page="", href="", name=name, label=variable.label,
                type_label=type_label(variable), table=table, banners=banners, chart=chart_of(table),
                has_low_base=any(c.base_flag for t in (table, *banners) for r in t.rows for c in r.cells),
            )
        )
    return sections


def _shown(cells: pl.DataFrame, wave_order: Sequence[str]) -> pl.DataFrame:
    """The rows the book shows: the Total of every wave, and each table's banner columns in the
    latest wave that has them (earlier waves' banner columns are in the export, not the book),
    with the percentages' texts (`numbers.percent_text_exprs`)."""
    position = pl.col("wave").replace_strict({w: i for i, w in enumerate(wave_order)}, default=-1,
                                             return_dtype=pl.Int64)
    banner = pl.col("banner") != TOTAL
    latest = pl.when(banner).then(position).max().over("table", "banner")
    shown = cells.filter(~banner | (position == latest))
    percent = pl.col("statistic") == "percent"
    alone, shared, interval = percent_text_exprs(100 * pl.col("estimate"), 100 * pl.col("ci_low"),
                                                 100 * pl.col("ci_high"))
    return shown.with_columns(  # the percentages' texts for the whole frame at once (`tables.format_cell`)
        pl.when(percent).then(alone).alias(TEXT_ALONE), pl.when(percent).then(shared).alias(TEXT_SHARED),
        pl.when(percent).then(interval).alias(TEXT_INTERVAL),
    )


def _banner_tables(
    variable, indexed, frame_rows: Sequence[dict], *, wave_order: Sequence[str], wave_labels: Mapping[str, str],
    labels: Mapping[str, str], omitted: Sequence[int], weighted: bool, level_label: str, marks: Marks,
    independence: Mapping[tuple[str, str, str], tuple[str, ...]],
) -> tuple:
    """The banner tables of one variable: one per banner, in the latest wave that has it."""
    banner_rows = [r for r in frame_rows if r["banner"] != TOTAL]
    tables = []
    for banner in dict.fromkeys(r["banner"] for r in banner_rows):
        waves = {r["wave"] for r in banner_rows if r["banner"] == banner}
        latest = max(waves, key=lambda w: wave_order.index(w) if w in wave_order else -1)
        position = wave_order.index(latest) if latest in wave_order else 0
        previous = wave_labels.get(wave_order[position - 1]) if position > 0 else None
        rows = [r for r in banner_rows if r["banner"] == banner and r["wave"] == latest]
        tables.append(banner_table(
            variable, indexed, rows, wave=latest, wave_label=wave_labels.get(latest, latest), previous_label=previous,
            banner=banner, labels=labels, omitted_rows=omitted, weighted=weighted, level_label=level_label,
            marks=marks, tests=independence.get((latest, variable.name, banner), ()),
        ))
    return tuple(tables)


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
