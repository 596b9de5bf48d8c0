"""The banner tables of the demo book, parsed: letters, change marks, legends, independence tests,
suppressed cells and hostile banner labels, each checked against the export written beside it."""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path
from xml.etree.ElementTree import Element

import html5lib
import polars as pl
import pytest

from book_export import written_cells
from pipeline.book import render_book
from pipeline.book.source import TOTAL
from pipeline.book.store import load_results
from pipeline.book.tables import DOWN, UP
from pipeline.staging.spec import load_spec


def _parse(path: Path) -> Element:
    parser = html5lib.HTMLParser(strict=True, tree=html5lib.getTreeBuilder("etree"), namespaceHTMLElements=False)
    return parser.parse(path.read_text(encoding="utf-8"))


def _text(element: Element) -> str:
    return " ".join("".join(element.itertext()).split())


def _classes(element: Element) -> set[str]:
    return set((element.get("class") or "").split())


def _sections(root: Element) -> dict[str, Element]:
    """Variable name -> its section."""
    out = {}
    for section in root.iter("section"):
        if "variable" in _classes(section):
            name = [s for s in section.iter("span") if "variable-name" in _classes(s)][0]
            out[_text(name)] = section
    return out


def _tables(section: Element, kind: str) -> list[Element]:
    return [t for t in section.iter("table") if {"result", kind} <= _classes(t)]


def _letters(table: Element) -> list[str]:
    """The column letters of a banner table's header, "" for the Total."""
    heads = list(table.find("thead"))[-1].findall("th")
    return [next((_text(x) for x in h.iter("span") if "column-letter" in _classes(x)), "") for h in heads]


def _row(table: Element, label: str) -> Element:
    (row,) = [r for r in table.find("tbody") if "detail" not in _classes(r) and _text(r.find("th")) == label]
    return row


def _spans(cell: Element, *classes: str) -> str:
    """The text of the cell's spans whose classes are exactly `classes`."""
    return "".join(_text(s) for s in cell.iter("span") if _classes(s) == set(classes))


@pytest.fixture(scope="module")
def book(demo_study: Path) -> Path:
    return demo_study.parent / "book" / "study.html"


@pytest.fixture(scope="module")
def root(book: Path) -> Element:
    return _parse(book)


@pytest.fixture(scope="module")
def export(book: Path) -> pl.DataFrame:
    return written_cells(book)


def _latest_banner_rows(export: pl.DataFrame, study) -> pl.DataFrame:
    """Banner rows of each table's latest wave (the wave its banner table shows)."""
    order = {w.id: i for i, w in enumerate(study.waves)}
    banner = export.filter(pl.col("banner") != TOTAL).with_columns(pl.col("wave").replace_strict(order).alias("__w"))
    latest = banner.group_by("table").agg(pl.col("__w").max().alias("__latest"))
    return banner.join(latest, on="table").filter(pl.col("__w") == pl.col("__latest"))


def test_every_variable_has_a_by_wave_table_and_the_tabulated_ones_a_banner_table(root: Element, export, demo_study):
    study = load_spec(demo_study)
    sections = _sections(root)
    assert list(sections) == list(study.variables)
    tabulated = set(export.filter(pl.col("banner") != TOTAL)["table"].unique().to_list())
    assert tabulated  # the demo declares a banner
    for name, section in sections.items():
        assert len(_tables(section, "waves")) == 1
        assert len(_tables(section, "banner")) == (1 if name in tabulated else 0)


def test_letters_and_change_marks_equal_the_export_for_sampled_cells(root: Element, export, demo_study) -> None:
    study = load_spec(demo_study)
    sections = _sections(root)
    rows = _latest_banner_rows(export, study).filter(
        pl.col("statistic").is_in(["percent", "mean", "balance"]) & (pl.col("estimate") > 0)
    )  # (a zero "No answer" row is not shown)
    marked = rows.filter((pl.col("sig_higher_than") != "") | (pl.col("sig_higher_than_lighter") != "")
                         | (pl.col("change_mark") != ""))
    plain = rows.filter((pl.col("sig_higher_than") == "") & (pl.col("change_mark") == ""))
    assert marked.height > 40 and (marked["change_mark"] != "").sum() > 3  # the demo has marks of each kind
    sample = marked.sample(40, seed=13).vstack(plain.sample(20, seed=13))
    for r in sample.iter_rows(named=True):
        (table,) = _tables(sections[r["table"]], "banner")
        cell = _row(table, r["row_label"]).findall("td")[_letters(table).index(r["letter"])]
        assert _spans(cell, "letters") == r["sig_higher_than"], r
        assert _spans(cell, "letters", "lighter") == r["sig_higher_than_lighter"].lower(), r
        assert _spans(cell, "change") == {"up": UP, "down": DOWN, "": ""}[r["change_mark"]], r


