"""Read the cells export the run wrote beside a book, for the book's tests."""

from __future__ import annotations

from pathlib import Path

import polars as pl


def written_cells(book: Path) -> pl.DataFrame:
    """The one cells export (`<stem>_cells.parquet`) written beside `book`."""
    book = Path(book)
    return pl.read_parquet(book.with_name(f"{book.stem}_cells.parquet"))
