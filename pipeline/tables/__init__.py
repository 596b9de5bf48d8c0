"""The tables stage: every number the book shows, from toplines to banner tables with marks.

Public entry (what the runner and the commands use; everything else is internal):
  `unweighted_toplines`   the tidy long cell frame of every staged wave (`topline`)
  `wave_estimates`        weighted design-based estimates of a wave's topline rows (`weighted_cells`)
  `Tabulation`            banner tables wave by wave: cells, column / Total / Rao-Scott tests, and
                          across waves the change tests (`tabulation`), giving `BannerTables`
  `tidy_cells`, `write_cells`, `write_exports`, `write_workbook`   the exports beside the book

Modules: `topline`, `weighted_cells`, `cells_export` (the tidy export's schema), `spec` ([tables],
[[banners]], [[tables.sets]]), `banners` (columns as domain indicators, letters), `fit` (the one
grouped pass and the variances of differences), `cells`, `significance`, `rao_scott`,
`wave_change`, `stacked`, `within`, `tabulation`, `result`, `exports`, `workbook`.
"""

from pipeline.tables.cells_export import export_paths as cells_export_paths
from pipeline.tables.cells_export import tidy_cells, write_cells
from pipeline.tables.exports import export_paths, read_export, write_exports
from pipeline.tables.result import BannerTables, ChanceMarks
from pipeline.tables.tabulation import Tabulation, tables_spec
from pipeline.tables.topline import unweighted_toplines
from pipeline.tables.weighted_cells import ESTIMATE_SCHEMA, RememberedReplay, wave_estimates
from pipeline.tables.workbook import write_workbook

__all__ = [
    "BannerTables", "ChanceMarks", "ESTIMATE_SCHEMA", "RememberedReplay", "Tabulation", "cells_export_paths",
    "export_paths", "read_export", "tables_spec", "tidy_cells", "unweighted_toplines", "wave_estimates",
    "write_cells", "write_exports", "write_workbook",
]
