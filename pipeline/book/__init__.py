"""The result book (`pipeline.book`): the HTML book a client opens, rendered from the cells export.

Public entry: `render_book(study, cells, tests=..., out_path=..., weighting=..., variance=...)`
writes the book from the one cells export (`pipeline.tables.export_cells`, read through
`pipeline.book.source`) and the tests export; `weighting_section` and `variance_lines` build the weighting summary and the
standard-error sentences the runner passes in. `render` builds the context and renders the
templates; `weighting` holds the weighting summary.
"""

from pipeline.book.render import build_context, render_book
from pipeline.book.weighting import variance_lines, weighting_section

__all__ = ["build_context", "render_book", "variance_lines", "weighting_section"]
