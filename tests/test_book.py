"""Unweighted toplines and the HTML result book.

Topline values are checked against an independent polars computation on the same invented
respondents (polars is the outside reference: a general-purpose data-frame library computing
value counts, means and medians directly from the rows). The book is checked by parsing its
HTML structure with the standard library's html.parser.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import os
from html.parser import HTMLParser
from pathlib import Path

import duckdb
import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.book import render as book_module
from pipeline.book.render import LOW_BASE, VERY_LOW_BASE, build_context, render_book
from pipeline import outputs as outputs_module
from pipeline.errors import WavebookError
from pipeline.staging.spec import Design, Study, Variable, Wave
from pipeline.topline import CELL_SCHEMA, unweighted_toplines

SCRIPT_LABEL = "Preferred <script>alert('x')</script> kettle"
ID_PREFIX = "QZ-"
W1_SIZE, W2_SIZE = 120, 40  # W2 is a low base (30 to 49); its awareness question a very low one


def _study(tmp_path: Path, *, kind: str = "probability") -> Study:
    """A small invented study covering every variable type."""
    return Study(
        path=tmp_path / "study.toml",
        title="Harbour Lane Toaster Tracker",
        respondent_id="respondent_id",
        waves=(
            Wave("W1", "Wave 1 (spring)", tmp_path / "w1.csv", dt.date(2026, 3, 2), dt.date(2026, 3, 21)),
            Wave("W2", "Wave 2 (summer)", tmp_path / "w2.csv"),
        ),
        design=Design(kind=kind),
        variables={
            "region": Variable(
                "region",
                "single",
                "Region",
                values={1: "Northmoor", 2: "Eastvale", 3: "Tea & Coffee Coast"},
                nets={"North or east": (1, 2)},
            ),
            "kettle": Variable("kettle", "single", SCRIPT_LABEL, values={"a": "Amberline", "b": "Brightwell"}),
            "satisfaction": Variable(
                "satisfaction",
                "rating",
                "Overall satisfaction (0-10)",
                values={0: "0 Not at all", 10: "10 Completely", 99: "Don't know"},
                exclude_from_statistics=(99,),
                nets={"Top two box (9-10)": (9, 10)},
            ),
            "aware": Variable(
                "aware", "multi", "Aided awareness", items={"aware_a": "Amberline", "aware_b": "Brightwell"}
            ),
            "spend": Variable("spend", "numeric", "Monthly spend (credits)", minimum=0, maximum=5000),
        },
        notes=("Invented data for tests.",),
    )


def _respondents(seed: int = 20261201) -> pl.DataFrame:
    """Invented respondents of two waves, with missing answers and one question asked to a subset."""
    rng = np.random.default_rng(seed)
    frames = []
    for wave, size, asked_share in (("W1", W1_SIZE, 0.8), ("W2", W2_SIZE, 0.5)):
        region = rng.choice([1, 2, 3], size=size, p=[0.5, 0.3, 0.2]).astype(float)
        region[rng.random(size) < 0.05] = np.nan
        satisfaction = rng.choice([*range(11), 99], size=size).astype(float)
        satisfaction[rng.random(size) < 0.05] = np.nan
        asked = rng.random(size) < asked_share
        aware_a = np.where(asked, (rng.random(size) < 0.6).astype(float), np.nan)
        aware_b = np.where(asked, (rng.random(size) < 0.3).astype(float), np.nan)
        spend = np.round(rng.gamma(2.0, 40.0, size=size), 1)
        spend[rng.random(size) < 0.1] = np.nan
        frames.append(
            pl.DataFrame(
                {
                    "respondent_id": [f"{ID_PREFIX}{wave}-{i:04d}" for i in range(size)],
                    "wave": [wave] * size,
                    "region": region,
                    "kettle": rng.choice(["a", "b"], size=size),
                    "satisfaction": satisfaction,
                    "aware_a": aware_a,
                    "aware_b": aware_b,
                    "spend": spend,
                },
                nan_to_null=True,
            )
        )
    return pl.concat(frames).with_columns(
        pl.col("region", "satisfaction").cast(pl.Int64),
        pl.col("aware_a", "aware_b").cast(pl.Int8),
    )


@pytest.fixture
def data() -> pl.DataFrame:
    return _respondents()


@pytest.fixture
def con(tmp_path: Path, data: pl.DataFrame) -> duckdb.DuckDBPyConnection:
    """A study database holding `responses` with the DEVELOPERS.md column types."""
    connection = duckdb.connect(str(tmp_path / "study.duckdb"))
    connection.execute(
        """
        create table responses as
        select respondent_id, wave, region::BIGINT as region, kettle::VARCHAR as kettle,
               satisfaction::BIGINT as satisfaction, aware_a::TINYINT as aware_a,
               aware_b::TINYINT as aware_b, spend::DOUBLE as spend
        from data
        """
    )
    yield connection
    connection.close()


@pytest.fixture
def cells(con: duckdb.DuckDBPyConnection, tmp_path: Path) -> pl.DataFrame:
    return unweighted_toplines(con, _study(tmp_path))


def _rows(cells: pl.DataFrame, wave: str, variable: str, kind: str) -> pl.DataFrame:
    return cells.filter((pl.col("wave") == wave) & (pl.col("variable") == variable) & (pl.col("row_kind") == kind))


def _statistics(cells: pl.DataFrame, wave: str, variable: str) -> dict[str, float]:
    return dict(_rows(cells, wave, variable, "statistic").select("code", "value").iter_rows())


def _summary(values: pl.Series) -> dict[str, float]:
    """Outside reference: polars Series.count / mean / median / min / max on the kept answers."""
    return {
        "n": values.count(),
        "mean": values.mean(),
        "median": values.median(),
        "min": values.min(),
        "max": values.max(),
    }


def _cell(cells: pl.DataFrame, wave: str, variable: str, kind: str, label: str) -> dict:
    rows = _rows(cells, wave, variable, kind).filter(pl.col("row_label") == label)
    assert rows.height == 1, (wave, variable, kind, label)
    return rows.row(0, named=True)


# ---- toplines against an independent polars computation ------------------------------------


def test_cells_have_the_documented_schema(cells: pl.DataFrame) -> None:
    assert cells.schema == pl.Schema(CELL_SCHEMA)


@pytest.mark.parametrize("wave", ["W1", "W2"])
def test_single_choice_counts_match_polars(cells: pl.DataFrame, data: pl.DataFrame, wave: str) -> None:
    rows = data.filter(pl.col("wave") == wave)
    answered = rows["region"].drop_nulls()
    expected = dict(answered.value_counts().iter_rows())  # outside reference: polars value_counts
    for code, label in {1: "Northmoor", 2: "Eastvale", 3: "Tea & Coffee Coast"}.items():
        cell = _cell(cells, wave, "region", "category", label)
        assert cell["count"] == expected.get(code, 0)
        assert cell["base"] == answered.len()
        assert cell["percent"] == pytest.approx(100 * expected.get(code, 0) / answered.len(), rel=1e-12)
    net = _cell(cells, wave, "region", "net", "North or east")
    assert net["count"] == expected.get(1, 0) + expected.get(2, 0)
    missing = _cell(cells, wave, "region", "missing", "No answer")
    assert missing["count"] == rows["region"].null_count()
    assert missing["base"] == rows.height


def test_text_codes_are_counted(cells: pl.DataFrame, data: pl.DataFrame) -> None:
    w1 = data.filter(pl.col("wave") == "W1")
    assert _cell(cells, "W1", "kettle", "category", "Amberline")["count"] == (w1["kettle"] == "a").sum()


@pytest.mark.parametrize("wave", ["W1", "W2"])
def test_rating_statistics_exclude_dont_know_like_polars(cells: pl.DataFrame, data: pl.DataFrame, wave: str) -> None:
    answered = data.filter(pl.col("wave") == wave)["satisfaction"].drop_nulls()
    scored = answered.filter(answered != 99).cast(pl.Float64)
    assert _statistics(cells, wave, "satisfaction") == pytest.approx(_summary(scored), rel=1e-12)
    assert _cell(cells, wave, "satisfaction", "base", "Base: all giving an answer")["count"] == answered.len()
    assert _cell(cells, wave, "satisfaction", "category", "Don't know")["count"] == (answered == 99).sum()
    top_two = _cell(cells, wave, "satisfaction", "net", "Top two box (9-10)")
    assert top_two["count"] == answered.is_in([9, 10]).sum()
    assert "99 (Don't know)" in _cell(cells, wave, "satisfaction", "statistic", "Mean")["note"]


def test_rating_lists_every_code_of_its_range(cells: pl.DataFrame) -> None:
    labels = (
        _rows(cells, "W1", "satisfaction", "category")
        .sort("row_order")["row_label"]
        .to_list()
    )
    assert labels == ["0 Not at all", *map(str, range(1, 10)), "10 Completely", "Don't know"]


@pytest.mark.parametrize("wave", ["W1", "W2"])
def test_multi_set_percentages_of_those_asked_match_polars(cells: pl.DataFrame, data: pl.DataFrame, wave: str) -> None:
    rows = data.filter(pl.col("wave") == wave)
    asked = rows.filter(pl.any_horizontal(pl.col("aware_a", "aware_b").is_not_null()))
    for column, label in (("aware_a", "Amberline"), ("aware_b", "Brightwell")):
        cell = _cell(cells, wave, "aware", "item", label)
        assert cell["count"] == rows[column].sum()
        assert cell["base"] == rows[column].count()
        assert cell["percent"] == pytest.approx(100 * rows[column].sum() / rows[column].count(), rel=1e-12)
    any_net = _cell(cells, wave, "aware", "net", "Any of these")
    assert any_net["count"] == asked.filter((pl.col("aware_a") == 1) | (pl.col("aware_b") == 1)).height
    assert any_net["base"] == asked.height
    assert _cell(cells, wave, "aware", "missing", "Not asked")["count"] == rows.height - asked.height


@pytest.mark.parametrize("wave", ["W1", "W2"])
def test_numeric_statistics_match_polars(cells: pl.DataFrame, data: pl.DataFrame, wave: str) -> None:
    values = data.filter(pl.col("wave") == wave)["spend"]
    assert _statistics(cells, wave, "spend") == pytest.approx(_summary(values), rel=1e-12)
    assert _cell(cells, wave, "spend", "missing", "No answer")["count"] == values.null_count()


def test_codes_outside_the_codebook_are_shown_not_dropped(con: duckdb.DuckDBPyConnection, tmp_path: Path) -> None:
    con.execute("update responses set region = 7 where respondent_id = ?", [f"{ID_PREFIX}W1-0000"])
    cells = unweighted_toplines(con, _study(tmp_path))
    stray = _cell(cells, "W1", "region", "category", "Code 7 (not in the codebook)")
    assert stray["count"] == 1
    categories = _rows(cells, "W1", "region", "category")
    assert categories["count"].sum() == _cell(cells, "W1", "region", "base", "Base: all giving an answer")["count"]


def test_undeclared_waves_are_left_out(con: duckdb.DuckDBPyConnection, tmp_path: Path) -> None:
    con.execute("update responses set wave = 'W0' where wave = 'W2'")
    cells = unweighted_toplines(con, _study(tmp_path))
    assert cells["wave"].unique().to_list() == ["W1"]


@settings(max_examples=25, deadline=None)
@given(st.lists(st.one_of(st.none(), st.sampled_from([1, 2, 3])), min_size=1, max_size=60))
def test_categories_and_no_answer_add_up_to_the_wave(answers: list[int | None]) -> None:
    """Identity: category counts sum to the base, base + no answer = respondents, percents sum to 100."""
    frame = pl.DataFrame(
        {"respondent_id": [f"r{i}" for i in range(len(answers))], "wave": "W1", "region": answers},
        schema_overrides={"region": pl.Int64},
    )
    study = Study(
        path=Path("study.toml"),
        title="t",
        respondent_id="respondent_id",
        waves=(Wave("W1", "W1", Path("w1.csv")),),
        design=Design(),
        variables={"region": Variable("region", "single", "Region", values={1: "a", 2: "b", 3: "c"})},
    )
    with duckdb.connect() as con:
        con.execute("create table responses as select * from frame")
        cells = unweighted_toplines(con, study)
    categories = cells.filter(pl.col("row_kind") == "category")
    base = cells.filter(pl.col("row_kind") == "base")["count"].item()
    missing = cells.filter(pl.col("row_kind") == "missing")["count"].item()
    assert categories["count"].sum() == base
    assert base + missing == len(answers)
    if base:
        assert categories["percent"].sum() == pytest.approx(100.0, abs=1e-9)
    else:
        assert categories["percent"].null_count() == 3


# ---- the HTML book, parsed --------------------------------------------------------------------


class _Node:
    def __init__(self, tag: str, attrs: dict[str, str | None]) -> None:
        self.tag, self.attrs, self.children = tag, attrs, []
        self.content: list[str | _Node] = []  # text and child elements in document order

    def find_all(self, tag: str) -> list[_Node]:
        found = []
        for child in self.children:
            if child.tag == tag:
                found.append(child)
            found += child.find_all(tag)
        return found

    @property
    def text(self) -> str:
        return " ".join(" ".join(p if isinstance(p, str) else p.text for p in self.content).split())


class _TreeBuilder(HTMLParser):
    """A minimal element tree from html.parser; void elements are closed at once."""

    VOID = {"meta", "br", "hr", "img", "input", "link"}

    def __init__(self) -> None:
        super().__init__()
        self.root = _Node("#root", {})
        self.stack = [self.root]
        self.start_tags: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.start_tags.append(tag)
        node = _Node(tag, dict(attrs))
        self.stack[-1].children.append(node)
        self.stack[-1].content.append(node)
        if tag not in self.VOID:
            self.stack.append(node)

    def handle_endtag(self, tag):
        assert self.stack[-1].tag == tag, f"</{tag}> closes <{self.stack[-1].tag}>"
        self.stack.pop()

    def handle_data(self, data):
        self.stack[-1].content.append(data)


def _parse(path: Path) -> _TreeBuilder:
    builder = _TreeBuilder()
    builder.feed(path.read_text(encoding="utf-8"))
    builder.close()
    assert builder.stack == [builder.root], "unclosed elements"
    return builder


def _section(tree: _TreeBuilder, label: str) -> _Node:
    matches = [s for s in tree.root.find_all("section") if s.find_all("h2") and s.find_all("h2")[0].text == label]
    assert len(matches) == 1, label
    return matches[0]


def _table_cell(section: _Node, row_label: str, wave_index: int) -> _Node:
    (table,) = section.find_all("table")
    body_rows = table.find_all("tbody")[0].find_all("tr")
    (row,) = [r for r in body_rows if r.find_all("th")[0].text == row_label]
    return row.find_all("td")[wave_index]


@pytest.fixture
def book_path(tmp_path: Path, cells: pl.DataFrame) -> Path:
    return render_book(_study(tmp_path), cells, out_path=tmp_path / "book" / "study.html")


def test_one_table_per_variable(book_path: Path, tmp_path: Path) -> None:
    tree = _parse(book_path)
    assert len(tree.root.find_all("table")) == len(_study(tmp_path).variables)
    heads = [th.text for th in tree.root.find_all("table")[0].find_all("thead")[0].find_all("th")]
    assert heads == ["", "Wave 1 (spring) 2 Mar 2026 to 21 Mar 2026", "Wave 2 (summer)"]


def test_known_percent_and_count_in_the_right_cell(book_path: Path, data: pl.DataFrame) -> None:
    w2 = data.filter(pl.col("wave") == "W2")["region"].drop_nulls()
    count = int((w2 == 2).sum())
    percent = 100 * count / w2.len()
    cell = _table_cell(_section(_parse(book_path), "Region"), "Eastvale", 1)
    figure = [s for s in cell.find_all("span") if s.attrs.get("class") == "figure"][0].text
    shown_count = [s for s in cell.find_all("span") if s.attrs.get("class") == "count"][0].text
    assert figure == f"{int(percent + 0.5)}%"  # rounded half up, as the book promises
    assert shown_count == f"n {count}"  # the "n" is text, so it survives copy-paste and screen readers


def test_cell_prefixes_are_text_not_style(book_path: Path) -> None:
    """The "n" and "deff" prefixes are in the HTML, not generated by CSS (lost on copy-paste)."""
    html = book_path.read_text(encoding="utf-8")
    assert '<abbr title="unweighted number of respondents">n</abbr>' in html
    assert "content:" not in html and "::before" not in html and "::after" not in html


def test_labels_are_escaped_not_executed(book_path: Path) -> None:
    html = book_path.read_text(encoding="utf-8")
    tree = _parse(book_path)
    assert "script" not in tree.start_tags
    assert "&lt;script&gt;" in html
    assert _section(tree, SCRIPT_LABEL).find_all("table")
    assert _table_cell(_section(tree, "Region"), "Tea & Coffee Coast", 0) is not None


def test_no_respondent_ids_in_the_book(book_path: Path, data: pl.DataFrame) -> None:
    html = book_path.read_text(encoding="utf-8")
    assert ID_PREFIX not in html
    assert not any(rid in html for rid in data["respondent_id"].to_list())


def test_self_contained_page(book_path: Path) -> None:
    tree = _parse(book_path)
    assert not [t for t in tree.start_tags if t in ("link", "img", "script", "iframe", "object")]
    assert "http://" not in book_path.read_text() and "https://" not in book_path.read_text()
    assert tree.root.find_all("style")


def _caution_titles(path: Path) -> list[str]:
    tree = _parse(path)
    (cautions,) = [s for s in tree.root.find_all("section") if s.attrs.get("id") == "cautions"]
    return [h.text for h in cautions.find_all("h3")]


def test_nonprobability_caution_only_for_nonprobability_designs(tmp_path: Path, cells: pl.DataFrame) -> None:
    probability = render_book(_study(tmp_path), cells, out_path=tmp_path / "p.html")
    nonprobability = render_book(_study(tmp_path, kind="nonprobability"), cells, out_path=tmp_path / "n.html")
    assert "Non-probability sample" not in _caution_titles(probability)
    assert "Non-probability sample" in _caution_titles(nonprobability)
    assert "What a confidence interval says" in _caution_titles(probability)


def test_low_bases_are_marked(book_path: Path, cells: pl.DataFrame) -> None:
    w2_base = _cell(cells, "W2", "region", "base", "Base: all giving an answer")["count"]
    aware_base = _cell(cells, "W2", "aware", "net", "Any of these")["base"]
    assert VERY_LOW_BASE <= w2_base < LOW_BASE and aware_base < VERY_LOW_BASE  # the fixture's intent
    tree = _parse(book_path)
    assert _table_cell(_section(tree, "Region"), "Northmoor", 0).attrs.get("class") is None  # W1 base >= 50
    assert _table_cell(_section(tree, "Region"), "Northmoor", 1).attrs.get("class") == "base-low"
    assert _table_cell(_section(tree, "Aided awareness"), "Any of these", 1).attrs.get("class") == "base-very-low"
    assert "Low bases" in _caution_titles(book_path)


def test_methodology_says_unweighted_and_lists_waves(book_path: Path) -> None:
    tree = _parse(book_path)
    (method,) = [s for s in tree.root.find_all("section") if s.attrs.get("id") == "methodology"]
    assert "UNWEIGHTED" in method.text
    assert "Fieldwork 2 Mar 2026 to 21 Mar 2026" in method.text
    assert f"{W1_SIZE} respondents" in method.text and f"{W2_SIZE} respondents" in method.text


def test_a_declared_wave_not_yet_staged_shows_dashes(tmp_path: Path, cells: pl.DataFrame) -> None:
    study = _study(tmp_path)
    later = dataclasses.replace(study, waves=(*study.waves, Wave("W3", "Wave 3 (autumn)", tmp_path / "w3.csv")))
    tree = _parse(render_book(later, cells, out_path=tmp_path / "three.html"))
    assert _table_cell(_section(tree, "Region"), "Northmoor", 2).text == "–"
    (method,) = [s for s in tree.root.find_all("section") if s.attrs.get("id") == "methodology"]
    assert "Not staged: no figures." in method.text


def test_footer_gives_time_and_version(tmp_path: Path, cells: pl.DataFrame) -> None:
    context = build_context(_study(tmp_path), cells, now=dt.datetime(2026, 6, 1, 9, 30, tzinfo=dt.UTC))
    assert context.generated_at == "2026-06-01 09:30 UTC"
    from pipeline import __version__

    assert context.version == __version__


def test_write_leaves_no_temporary_file(book_path: Path) -> None:
    assert sorted(p.name for p in book_path.parent.iterdir()) == [".wavebook-outputs", "study.html"]


def test_failed_render_leaves_previous_book_untouched(book_path: Path, tmp_path: Path, cells: pl.DataFrame) -> None:
    before = book_path.read_bytes()
    with pytest.raises(WavebookError, match="percent"):
        render_book(_study(tmp_path), cells.drop("percent"), out_path=book_path)
    assert book_path.read_bytes() == before
    assert sorted(p.name for p in book_path.parent.iterdir()) == [".wavebook-outputs", "study.html"]


def test_failed_replace_leaves_previous_book_untouched(
    book_path: Path, tmp_path: Path, cells: pl.DataFrame, monkeypatch: pytest.MonkeyPatch
) -> None:
    before = book_path.read_bytes()

    def failing_replace(src: str, dst: str) -> None:
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(outputs_module.os, "replace", failing_replace)
    with pytest.raises(WavebookError, match="simulated"):
        render_book(_study(tmp_path), cells, out_path=book_path)
    assert book_path.read_bytes() == before
    assert sorted(p.name for p in book_path.parent.iterdir()) == [".wavebook-outputs", "study.html"]


def test_book_file_is_readable_like_a_normal_file(book_path: Path) -> None:
    mask = os.umask(0o022)
    os.umask(mask)
    assert book_path.stat().st_mode & 0o777 == 0o666 & ~mask


def _with_estimates(cells: pl.DataFrame) -> pl.DataFrame:
    """Cells with made-up weighted columns (a rendering fixture: the values are not estimates of anything)."""
    percent_row = pl.col("row_kind").is_in(["category", "net", "item", "missing"])
    mean_row = pl.col("code").is_in(["mean", "median"])
    estimate = pl.when(percent_row).then(pl.col("percent") + 0.7).when(mean_row).then(pl.col("value") * 1.1)
    return cells.with_columns(estimate.alias("estimate")).with_columns(
        (pl.col("estimate") - 2.25).alias("ci_low"), (pl.col("estimate") + 3.5).alias("ci_high")
    )


def test_weighted_cells_show_estimate_interval_and_unweighted_count(tmp_path: Path, cells: pl.DataFrame) -> None:
    weighted = _with_estimates(cells)
    tree = _parse(render_book(_study(tmp_path), weighted, out_path=tmp_path / "weighted.html"))
    row = _cell(weighted, "W1", "region", "category", "Eastvale")
    cell = _table_cell(_section(tree, "Region"), "Eastvale", 0)
    spans = {s.attrs.get("class"): s.text for s in cell.find_all("span")}
    estimate = row["percent"] + 0.7
    assert spans["figure"] == f"{int(estimate + 0.5)}%"
    assert spans["interval"] == f"{int(estimate - 2.25 + 0.5)}–{int(estimate + 3.5 + 0.5)}"
    assert spans["count"] == f"n {row['count']}"  # the prefix is text in the cell, not CSS
    mean = _cell(weighted, "W1", "spend", "statistic", "Mean")["value"] * 1.1
    mean_cell = _table_cell(_section(tree, "Monthly spend (credits)"), "Mean", 0)
    assert [s.text for s in mean_cell.find_all("span") if s.attrs.get("class") == "figure"] == [f"{mean:,.2f}"]
    n_cell = _table_cell(_section(tree, "Monthly spend (credits)"), "Number of answers", 0)
    n = _cell(weighted, "W1", "spend", "statistic", "Number of answers")["value"]
    assert n_cell.text == f"{n:,.0f}"  # counts stay unweighted


def test_weighted_book_says_so_and_drops_the_unweighted_caution(tmp_path: Path, cells: pl.DataFrame) -> None:
    path = render_book(_study(tmp_path), _with_estimates(cells), out_path=tmp_path / "weighted.html")
    tree = _parse(path)
    (method,) = [s for s in tree.root.find_all("section") if s.attrs.get("id") == "methodology"]
    assert "WEIGHTED estimates" in method.text
    assert "Unweighted figures" not in _caution_titles(path)
    assert "Unweighted figures" in _caution_titles(render_book(_study(tmp_path), cells, out_path=tmp_path / "u.html"))


@pytest.mark.parametrize(("percent", "shown"), [(12.5, "13%"), (12.49, "12%"), (0.3, "<1%"), (0.0, "0%"), (99.5, "100%")])
def test_percentages_round_half_up(percent: float, shown: str) -> None:
    # the book's display convention: round half up (Python's round() would round half to even)
    assert book_module._percent_text(percent) == shown


def test_small_percentage_intervals_keep_a_decimal() -> None:
    from pipeline.book.render import _percent_interval

    assert _percent_interval(0.0, 0.24) == "0.0–0.2"  # whole numbers would print an empty-looking 0–0
    assert _percent_interval(0.31, 1.9) == "0.3–1.9"
    assert _percent_interval(12.5, 18.49) == "13–18"  # half up, like the figures
