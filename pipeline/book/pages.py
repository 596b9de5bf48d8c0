"""Which page holds what, how pages link to each other, and how the book is written.

A one-file book is one page (`<name>.html`) holding every part in order: cover, contents,
methodology, the tables, trends, appendix; links are "#anchor". A folder book has `index.html`
(cover and contents), `methodology.html`, one page per table named by its anchor,
`trends.html` (then `trends-2.html`... for every TREND_TABLES_PER_PAGE tables, so no page grows
with the size of the study) and `appendix.html`; links are "page.html#anchor". Parts are the
template partials `templates/_<part>.html.j2`.

`write_book` writes all files at once: a one-file book through `pipeline.outputs` (a
temporary file in the same folder, renamed, recorded as wavebook's output); a folder book into a temporary folder beside the target, which then
replaces the old folder (the old one is moved aside first and removed only after the swap).
"""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

from pipeline.errors import Problem, WavebookError
from pipeline.outputs import cannot_write, is_own_output, write_text_output

BOOK_PARTS = ("cover", "contents", "methodology", "tables", "trends", "appendix")
TREND_TABLES_PER_PAGE = 40  # a folder book's trends pages hold this many tables' panels each


@dataclass(frozen=True)
class Page:
    """One file of the book: its name, title, the parts it shows, and the anchors of its tables."""

    file: str
    title: str
    parts: tuple[str, ...]
    sections: tuple[str, ...] = ()


@dataclass(frozen=True)
class PagePlan:
    """The pages, the page of each table's anchor, and the href of each page kind."""

    pages: tuple[Page, ...]
    section_pages: dict[str, str]
    links: dict[str, str]
    single_file: bool
    trend_pages: tuple[Page, ...] = ()

    def href(self, page: str, anchor: str) -> str:
        """A link to `anchor` on `page` from any page of the book."""
        return f"#{anchor}" if self.single_file else f"{page}#{anchor}"


def plan_pages(anchors: Sequence[str], *, single_file: bool) -> PagePlan:
    """The book's pages for tables with these anchors."""
    if single_file:
        page = Page(file="", title="", parts=BOOK_PARTS, sections=tuple(anchors))
        links = {part: f"#{part}" for part in BOOK_PARTS}
        return PagePlan(pages=(page,), section_pages=dict.fromkeys(anchors, ""), links=links, single_file=True)
    chunks = [tuple(anchors[i:i + TREND_TABLES_PER_PAGE]) for i in range(0, len(anchors), TREND_TABLES_PER_PAGE)]
    trend_pages = tuple(
        Page(file="trends.html" if n == 0 else f"trends-{n + 1}.html", title="Trends", parts=("trends",), sections=chunk)
        for n, chunk in enumerate(chunks or [()])
    )
    pages = [
        Page(file="index.html", title="Contents", parts=("cover", "contents")),
        Page(file="methodology.html", title="How these figures were made", parts=("methodology",)),
        *(Page(file=f"{a}.html", title="", parts=("tables",), sections=(a,)) for a in anchors),
        *trend_pages,
        Page(file="appendix.html", title="Appendix", parts=("appendix",)),
    ]
    links = {
        "cover": "index.html#cover",
        "contents": "index.html#contents",
        "methodology": "methodology.html#methodology",
        "trends": "trends.html#trends",
        "appendix": "appendix.html#appendix",
        "tables": f"{anchors[0]}.html#{anchors[0]}" if anchors else "index.html#contents",
    }
    return PagePlan(
        pages=tuple(pages), section_pages={a: f"{a}.html" for a in anchors}, links=links, single_file=False,
        trend_pages=trend_pages if len(trend_pages) > 1 else (),
    )


def write_book(out_path: Path, files: Mapping[str, str], *, single_file: bool) -> Path:
    """Write the rendered `files` (page name -> text; "" is the one-file page) and return the page to open.

    One file: `out_path`, with any other files (manifest.json) beside it, each through
    `pipeline.outputs.write_text_output` (atomic, recorded as wavebook's own output). A folder:
    `out_path` without its suffix, holding every file, written into a temporary folder that is
    then renamed into place (so a reader never sees half a book; only index.html is recorded in
    the folder's output marker); an existing folder is replaced only when its index.html is
    wavebook's own unchanged output (rule output-exists otherwise)."""
    if single_file:
        for name, text in files.items():
            if name:
                write_text_output(out_path.parent / name, text)
        return write_text_output(out_path, files[""])
    folder = out_path.with_suffix("") if out_path.suffix else out_path
    if folder.exists() and not (folder.is_dir() and is_own_output(folder / "index.html")):
        raise WavebookError(
            f"not writing {folder}",
            [Problem("output-exists", "this folder was not written by wavebook as a book; move it away first",
                     file=str(folder))],
        )
    folder.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(dir=folder.parent, prefix=f".{folder.name}.", suffix=".tmp"))
    aside: Path | None = None
    try:
        for name, text in files.items():
            if name != "index.html":
                (staging / name).write_text(text, encoding="utf-8")
                os.chmod(staging / name, 0o666 & ~_umask())
        write_text_output(staging / "index.html", files["index.html"])  # recorded: the folder is ours
        os.chmod(staging, 0o777 & ~_umask())
        if folder.exists():
            aside = Path(tempfile.mkdtemp(dir=folder.parent, prefix=f".{folder.name}.", suffix=".old"))
            os.replace(folder, aside / folder.name)
        os.replace(staging, folder)
        if aside is not None:
            shutil.rmtree(aside, ignore_errors=True)
    except BaseException as exc:
        if aside is not None and not folder.exists() and (aside / folder.name).exists():
            os.replace(aside / folder.name, folder)  # put the previous book back
        shutil.rmtree(staging, ignore_errors=True)
        if aside is not None:
            shutil.rmtree(aside, ignore_errors=True)
        if isinstance(exc, OSError):
            raise cannot_write(folder, exc) from None
        raise
    return folder / "index.html"


def _umask() -> int:
    """The process's file-creation mask (read by setting it and restoring it at once)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask
