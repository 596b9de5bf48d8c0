"""Chart geometry for the book's inline SVG: the templates write the markup, this module the numbers.

Two kinds, both readable in grey-scale (ink, a grey band, no meaning carried by hue):

* `dot_chart`: one table column (the latest wave today; the Total column of a banner table) as
  a dot per row at its estimate with a whisker from the interval's low to high end, on a 0-100
  scale for percentages. Each row's label sits on its own line above its dot, so labels never
  collide with the marks at any width.
* `trend_panel`: one tracked measure across waves as a line through the estimates inside a grey
  band from the interval ends (percentages on an axis from 0; means on a round range around
  their intervals, so the band stays visible); a wave whose change from the wave before is
  significant gets a text mark (▲ / ▼) above its point, so significance never rests on colour.

Every chart's text alternative is its table (the chart repeats figures the table states) plus a
one-sentence description in the SVG's `<desc>`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

WIDTH = 640
DOT_LEFT, DOT_RIGHT = 16, 556
DOT_ROW = 38
DOT_TOP = 8
AXIS_SPACE = 26
LABEL_CHARS = 60
PANEL_WIDTH, PANEL_HEIGHT = 240, 150
PANEL_LEFT, PANEL_RIGHT, PANEL_TOP, PANEL_BOTTOM = 34, 12, 26, 28


@dataclass(frozen=True)
class DotRow:
    """One row of a dot chart: label (shortened), the full label, y of the dot, x of estimate and
    ends (ends None without an interval), and the figure as text."""

    label: str
    full_label: str
    label_y: float
    y: float
    x: float
    x_low: float | None
    x_high: float | None
    text: str


@dataclass(frozen=True)
class Tick:
    """An axis tick: position and label."""

    at: float
    label: str


@dataclass(frozen=True)
class DotChart:
    """A dot chart of one column: size, rows, x-axis ticks, title and description."""

    width: int
    height: int
    rows: tuple[DotRow, ...]
    ticks: tuple[Tick, ...]
    axis_y: float
    title: str
    description: str
    label_x: float = DOT_LEFT
    value_x: float = WIDTH - 4


@dataclass(frozen=True)
class TrendPoint:
    """A wave's point on a trend panel: x, y, the wave's short label, the figure as text and its
    change mark ("▲", "▼" or "")."""

    x: float
    y: float
    wave: str
    text: str
    mark: str


@dataclass(frozen=True)
class TrendPanel:
    """One tracked measure across waves: the line's and band's SVG point lists, points, y ticks."""

    title: str
    width: int
    height: int
    line: str
    band: str
    points: tuple[TrendPoint, ...]
    ticks: tuple[Tick, ...]
    plot_left: float
    plot_right: float
    description: str


def _scale(value: float, low: float, high: float, start: float, end: float) -> float:
    return start + (value - low) / (high - low) * (end - start) if high > low else (start + end) / 2


def _shorten(label: str) -> str:
    return label if len(label) <= LABEL_CHARS else label[: LABEL_CHARS - 1].rstrip() + "…"


def _nice_top(value: float) -> float:
    """A round axis end at or above `value` (1, 2 or 5 times a power of ten)."""
    if value <= 0:
        return 1.0
    power = 10 ** math.floor(math.log10(value))
    for step in (1, 2, 5, 10):
        if step * power >= value:
            return step * power
    return 10 * power


def _nice_range(low: float, high: float) -> tuple[float, float]:
    """A round axis range around [low, high] whose span is at most about three times the data's
    (so a mean's interval band stays visible): ends on multiples of a 1-2-5 step."""
    span = high - low
    if span <= 0:
        span = abs(high) or 1.0
    step = _nice_top(span / 2)
    bottom = math.floor(low / step) * step
    top = math.ceil(high / step) * step
    if top <= bottom:
        top = bottom + step
    return bottom, top


def dot_chart(
    rows: Sequence[tuple[str, float, float | None, float | None, str]], *, column: str, percent: bool
) -> DotChart | None:
    """A dot chart of (label, estimate, low, high, text) rows; None without any row.

    Percentages use a 0-100 axis; other statistics 0 to a round number above the largest end."""
    if not rows:
        return None
    top = 100.0 if percent else _nice_top(max(max(r[1], r[3] or r[1]) for r in rows))
    bottom = 0.0 if percent or min(min(r[1], r[2] or r[1]) for r in rows) >= 0 else -top
    ys = []
    out = []
    for index, (label, estimate, low, high, text) in enumerate(rows):
        label_y = DOT_TOP + index * DOT_ROW + 14
        y = label_y + 13
        ys.append(y)
        out.append(
            DotRow(
                label=_shorten(label),
                full_label=label,
                label_y=label_y,
                y=y,
                x=_scale(estimate, bottom, top, DOT_LEFT, DOT_RIGHT),
                x_low=None if low is None else _scale(low, bottom, top, DOT_LEFT, DOT_RIGHT),
                x_high=None if high is None else _scale(high, bottom, top, DOT_LEFT, DOT_RIGHT),
                text=text,
            )
        )
    axis_y = DOT_TOP + len(rows) * DOT_ROW + 4
    ticks = tuple(
        Tick(at=_scale(v, bottom, top, DOT_LEFT, DOT_RIGHT), label=f"{v:g}{'%' if percent else ''}")
        for v in (bottom + (top - bottom) * k / 4 for k in range(5))
    )
    return DotChart(
        width=WIDTH,
        height=int(axis_y + AXIS_SPACE),
        rows=tuple(out),
        ticks=ticks,
        axis_y=axis_y,
        title=f"{column}: estimates with their intervals",
        description=(
            f"Dots mark the estimates of the column {column}; lines run from each interval's low to "
            "high end. The table above gives the same figures."
        ),
    )


def trend_panel(
    title: str, points: Sequence[tuple[str, float, float | None, float | None, str, str]], *, percent: bool
) -> TrendPanel | None:
    """A small-multiple trend of (wave label, estimate, low, high, text, mark) points in wave order;
    None with fewer than two waves of figures."""
    if len(points) < 2:
        return None
    lows = [p[2] if p[2] is not None else p[1] for p in points]
    highs = [p[3] if p[3] is not None else p[1] for p in points]
    if percent:
        bottom, top = 0.0, max(10.0, _nice_top(max(highs)))
        top = min(top, 100.0)
    else:
        bottom, top = _nice_range(min(lows), max(highs))
    left, right = PANEL_LEFT, PANEL_WIDTH - PANEL_RIGHT
    plot_top, plot_bottom = PANEL_TOP, PANEL_HEIGHT - PANEL_BOTTOM
    xs = [_scale(i, 0, len(points) - 1, left + 10, right - 10) for i in range(len(points))]

    def y_of(value: float) -> float:
        return _scale(value, bottom, top, plot_bottom, plot_top)

    line = " ".join(f"{x:.1f},{y_of(p[1]):.1f}" for x, p in zip(xs, points, strict=True))
    upper = [f"{x:.1f},{y_of(h):.1f}" for x, h in zip(xs, highs, strict=True)]
    lower = [f"{x:.1f},{y_of(lo):.1f}" for x, lo in zip(xs, lows, strict=True)]
    band = " ".join(upper + lower[::-1])
    ticks = tuple(Tick(at=y_of(v), label=f"{v:g}") for v in (bottom, (bottom + top) / 2, top))
    first, last = points[0], points[-1]
    return TrendPanel(
        title=title,
        width=PANEL_WIDTH,
        height=PANEL_HEIGHT,
        line=line,
        band=band,
        points=tuple(
            TrendPoint(x=x, y=y_of(p[1]), wave=p[0], text=p[4], mark=p[5]) for x, p in zip(xs, points, strict=True)
        ),
        ticks=ticks,
        plot_left=left,
        plot_right=right,
        description=f"{title}: {first[4]} in {first[0]}, {last[4]} in {last[0]}; the grey band is the interval.",
    )