def test_total_change_marks_of_the_by_wave_table_equal_the_export(root: Element, export, demo_study) -> None:
    study = load_spec(demo_study)
    waves = [w.id for w in study.waves]
    sections = _sections(root)
    total = export.filter((pl.col("banner") == TOTAL) & pl.col("statistic").is_in(["percent", "mean"])
                          & (pl.col("estimate") > 0))
    assert (total["change_mark"] != "").sum() > 0
    checked = 0
    for r in total.iter_rows(named=True):
        (table,) = _tables(sections[r["table"]], "waves")
        cell = _row(table, r["row_label"]).findall("td")[waves.index(r["wave"])]
        assert _spans(cell, "change") == {"up": UP, "down": DOWN, "": ""}[r["change_mark"] or ""], r
        checked += 1
    assert checked > 100


SYMBOLS = {
    "†": "† base under", "‡": "‡ base under", "×": "× withheld", "–": "– no figures", UP: f"{UP} / {DOWN}",
    DOWN: f"{UP} / {DOWN}",
}


def _legend_is_complete(section: Element) -> int:
    """Assert every symbol in each table of the section is explained in the legend right under
    it; returns the number of symbols checked."""
    checked = 0
    children = list(section.iter())
    for table in (t for t in section.iter("table") if "result" in _classes(t)):
        frame = [d for d in section.iter("div") if table in list(d)][0]
        after = children[children.index(frame):]
        legend = _text(next(u for u in after if u.tag == "ul" and "legend" in _classes(u)))
        body = table.find("tbody")
        figures = " ".join(_text(td) for r in body if "detail" not in _classes(r) for td in r.iter("td"))
        for symbol, explanation in SYMBOLS.items():
            if symbol in figures:
                assert explanation in legend, (symbol, legend)
                checked += 1
        capitals = [s for s in body.iter("span") if _classes(s) == {"letters"}]
        lower = [s for s in body.iter("span") if _classes(s) == {"letters", "lighter"}]
        if capitals:
            assert "Capital letters" in legend and "5% level" in legend
            checked += 1
        if lower:
            assert "Lowercase letters" in legend and "10% level" in legend
            checked += 1
        if "banner" in _classes(table):
            assert "at the 5% level and, lighter, at the 10% level" in legend  # the demo's two levels
            assert "no adjustment for the number of tests" in legend
            assert "at least 50 respondents" in legend
    return checked


def test_every_table_has_a_legend_explaining_every_symbol_it_uses(root: Element) -> None:
    assert sum(_legend_is_complete(s) for s in _sections(root).values()) > 20


def test_rao_scott_line_under_each_single_choice_banner_table(root: Element, book: Path, demo_study: Path) -> None:
    study = load_spec(demo_study)
    tests = pl.read_parquet(book.with_name("study_tests.parquet")).filter(
        (pl.col("comparison") == "independence") & (pl.col("wave") == "W3"))
    sections = _sections(root)
    for name, variable in study.variables.items():
        expected = tests.filter(pl.col("table") == name)
        lists = [u for u in sections[name].iter("ul") if "table-tests" in _classes(u)]
        assert expected.height > 0 or variable.type != "single"  # every single-choice table has its tests
        if expected.height == 0:
            assert lists == []
            continue
        (tests_list,) = lists
        lines = [_text(li) for li in tests_list]
        assert len(lines) == expected.height > 0
        for r, line in zip(expected.iter_rows(named=True), lines, strict=True):
            assert study.variables[r["column_a"]].label in line
            if r["statistic"] is None:
                assert "not computed" in line
                continue
            assert f"F = {r['statistic']:.2f} on {r['df_num']:.1f} and {r['df_den']:.1f}" in line
            assert ("not significant" not in line) == r["significant"]


def _pick(stored: pl.DataFrame, table: str, letter: str) -> pl.Expr:
    return (pl.col("table") == table) & (pl.col("letter") == letter) & (pl.col("wave") == "W3")


