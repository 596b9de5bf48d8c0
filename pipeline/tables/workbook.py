"""The banner tables as a spreadsheet workbook (.xlsx, the open spreadsheet format): one sheet per table.

Written with XlsxWriter (a maintained writer of the format; no hand-written XML) from the one
cells export (`pipeline.tables.export_cells`): its Total rows are the Total column, its banner
rows the other columns, so the workbook shows the export's numbers and no other. Each sheet holds
one stub's table for every wave, one block per wave: a header of the break labels, the column
labels and the column letters; the unweighted base of each column; then per stub row the
estimates (percentages to one decimal, means to two) and, beneath, the letters of the columns each
cell is significantly higher than (lighter level in lower case). Suppressed cells show the
symbol `SUPPRESSED` and no number; the legend under each table explains the symbols, the levels
and the low-base flag. Like every export it holds no respondent-level value.
"""

from __future__ import annotations

import re
from pathlib import Path

import polars as pl

from pipeline.errors import Problem, SpecError
from pipeline.outputs import write_output
from pipeline.staging.spec import Study
from pipeline.tables.cells_export import SHARES, TOTAL
from pipeline.tables.result import BannerTables

SUPPRESSED = "*"
LOW_BASE = "!"


def _sheet_name(name: str, used: set[str]) -> str:
    """A valid, unique sheet name (at most 31 characters, none of []:*?/\\)."""
    base = re.sub(r"[\[\]:*?/\\]", "_", name)[:31] or "table"
    out, i = base, 2
    while out.lower() in used:
        suffix = f"~{i}"
        out, i = base[: 31 - len(suffix)] + suffix, i + 1
    used.add(out.lower())
    return out


def write_workbook(export: pl.DataFrame, tables: BannerTables, study: Study, path: Path) -> Path:
    """Write `path` (.xlsx): one formatted sheet per banner table of `export` (module docstring; `tables`
    gives the levels, thresholds and the chance-marks sentence); returns `path`."""
    try:
        import xlsxwriter
    except ImportError:
        problem = Problem("missing-extra", "the workbook writer is not installed: pip install 'wavebook[xlsx]'")
        raise SpecError("cannot write the banner workbook", [problem]) from None
    return write_output(Path(path), lambda tmp: _write(xlsxwriter, export, tables, study, Path(tmp)))


def _banner_blocks(export: pl.DataFrame) -> pl.DataFrame:
    """The rows of the banner tables: each table's banner rows, and its Total rows of the same
    (wave, row, statistic) first; counts left out. Percentages and balances in points (0-100)."""
    figures = export.filter(pl.col("statistic") != "count")
    banner = figures.filter(pl.col("banner") != TOTAL)
    shown = banner.select("wave", "table", "row", "statistic").unique()
    total = figures.filter(pl.col("banner") == TOTAL).join(shown, on=["wave", "table", "row", "statistic"])
    points = pl.col("statistic").is_in(SHARES)
    return pl.concat([total, banner]).with_columns(
        pl.when(points).then(pl.col("estimate") * 100).otherwise(pl.col("estimate")).alias("estimate"))


def _write(xlsxwriter, export: pl.DataFrame, tables: BannerTables, study: Study,  # noqa: ANN001 - the module
           tmp: Path) -> None:
    cells = _banner_blocks(export)
    levels = tables.spec.levels
    book = xlsxwriter.Workbook(str(tmp), {"nan_inf_to_errors": True})
    try:
        bold = book.add_format({"bold": True})
        head = book.add_format({"bold": True, "align": "center", "text_wrap": True, "bottom": 1})
        letter = book.add_format({"align": "center", "font_color": "#555555"})
        pct = book.add_format({"num_format": "0.0"})
        num = book.add_format({"num_format": "0.00"})
        whole = book.add_format({"num_format": "#,##0", "italic": True})
        mark = book.add_format({"font_color": "#1f4e79", "align": "right", "font_size": 9})
        note = book.add_format({"italic": True, "font_size": 9})
        used: set[str] = set()
        for table in dict.fromkeys(cells["table"].to_list()):
            sheet = book.add_worksheet(_sheet_name(table, used))
            variable = study.variables.get(table)
            sheet.write(0, 0, variable.label if variable else table, bold)
            sheet.set_column(0, 0, 42)
            r = 2
            for wave in dict.fromkeys(cells.filter(pl.col("table") == table)["wave"].to_list()):
                block = cells.filter((pl.col("table") == table) & (pl.col("wave") == wave))
                columns = block.select("column", "column_label", "letter", "break_variable").unique(
                    "column", maintain_order=True)
                sheet.write(r, 0, f"Wave {wave}", bold)
                for j, (_, label, let, brk) in enumerate(columns.iter_rows(), start=1):
                    brk_label = study.variables[brk].label if brk in study.variables else ""
                    sheet.write(r, j, brk_label, letter)
                    sheet.write(r + 1, j, label, head)
                    sheet.write(r + 2, j, f"({let})" if let else "", letter)
                sheet.set_column(1, columns.height, 12)
                r += 3
                first = block.sort("row").group_by("column", maintain_order=True).first()
                base = dict(first.select("column", "base_unweighted").iter_rows())
                sheet.write(r, 0, "Base (unweighted)", bold)
                for j, key in enumerate(columns["column"], start=1):
                    if base.get(key) is not None:
                        sheet.write_number(r, j, base[key], whole)
                r += 1
                for row in dict.fromkeys(block.sort("row")["row"].to_list()):
                    line = block.filter(pl.col("row") == row)
                    by_column = {c["column"]: c for c in line.iter_rows(named=True)}
                    sheet.write(r, 0, line["row_label"][0])
                    for j, key in enumerate(columns["column"], start=1):
                        c = by_column.get(key)
                        if c is None:
                            continue
                        if "suppressed" in c["flags"] or "empty-column" in c["flags"]:
                            sheet.write(r, j, SUPPRESSED, letter)
                        elif c["estimate"] is not None:
                            fmt = pct if c["statistic"] in ("percent", "balance") else num
                            sheet.write_number(r, j, c["estimate"], fmt)
                        marks = c["sig_higher_than"] + c["sig_higher_than_lighter"].lower()
                        if "low-base" in c["flags"]:
                            marks += LOW_BASE
                        if marks:
                            sheet.write(r + 1, j, marks, mark)
                    r += 2
                r += 1
            legend = (f"Letters: the cell is significantly higher than the lettered column of its break at the "
                      f"{100 * levels[0]:g}% level" + (f"; lower case, at the {100 * levels[1]:g}% level only"
                                                        if len(levels) > 1 else "")
                      + f". {SUPPRESSED} fewer than {tables.spec.suppress_below} respondents (not shown). "
                      f"{LOW_BASE} fewer than {tables.spec.low_base} respondents (not tested).")
            sheet.write(r, 0, legend, note)
            sheet.write(r + 1, 0, tables.chance.sentence(), note)
    finally:
        book.close()
