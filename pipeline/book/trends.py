"""The trends page: every tracked measure across waves as a small-multiple panel.

A tracked measure is a percentage row (category, net, item) or a mean of a table with figures
in at least two waves. Each panel (see `pipeline.book.charts.trend_panel`) shows the estimates
with their interval band; a wave whose cell carries a wave-change mark gets ▲ / ▼ as text.
"""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.book.charts import TrendPanel, trend_panel
from pipeline.book.tables import CHART_KINDS, DOWN, UP, Section

TRACKED_STATISTICS = ("Mean",)


@dataclass(frozen=True)
class TrendGroup:
    """The panels of one table: its anchor and label, a link to the table, and one panel per tracked measure."""

    anchor: str
    label: str
    href: str
    panels: tuple[TrendPanel, ...]


def trend_groups(sections: tuple[Section, ...]) -> tuple[TrendGroup, ...]:
    """One group per table with at least one measure tracked over two or more waves."""
    groups = []
    for section in sections:
        table = section.table
        panels = []
        for row in table.rows:
            percent = row.kind in CHART_KINDS
            if not percent and not (row.kind == "statistic" and row.label in TRACKED_STATISTICS):
                continue
            points = [
                (column.key, cell.estimate, cell.low, cell.high, cell.text,
                 UP if cell.change == "up" else DOWN if cell.change == "down" else "")
                for column, cell in zip(table.columns, row.cells, strict=True)
                if cell.estimate is not None and not cell.suppressed
            ]
            panel = trend_panel(row.label, points, percent=percent)
            if panel is not None:
                panels.append(panel)
        if panels:
            groups.append(TrendGroup(anchor=section.anchor, label=section.label, href=section.href, panels=tuple(panels)))
    return tuple(groups)