def test_suppressed_cells_show_no_number_even_when_the_frame_holds_one(demo_study: Path, tmp_path: Path) -> None:
    study = load_spec(demo_study)
    stored = load_results(study)
    cells = stored.export
    target = _pick(cells, "shop_freq", "C")
    withheld = cells.with_columns(pl.when(target).then(pl.lit("suppressed")).otherwise(pl.col("flags")).alias("flags"))
    numbers = {f"{100 * v:.0f}" for v in cells.filter(target & (pl.col("statistic") == "percent"))["estimate"]}
    root = _parse(render_book(study, withheld, tests=stored.tests, out_path=tmp_path / "s.html"))
    (table,) = _tables(_sections(root)["shop_freq"], "banner")
    column = _letters(table).index("C")
    shown = [r.findall("td")[column] for r in table.find("tbody") if "detail" not in _classes(r)
             and "base" not in " ".join(_classes(r))]
    assert shown and all(_text(td) == "×" for td in shown)
    for row in table.find("tbody"):  # the precision rows hold nothing for the column either
        if "detail" in _classes(row):
            assert _text(row.findall("td")[column]) == ""
    assert numbers and not any(re.search(rf"\b{n}%", _text(td)) for td in shown for n in numbers)
    legend = _text([u for u in _sections(root)["shop_freq"].iter("ul") if "legend" in _classes(u)][0])
    assert "× withheld" in legend


def test_hostile_banner_labels_render_as_text(demo_study: Path, tmp_path: Path) -> None:
    study = load_spec(demo_study)
    stored = load_results(study)
    script, image = "<script>alert(1)</script>", '"><img src=x onerror=alert(1)>'
    cells = stored.export.with_columns(
        pl.when(pl.col("letter") == "A").then(pl.lit(f"Man {script}")).otherwise(pl.col("column_label"))
        .alias("column_label")
    )
    variables = dict(study.variables)
    variables["sex"] = dataclasses.replace(variables["sex"], label=f"Sex {image}")
    path = render_book(dataclasses.replace(study, variables=variables), cells, tests=stored.tests,
                       out_path=tmp_path / "h.html")
    root = _parse(path)
    assert list(root.iter("img")) == []
    assert [s for s in root.iter("script") if "alert" in (s.text or "")] == []
    (table,) = _tables(_sections(root)["shop_freq"], "banner")
    heads = [_text(th) for th in table.find("thead").iter("th")]
    assert f"Sex {image}" in heads and f"Man {script} A" in heads
    assert "<img src=x" not in path.read_text(encoding="utf-8")


def _svg(element: Element, name: str) -> list[Element]:
    return [e for e in element.iter() if isinstance(e.tag, str) and e.tag == f"{{http://www.w3.org/2000/svg}}{name}"]


def test_trend_panels_mark_the_exported_wave_changes_and_a_mean_has_a_visible_band(root: Element, export,
                                                                                  demo_study: Path) -> None:
    study = load_spec(demo_study)
    (trends,) = [s for s in root.iter("section") if s.get("id") == "trends"]
    groups = {_text(g.find("h3")): g for g in trends.iter("div") if "trend-group" in _classes(g)}
    total = export.filter((pl.col("banner") == TOTAL) & pl.col("statistic").is_in(["percent", "mean"]))
    marks_seen = 0
    for name, variable in study.variables.items():
        if variable.label not in groups:
            continue
        for panel in groups[variable.label].iter("figure"):
            title = _text(panel.find("figcaption").find("span"))
            rows = total.filter((pl.col("table") == name) & (pl.col("row_label") == title)).sort(
                pl.col("wave").replace_strict({w.id: i for i, w in enumerate(study.waves)}))
            expected = [{"up": UP, "down": DOWN}.get(m or "", "") for m in rows["change_mark"].to_list()]
            shown = []
            for point in _svg(panel, "g"):
                texts = [t for t in _svg(point, "text") if t.get("class") == "mark"]
                shown.append(_text(texts[0]) if texts else "")
            assert shown == expected, (name, title)
            marks_seen += sum(1 for m in shown if m)
            if title == "Mean":
                (band,) = _svg(panel, "polygon")
                ys = [float(p.split(",")[1]) for p in band.get("points").split()]
                assert max(ys) - min(ys) >= 8  # the interval band is visible, not a hairline
    assert marks_seen > 0
