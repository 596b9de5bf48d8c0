"""The tables stage: every number the book shows, from toplines to banner tables with marks.

Public entry (what the runner and the commands use; everything else is internal):
  `unweighted_toplines`   the tidy long cell frame of every staged wave (`topline`)
  `Tabulation`            per wave and batch of variables: the weighted topline estimates
                          (`weighted_cells`), with `[tables]` the banner cells and column / Total /
                          Rao-Scott tests, and across waves the change tests of the Total of every
                          variable and of every banner cell (`tabulation`), giving `BannerTables`
  `export_cells`          the ONE cells export frame (Total rows and banner-column rows, every
                          number once; `cells_export`), which the runner writes and the book reads
  `write_cells`, `write_exports`, `write_workbook`   the files beside the book (cells, tests, .xlsx)

Modules: `topline`, `weighted_cells`, `cells_export` (the export's schema), `spec` ([tables],
[[banners]], [[tables.sets]]), `banners` (columns as domain indicators, letters), `fit` (the one
grouped pass and the variances of differences), `cells`, `significance`, `rao_scott`,
`wave_change`, `stacked`, `within`, `tabulation`, `result`, `exports`, `workbook`.
"""

from pipeline.tables.cells_export import EXPORT_SCHEMA, export_cells, write_cells
from pipeline.tables.cells_export import export_paths as cells_export_paths
from pipeline.tables.exports import export_paths, read_export, write_exports
from pipeline.tables.result import BannerTables, ChanceMarks
from pipeline.tables.tabulation import Tabulation, tables_spec
from pipeline.tables.topline import unweighted_toplines
from pipeline.tables.weighted_cells import ESTIMATE_SCHEMA, RememberedReplay, wave_estimates
from pipeline.tables.workbook import write_workbook

__all__ = [
    "EXPORT_SCHEMA", "BannerTables", "ChanceMarks", "ESTIMATE_SCHEMA", "RememberedReplay", "Tabulation",
    "cells_export_paths", "export_cells", "export_paths", "read_export", "tables_spec", "unweighted_toplines",
    "wave_estimates", "write_cells", "write_exports", "write_workbook",
]
