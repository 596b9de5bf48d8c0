"""Unweighted toplines and the HTML result book.

Topline values are checked against an independent polars computation on the same invented
respondents (polars is the outside reference: a general-purpose data-frame library computing
value counts, means and medians directly from the rows). The book is checked by parsing it
with html5lib (the WHATWG HTML parsing algorithm browsers use), strictly: a parse error fails.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import os
import re
from pathlib import Path
from xml.etree.ElementTree import Element

import duckdb
import html5lib
import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.book.render import LOW_BASE, VERY_LOW_BASE, build_context, render_book
from pipeline.tables import export_cells
from pipeline import outputs as outputs_module
from pipeline.errors import WavebookError
from pipeline.staging.spec import Design, Study, Variable, Wave
from pipeline.tables.topline import CELL_SCHEMA, unweighted_toplines

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


def _parse(path: Path) -> Element:
    """The page as an element tree; html5lib in strict mode raises on any HTML5 parse error."""
    parser = html5lib.HTMLParser(strict=True, tree=html5lib.getTreeBuilder("etree"), namespaceHTMLElements=False)
    return parser.parse(path.read_text(encoding="utf-8"))


def _text(element: Element) -> str:
    return " ".join("".join(element.itertext()).split())


def _svg(element: Element, name: str) -> list[Element]:
    """Descendants named `name` in the SVG namespace (html5lib keeps SVG elements namespaced)."""
    return [e for e in element.iter() if isinstance(e.tag, str) and e.tag == f"{{http://www.w3.org/2000/svg}}{name}"]


def _classes(element: Element) -> set[str]:
    return set((element.get("class") or "").split())


def _section(root: Element, label: str) -> Element:
    matches = [s for s in root.iter("section") if "variable" in _classes(s) and _text(s.find("h2")) == label]
    assert len(matches) == 1, label
    return matches[0]


def _result_table(section: Element) -> Element:
    (table,) = [t for t in section.iter("table") if "result" in _classes(t)]
    return table


def _body_rows(section: Element) -> list[Element]:
    return list(_result_table(section).find("tbody"))


def _table_cell(section: Element, row_label: str, column: int) -> Element:
    (row,) = [r for r in _body_rows(section) if "detail" not in _classes(r) and _text(r.find("th")) == row_label]
    return row.findall("td")[column]


def _detail_text(section: Element, row_label: str, kind: str, column: int) -> str:
    """The text of the detail row `kind` ("interval", "se", "deff", "count") under `row_label`."""
    rows = _body_rows(section)
    start = [i for i, r in enumerate(rows) if "detail" not in _classes(r) and _text(r.find("th")) == row_label][0]
    for row in rows[start + 1:]:
        if "detail" not in _classes(row):
            break
        if f"detail-{kind}" in _classes(row):
            return _text(row.findall("td")[column])
    raise AssertionError(f"no {kind} row under {row_label}")


def _figure(cell: Element) -> str:
    return _text([s for s in cell.iter("span") if "figure" in _classes(s)][0])


@pytest.fixture
def book_path(tmp_path: Path, cells: pl.DataFrame) -> Path:
    return render_book(_study(tmp_path), export_cells(cells), out_path=tmp_path / "book" / "study.html")


def test_one_result_table_per_variable_with_caption_and_header_cells(book_path: Path, tmp_path: Path) -> None:
    root = _parse(book_path)
    results = [t for t in root.iter("table") if "result" in _classes(t)]
    assert len(results) == len(_study(tmp_path).variables)
    heads = [_text(th) for th in results[0].find("thead").iter("th")]
    assert heads == ["Answer", "Wave 1 (spring) 2 Mar 2026 to 21 Mar 2026", "Wave 2 (summer)"]
    for table in root.iter("table"):
        assert table.find("caption") is not None and _text(table.find("caption"))
        assert all(th.get("scope") in ("col", "row") for th in table.iter("th"))


def test_known_percent_and_count_in_the_right_cell(book_path: Path, data: pl.DataFrame) -> None:
    w2 = data.filter(pl.col("wave") == "W2")["region"].drop_nulls()
    count = int((w2 == 2).sum())
    percent = 100 * count / w2.len()
    section = _section(_parse(book_path), "Region")
    assert _figure(_table_cell(section, "Eastvale", 1)) == f"{int(percent + 0.5)}%"  # rounded half up
    assert _detail_text(section, "Eastvale", "count", 1) == str(count)


def test_detail_labels_are_text_not_style(book_path: Path) -> None:
    """Detail rows are named in their header cell (read by screen readers, kept on copy-paste)."""
    html = book_path.read_text(encoding="utf-8")
    section = _section(_parse(book_path), "Region")
    labels = [_text(r.find("th")) for r in _body_rows(section) if "detail" in _classes(r)]
    assert "Respondents (n)" in labels
    assert not re.search(r"(?<![-\w])content\s*:", html) and "::before" not in html and "::after" not in html


def test_labels_are_escaped_not_executed(book_path: Path) -> None:
    html = book_path.read_text(encoding="utf-8")
    root = _parse(book_path)
    assert [s.text for s in root.iter("script") if "alert" in (s.text or "")] == []
    assert "&lt;script&gt;" in html
    assert _result_table(_section(root, SCRIPT_LABEL)) is not None
    assert _table_cell(_section(root, "Region"), "Tea & Coffee Coast", 0) is not None


def test_no_respondent_ids_in_the_book(book_path: Path, data: pl.DataFrame) -> None:
    html = book_path.read_text(encoding="utf-8")
    assert ID_PREFIX not in html
    assert not any(rid in html for rid in data["respondent_id"].to_list())


def test_self_contained_page(book_path: Path) -> None:
    root = _parse(book_path)
    assert not [e.tag for e in root.iter() if e.tag in ("link", "img", "iframe", "object", "embed")]
    assert all(s.get("src") is None for s in root.iter("script"))
    assert "http://" not in book_path.read_text() and "https://" not in book_path.read_text()
    assert root.find(".//style") is not None


def _caution_titles(path: Path) -> list[str]:
    root = _parse(path)
    (cautions,) = [s for s in root.iter("section") if s.get("id") == "cautions"]
    return [_text(h) for h in cautions.iter("h4")]


def test_nonprobability_caution_only_for_nonprobability_designs(tmp_path: Path, cells: pl.DataFrame) -> None:
    probability = render_book(_study(tmp_path), export_cells(cells), out_path=tmp_path / "p.html")
    nonprobability = render_book(_study(tmp_path, kind="nonprobability"), export_cells(cells), out_path=tmp_path / "n.html")
    assert "Non-probability sample" not in _caution_titles(probability)
    assert "Non-probability sample" in _caution_titles(nonprobability)
    assert "What a confidence interval says" in _caution_titles(probability)


def test_low_bases_are_marked_and_explained_under_the_table(book_path: Path, cells: pl.DataFrame) -> None:
    w2_base = _cell(cells, "W2", "region", "base", "Base: all giving an answer")["count"]
    aware_base = _cell(cells, "W2", "aware", "net", "Any of these")["base"]
    assert VERY_LOW_BASE <= w2_base < LOW_BASE and aware_base < VERY_LOW_BASE  # the fixture's intent
    root = _parse(book_path)
    assert _table_cell(_section(root, "Region"), "Northmoor", 0).get("class") is None  # W1 base >= 50
    assert _table_cell(_section(root, "Region"), "Northmoor", 1).get("class") == "base-low"
    assert _table_cell(_section(root, "Aided awareness"), "Any of these", 1).get("class") == "base-very-low"
    legend = _text(_section(root, "Aided awareness").find(".//ul[@class='legend']"))
    assert f"† base under {LOW_BASE}" in legend and f"‡ base under {VERY_LOW_BASE}" in legend
    assert "Low bases" in _caution_titles(book_path)


def test_methodology_says_unweighted_and_lists_waves(book_path: Path) -> None:
    root = _parse(book_path)
    (method,) = [s for s in root.iter("section") if s.get("id") == "methodology"]
    assert "UNWEIGHTED" in _text(method)
    assert "Fieldwork 2 Mar 2026 to 21 Mar 2026" in _text(method)
    assert f"{W1_SIZE} respondents" in _text(method) and f"{W2_SIZE} respondents" in _text(method)


def test_a_declared_wave_not_yet_staged_shows_dashes(tmp_path: Path, cells: pl.DataFrame) -> None:
    study = _study(tmp_path)
    later = dataclasses.replace(study, waves=(*study.waves, Wave("W3", "Wave 3 (autumn)", tmp_path / "w3.csv")))
    root = _parse(render_book(later, export_cells(cells), out_path=tmp_path / "three.html"))
    assert _text(_table_cell(_section(root, "Region"), "Northmoor", 2)) == "–"
    (method,) = [s for s in root.iter("section") if s.get("id") == "methodology"]
    assert "Not staged: no figures." in _text(method)


def test_footer_gives_time_and_version(tmp_path: Path, cells: pl.DataFrame) -> None:
    context = build_context(_study(tmp_path), export_cells(cells), now=dt.datetime(2026, 6, 1, 9, 30, tzinfo=dt.UTC))
    assert context.generated_at == "2026-06-01 09:30 UTC"
    from pipeline import __version__

    assert context.version == __version__


def test_write_leaves_no_temporary_file(book_path: Path) -> None:
    assert sorted(p.name for p in book_path.parent.iterdir()) == [".wavebook-outputs", "study.html"]


def test_failed_render_leaves_previous_book_untouched(book_path: Path, tmp_path: Path, cells: pl.DataFrame) -> None:
    before = book_path.read_bytes()
    with pytest.raises(WavebookError, match="estimate"):
        render_book(_study(tmp_path), export_cells(cells).drop("estimate"), out_path=book_path)
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
        render_book(_study(tmp_path), export_cells(cells), out_path=book_path)
    assert book_path.read_bytes() == before
    assert sorted(p.name for p in book_path.parent.iterdir()) == [".wavebook-outputs", "study.html"]


def test_folder_book_replaces_the_previous_folder_whole(tmp_path: Path, cells: pl.DataFrame) -> None:
    out = tmp_path / "book" / "study.html"
    index = render_book(_study(tmp_path), export_cells(cells), out_path=out, single_file=False)
    assert index == tmp_path / "book" / "study" / "index.html"
    (index.parent / "stale.html").write_text("old", encoding="utf-8")
    render_book(_study(tmp_path), export_cells(cells), out_path=out, single_file=False)
    names = sorted(p.name for p in index.parent.iterdir())
    assert "stale.html" not in names and "index.html" in names and "trends.html" in names
    assert sorted(p.name for p in (tmp_path / "book").iterdir()) == ["study"]  # no temporary folder left


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
        (pl.col("estimate") - 2.25).alias("ci_low"), (pl.col("estimate") + 3.5).alias("ci_high"),
        pl.lit(1.25).alias("se"), pl.lit(1.4).alias("deff"),
    )


def test_weighted_cells_show_estimate_and_precision_rows(tmp_path: Path, cells: pl.DataFrame) -> None:
    weighted = _with_estimates(cells)
    root = _parse(render_book(_study(tmp_path), export_cells(weighted), out_path=tmp_path / "weighted.html"))
    row = _cell(weighted, "W1", "region", "category", "Eastvale")
    section = _section(root, "Region")
    estimate = row["percent"] + 0.7
    assert 3 < estimate - 2.25 and estimate + 3.5 < 97  # whole numbers are right for these figures
    assert _figure(_table_cell(section, "Eastvale", 0)) == f"{int(estimate + 0.5)}%"
    assert _detail_text(section, "Eastvale", "interval", 0) == f"{int(estimate - 2.25 + 0.5)}–{int(estimate + 3.5 + 0.5)}"
    assert _detail_text(section, "Eastvale", "se", 0) == "1.2"  # 1.25 rounded half to even by format: 1.2
    assert _detail_text(section, "Eastvale", "deff", 0) == "1.40"
    assert _detail_text(section, "Eastvale", "count", 0) == str(row["count"])
    mean = _cell(weighted, "W1", "spend", "statistic", "Mean")["value"] * 1.1
    spend = _section(root, "Monthly spend (credits)")
    assert _figure(_table_cell(spend, "Mean", 0)) == f"{mean:,.2f}"
    n = _cell(weighted, "W1", "spend", "statistic", "Number of answers")["value"]
    assert _text(_table_cell(spend, "Number of answers", 0)) == f"{n:,.0f}"  # counts stay unweighted
    switch = section.find(".//input[@type='checkbox']")
    assert switch is not None and switch.get("checked") is None  # precision rows hidden by default


def test_weighted_book_says_so_and_drops_the_unweighted_caution(tmp_path: Path, cells: pl.DataFrame) -> None:
    path = render_book(_study(tmp_path), export_cells(_with_estimates(cells)), out_path=tmp_path / "weighted.html")
    root = _parse(path)
    (method,) = [s for s in root.iter("section") if s.get("id") == "methodology"]
    assert "WEIGHTED estimates" in _text(method)
    assert "Unweighted figures" not in _caution_titles(path)
    assert "Unweighted figures" in _caution_titles(render_book(_study(tmp_path), export_cells(cells), out_path=tmp_path / "u.html"))


def test_zero_no_answer_rows_are_left_out_and_said_once(tmp_path: Path, cells: pl.DataFrame) -> None:
    root = _parse(render_book(_study(tmp_path), export_cells(cells), out_path=tmp_path / "b.html"))
    for variable in _study(tmp_path).variables.values():
        missing = cells.filter((pl.col("variable") == variable.name) & (pl.col("row_kind") == "missing"))
        if missing.is_empty():
            continue
        section = _section(root, variable.label)
        label = missing["row_label"][0]
        shown = [_text(r.find("th")) for r in _body_rows(section) if "detail" not in _classes(r)]
        legend = _text(section.find(".//ul[@class='legend']"))
        if missing["count"].sum() == 0:
            assert label not in shown and legend.count(f"“{label}” is 0 in every column and not shown.") == 1
        else:
            assert label in shown and "not shown" not in legend


def test_hostile_labels_render_as_text(tmp_path: Path, cells: pl.DataFrame) -> None:
    study = _study(tmp_path)
    hostile = '"><img src=x onerror=alert(1)>'
    variables = dict(study.variables)
    variables["region"] = dataclasses.replace(variables["region"], label=f"Region {hostile}")
    relabelled = cells.with_columns(
        pl.when(pl.col("row_label") == "Eastvale").then(pl.lit(f"East {hostile}")).otherwise(pl.col("row_label")).alias("row_label")
    )
    path = render_book(dataclasses.replace(study, variables=variables), export_cells(relabelled), out_path=tmp_path / "h.html")
    root = _parse(path)
    assert [e for e in root.iter("img")] == []
    assert _section(root, f"Region {hostile}") is not None
    assert _table_cell(_section(root, f"Region {hostile}"), f"East {hostile}", 0) is not None
    assert '<img src=x' not in path.read_text(encoding="utf-8")


def test_every_internal_link_resolves_in_both_forms(tmp_path: Path, cells: pl.DataFrame) -> None:
    study = _study(tmp_path)
    single = render_book(study, export_cells(_with_estimates(cells)), out_path=tmp_path / "one" / "study.html")
    folder = render_book(study, export_cells(_with_estimates(cells)), out_path=tmp_path / "many" / "study.html", single_file=False)
    for pages in ([single], sorted(folder.parent.glob("*.html"))):
        ids = {p.name: {e.get("id") for e in _parse(p).iter() if e.get("id")} for p in pages}
        for page in pages:
            root = _parse(page)
            for link in root.iter("a"):
                href = link.get("href")
                target, _, anchor = href.partition("#")
                target = target or page.name
                assert target in ids, f"{page.name}: {href}"
                assert not anchor or anchor in ids[target], f"{page.name}: {href}"
            for element in root.iter():
                for key in ("aria-labelledby",):
                    for ref in (element.get(key) or "").split():
                        assert ref in ids[page.name], f"{page.name}: {key}={ref}"
    assert len(list(folder.parent.glob("*.html"))) == len(study.variables) + 4


def test_table_has_a_chart_of_its_latest_column_with_a_text_alternative(tmp_path: Path, cells: pl.DataFrame) -> None:
    weighted = _with_estimates(cells)
    root = _parse(render_book(_study(tmp_path), export_cells(weighted), out_path=tmp_path / "c.html"))
    section = _section(root, "Region")
    (svg,) = _svg(section, "svg")
    assert svg.get("role") == "img" and _svg(svg, "title") and _svg(svg, "desc")
    labels = [_text(t) for t in _svg(svg, "text") if t.get("class") == "label"]
    values = [_text(t) for t in _svg(svg, "text") if t.get("class") == "value"]
    shown = [_text(r.find("th")) for r in _body_rows(section) if r.get("class") in ("row-category", "row-net")]
    assert labels == shown
    assert values == [_figure(_table_cell(section, label, 1)) for label in shown]  # W2, the latest wave
    assert len(_svg(svg, "circle")) == len(shown)


def test_trend_panels_follow_each_measure_across_waves(tmp_path: Path, cells: pl.DataFrame) -> None:
    root = _parse(render_book(_study(tmp_path), export_cells(_with_estimates(cells)), out_path=tmp_path / "t.html"))
    (trends,) = [s for s in root.iter("section") if s.get("id") == "trends"]
    panels = list(trends.iter("figure"))
    region_rows = cells.filter((pl.col("variable") == "region") & (pl.col("row_kind") == "category"))
    titles = [_text(p.find("figcaption").find("span")) for p in panels]
    assert set(region_rows["row_label"].unique().to_list()) <= set(titles)
    first = panels[0]
    assert [p.get("class") for p in _svg(first, "polygon")] == ["band"] and _svg(first, "polyline")
    assert len(_svg(first, "circle")) == 2  # two waves


def test_folder_book_that_cannot_be_written_keeps_the_previous_one(
    tmp_path: Path, cells: pl.DataFrame, monkeypatch: pytest.MonkeyPatch
) -> None:
    out = tmp_path / "book" / "study.html"
    index = render_book(_study(tmp_path), export_cells(cells), out_path=out, single_file=False)
    before = {p.name: p.read_bytes() for p in index.parent.iterdir()}
    real_write = Path.write_text

    def full_disk(self: Path, *args: object, **kwargs: object) -> int:
        if self.suffix == ".html":
            raise OSError(28, "No space left on device")
        return real_write(self, *args, **kwargs)

    monkeypatch.setattr(Path, "write_text", full_disk)
    with pytest.raises(WavebookError, match="cannot write"):
        render_book(_study(tmp_path), export_cells(cells), out_path=out, single_file=False)
    monkeypatch.undo()
    assert {p.name: p.read_bytes() for p in index.parent.iterdir()} == before
    assert sorted(p.name for p in (tmp_path / "book").iterdir()) == ["study"]  # no temporary folder left


def test_a_folder_not_written_by_wavebook_is_not_replaced(tmp_path: Path, cells: pl.DataFrame) -> None:
    foreign = tmp_path / "book" / "study"
    foreign.mkdir(parents=True)
    (foreign / "notes.txt").write_text("mine", encoding="utf-8")
    with pytest.raises(WavebookError, match="not writing"):
        render_book(_study(tmp_path), export_cells(cells), out_path=tmp_path / "book" / "study.html", single_file=False)
    assert [p.name for p in foreign.iterdir()] == ["notes.txt"]
