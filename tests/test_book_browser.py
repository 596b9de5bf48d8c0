"""The demo book in a real browser: headless Chromium (Debian's package) driven by Playwright.

Skips with a message when no Chromium is installed; fails instead when WAVEBOOK_REQUIRE_BROWSER=1
(as in .ci/run). Screenshots of the cover, a table, a chart and the trends page go to
test-artifacts/ (ignored by git) for a person to look at.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path

import polars as pl
import pytest

from book_export import written_cells
from browser import ARTIFACTS, chromium
from pipeline.book import render_book
from pipeline.book.source import TOTAL
from pipeline.book.store import load_results
from pipeline.staging.spec import load_spec

# Text boxes are compared line by line (Range.getClientRects of every visible text node); two
# boxes overlap when they share more than 1 px in both directions.
OVERLAPS_JS = """
() => {
  const boxes = [];
  const walker = document.createTreeWalker(document.body, NodeFilter.SHOW_TEXT);
  for (let node = walker.nextNode(); node; node = walker.nextNode()) {
    if (!node.textContent.trim()) continue;
    const parent = node.parentElement;
    if (!parent || parent.closest("script, style, title, desc")) continue;
    const style = getComputedStyle(parent);
    if (style.visibility === "hidden") continue;
    const frame = parent.closest(".table-frame");
    const clip = frame ? frame.getBoundingClientRect() : null;
    const range = document.createRange();
    range.selectNodeContents(node);
    for (const raw of range.getClientRects()) {
      let left = raw.left, top = raw.top, right = raw.right, bottom = raw.bottom;
      if (clip) {  // text scrolled out of sight inside a table frame is not on screen
        left = Math.max(left, clip.left); top = Math.max(top, clip.top);
        right = Math.min(right, clip.right); bottom = Math.min(bottom, clip.bottom);
      }
      if (right - left < 1 || bottom - top < 1) continue;
      boxes.push({x: left + scrollX, y: top + scrollY, w: right - left, h: bottom - top,
                  text: node.textContent.trim().slice(0, 40)});
    }
  }
  boxes.sort((a, b) => a.y - b.y);
  const hits = [];
  for (let i = 0; i < boxes.length; i++) {
    const a = boxes[i];
    for (let j = i + 1; j < boxes.length && boxes[j].y < a.y + a.h; j++) {
      const b = boxes[j];
      const dx = Math.min(a.x + a.w, b.x + b.w) - Math.max(a.x, b.x);
      const dy = Math.min(a.y + a.h, b.y + b.h) - Math.max(a.y, b.y);
      if (dx > 1 && dy > 1) hits.push([a.text, b.text, Math.round(dx), Math.round(dy)]);
    }
  }
  return {boxes: boxes.length, hits: hits.slice(0, 20)};
}
"""


@pytest.fixture(scope="module")
def browser() -> Iterator[object]:
    with chromium() as context:
        yield context


@pytest.fixture(scope="module")
def book(demo_study: Path) -> Path:
    return demo_study.parent / "book" / "study.html"


@pytest.fixture
def page(browser, book: Path):
    page = browser.new_page()
    page.set_viewport_size({"width": 1280, "height": 900})
    errors: list[str] = []
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: errors.append(str(e)))
    page.goto(book.as_uri())
    page.errors = errors
    yield page
    page.close()


def _shot(target, name: str) -> None:
    ARTIFACTS.mkdir(exist_ok=True)
    target.screenshot(path=str(ARTIFACTS / name))


def test_book_opens_without_console_errors_and_cover_screenshot(page) -> None:
    assert page.locator("table.result.waves").count() == 11
    assert page.locator("table.result.banner").count() == 11  # the demo tabulates every variable
    assert page.errors == []
    _shot(page, "book-cover.png")


def test_contents_filter_shows_only_matching_titles(page) -> None:
    items = page.locator("#contents-list li")
    total = items.count()
    assert total == 11 and page.locator("#contents-count").inner_text() == "11 of 11 tables"
    page.fill("#contents-filter", "grocery store")
    visible = page.locator("#contents-list li:visible").all_inner_texts()
    assert visible and len(visible) < total
    assert all("grocery store" in t.lower() for t in visible)
    assert page.locator("#contents-count").inner_text() == f"{len(visible)} of {total} tables"
    page.fill("#contents-filter", "no such words anywhere")
    assert page.locator("#contents-list li:visible").count() == 0
    page.fill("#contents-filter", "")
    assert page.locator("#contents-list li:visible").count() == total
    assert page.errors == []


def test_detail_switch_shows_and_hides_precision_rows_of_its_table(page) -> None:
    section = page.locator("section.variable").nth(6)
    other = page.locator("section.variable").nth(0)
    assert section.locator("tr.detail-se").count() > 0
    assert section.locator("tr.detail:visible").count() == 0  # default: a cell is one line
    row_height = section.locator("tr.row-category").first.bounding_box()["height"]
    assert row_height < 40
    section.locator("input.detail-toggle").check()
    assert section.locator("tr.detail-se:visible").count() == section.locator("tr.detail-se").count()
    assert other.locator("tr.detail:visible").count() == 0  # only that table
    _shot(section, "book-table-with-precision.png")
    _shot(section.locator("table.banner"), "book-banner-table.png")
    section.locator("input.detail-toggle").uncheck()
    assert section.locator("tr.detail:visible").count() == 0


def test_at_400_px_no_text_overlaps_and_no_sideways_scroll(browser, book: Path) -> None:
    page = browser.new_page()
    page.set_viewport_size({"width": 400, "height": 800})
    page.goto(book.as_uri())
    assert page.evaluate("document.documentElement.scrollWidth") <= 400
    result = page.evaluate(OVERLAPS_JS)
    assert result["boxes"] > 1000  # the whole book was measured
    assert result["hits"] == [], result["hits"]
    page.locator("section.variable").nth(6).locator("input.detail-toggle").check()
    assert page.evaluate(OVERLAPS_JS)["hits"] == []
    assert page.evaluate("document.documentElement.scrollWidth") <= 400
    _shot(page.locator("section.variable").nth(5), "book-table-400px.png")
    assert page.locator("table.banner").count() > 0  # the measured page holds the banner tables
    page.close()


def _shown_number(text: str) -> tuple[float, float]:
    """A figure as printed ("36%", "<0.1%", "6.98", "+12") and the rounding it allows."""
    decimals = len(text.split(".")[1].rstrip("%")) if "." in text else 0
    bound = "<" in text or ">" in text
    return float(text.strip("%<>+").replace(",", "")), 0.5 * 10**-decimals + (0.1 if bound else 0)


def _check_figure(shown: str, row: dict) -> None:
    number, tolerance = _shown_number(shown)
    scale = 100 if row["statistic"] in ("percent", "balance") else 1
    assert abs(number - scale * row["estimate"]) <= tolerance + 1e-9, (row, shown)


def test_sampled_cells_equal_the_export(page, demo_study: Path) -> None:
    """Figures of the by-wave and the banner tables equal the cells export written beside the book."""
    study = load_spec(demo_study)
    export = written_cells(demo_study.parent / "book" / "study.html")
    wave_ids = [w.id for w in study.waves]
    sections = page.locator("section.variable")
    names = [sections.nth(i).locator(".variable-name").first.inner_text() for i in range(sections.count())]

    def row_of(table, label: str):
        return table.locator("tbody tr:not(.detail)").filter(
            has=page.locator("th", has_text=re.compile(f"^{re.escape(label)}$"))).first

    figures = pl.col("statistic").is_in(["percent", "mean", "balance"]) & (pl.col("estimate") > 0)
    total = export.filter((pl.col("banner") == TOTAL) & figures).sample(20, seed=13)
    for row in total.iter_rows(named=True):
        table = sections.nth(names.index(row["table"])).locator("table.waves")
        _check_figure(row_of(table, row["row_label"]).locator("td").nth(wave_ids.index(row["wave"]))
                      .locator(".figure").inner_text(), row)
    banner = export.filter((pl.col("banner") != TOTAL) & (pl.col("wave") == wave_ids[-1]) & figures).sample(25, seed=13)
    for row in banner.iter_rows(named=True):
        table = sections.nth(names.index(row["table"])).locator("table.banner")
        letters = table.locator("thead tr").last.locator("th").all_inner_texts()
        column = [i for i, text in enumerate(letters) if text.split()[-1] == row["letter"]]
        assert len(column) == 1, (letters, row["letter"])
        cell = row_of(table, row["row_label"]).locator("td").nth(column[0])
        _check_figure(cell.locator(".figure").inner_text(), row)
        assert "".join(cell.locator(".letters:not(.lighter)").all_inner_texts()) == row["sig_higher_than"]


def _wide_banner_book(demo_study: Path, folder: Path) -> Path:
    """The demo book with a 25-column banner on its shop_freq table (Total, sex 2, age band 8,
    region 6): the age band columns repeated as a fourth break (new keys and letters), rendered
    into `folder`."""
    study = load_spec(demo_study)
    stored = load_results(study)
    copy = stored.export.filter((pl.col("table") == "shop_freq") & (pl.col("break_variable") == "age_band"))
    keys = copy["column"].unique(maintain_order=True).to_list()
    letters = {k: chr(ord("Q") + i) for i, k in enumerate(keys)}
    copy = copy.with_columns(
        pl.col("column").replace_strict(letters).alias("letter"), ("again-" + pl.col("column")).alias("column"),
        pl.lit("education").alias("break_variable"),
    )
    cells = pl.concat([stored.export, copy], how="vertical_relaxed")
    return render_book(study, cells, tests=stored.tests, out_path=folder / "wide.html")


def test_a_25_column_banner_scrolls_inside_its_frame_with_sticky_header_and_stub(browser, demo_study: Path,
                                                                                  tmp_path: Path) -> None:
    book = _wide_banner_book(demo_study, tmp_path)
    for width in (1280, 400):
        page = browser.new_page()
        page.set_viewport_size({"width": width, "height": 800})
        page.goto(book.as_uri())
        section = page.locator("section.variable").nth(6)
        table = section.locator("table.banner")
        assert table.locator("thead tr").last.locator("th").count() == 25  # (the stub heads both header rows)
        frame = section.locator(".table-frame").first
        assert frame.evaluate("f => f.scrollWidth > f.clientWidth")  # the table scrolls inside its frame
        assert page.evaluate("document.documentElement.scrollWidth") <= width  # the page does not
        result = page.evaluate(OVERLAPS_JS)
        assert result["hits"] == [], result["hits"]
        section.locator("input.detail-toggle").check()  # precision rows make the table taller than its frame
        assert frame.evaluate("f => f.scrollHeight > f.clientHeight")
        stub = table.locator("tbody th").first
        head = table.locator("thead th.column-head").first
        top = frame.bounding_box()["y"]
        before_stub, before_head = stub.bounding_box(), head.bounding_box()
        frame.evaluate("f => { f.scrollLeft = 600; f.scrollTop = 300; }")
        after_stub, after_head = stub.bounding_box(), head.bounding_box()
        assert abs(after_stub["x"] - before_stub["x"]) < 1  # the stub column stays put
        assert 0 <= after_head["y"] - top < before_head["y"] - top  # the header rows stay on top
        if width == 400:
            _shot(section, "book-banner-25-columns-400px.png")
        page.close()


def test_chart_and_trends_render_and_keyboard_reaches_the_skip_link(page) -> None:
    chart = page.locator("section.variable figure.chart").nth(6)
    box = chart.bounding_box()
    assert box["width"] > 300 and box["height"] > 100
    assert chart.locator("circle").count() == page.locator("section.variable").nth(6).locator("table.waves").locator("tr.row-category, tr.row-net").count()
    _shot(chart, "book-chart.png")
    trends = page.locator("#trends")
    assert trends.locator("figure.panel").count() > 20
    _shot(trends.locator(".trend-group").nth(7), "book-trends.png")
    page.keyboard.press("Tab")
    focused = page.evaluate("document.activeElement.className")
    assert focused == "skip"
    skip = page.locator("a.skip").bounding_box()
    assert skip["x"] >= 0  # visible when focused
