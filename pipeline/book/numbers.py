"""How the book prints numbers: percentages with their intervals, statistics, counts.

Display conventions (the book's own; no outside source):

* Rounding is half up (12.5 -> 13), not Python's half to even.
* A percentage and its interval share one number of decimals, chosen together: whole numbers,
  unless whole numbers would mislead, then one decimal. Whole numbers mislead when a value that
  is not exactly 0 or 100 would print as 0 or 100 (at either end of the interval, or the
  estimate itself), or when the interval's two ends would print the same although they differ.
  A value that still prints as 0.0 or 100.0 with one decimal prints as "<0.1" or ">99.9".
* Integer-valued statistics (counts of answers, and medians, minima and maxima that are whole
  numbers, as on a rating scale) print without decimals; means, and order statistics that are
  not whole, print with 2 decimals.
"""

from __future__ import annotations

import math

import polars as pl

INTEGER_STATISTICS = ("n",)
ORDER_STATISTICS = ("median", "min", "max")


def half_up(number: float, decimals: int = 0) -> float:
    """`number` rounded half up to `decimals` places (12.5 -> 13; 0.25 -> 0.3 with one decimal).

    The scaled value is first rounded to 9 places so that binary noise (0.25 stored a hair under)
    does not flip a half down."""
    if decimals == 0:
        return float(math.floor(round(number, 9) + 0.5))
    scale = 10**decimals
    return math.floor(round(number * scale, 9) + 0.5) / scale


def percent_decimals(*values: float | None) -> int:
    """0 or 1: the decimals for a percentage and its interval ends (None ends are ignored).

    One decimal when a value strictly between 0 and 100 would round to 0 or 100, or when the
    first two values given after the estimate (the interval's ends) differ but round equal."""
    for v in values:
        # half_up(v) is 0 or 100 exactly when round(v, 9) < 0.5 or >= 99.5 (for 0 < v < 100)
        if v is not None and 0.0 < v < 100.0 and not 0.5 <= round(v, 9) < 99.5:
            return 1
    if len(values) == 3 and values[1] is not None and values[2] is not None:
        low, high = values[1], values[2]
        if low < high and half_up(low) == half_up(high):
            return 1
    return 0


def percent_number(value: float, decimals: int) -> str:
    """A percentage without the sign at `decimals` places; "<0.1"/">99.9" where one decimal would
    still print an exact end for a value that is not one."""
    if decimals == 1 and 0.0 < value < 0.05:
        return "<0.1"
    if decimals == 1 and 99.95 <= value < 100.0:
        return ">99.9"
    return f"{half_up(value, decimals):.{decimals}f}"


def percent_texts(estimate: float, low: float | None = None, high: float | None = None) -> tuple[str, str | None]:
    """The estimate as "12%" and its interval as "10–15" (None without ends), with shared decimals."""
    decimals = percent_decimals(estimate, low, high)
    interval = None
    if low is not None and high is not None:
        interval = f"{percent_number(low, decimals)}–{percent_number(high, decimals)}"
    return f"{percent_number(estimate, decimals)}%", interval


def statistic_number(code: str, value: float) -> str:
    """A statistic's value: counts and whole order statistics without decimals, else 2 decimals."""
    if code in INTEGER_STATISTICS or (code in ORDER_STATISTICS and float(value).is_integer()):
        return f"{half_up(value):,.0f}"
    return f"{value:,.2f}"


def statistic_interval(code: str, low: float, high: float) -> str:
    """A statistic's interval "6–8" or "6.25–7.80": whole numbers only when both ends are whole
    numbers of an order statistic (a median's interval on a rating scale)."""
    if code in ORDER_STATISTICS and float(low).is_integer() and float(high).is_integer():
        return f"{low:,.0f}–{high:,.0f}"
    return f"{low:,.2f}–{high:,.2f}"


def count_text(count: int | float) -> str:
    """A count of respondents with thousands separators."""
    return f"{half_up(count):,.0f}"


def ratio_text(value: float | None, decimals: int = 2) -> str | None:
    """A ratio such as a design effect to `decimals` places; None where undefined."""
    if value is None or not math.isfinite(value):
        return None
    return f"{value:,.{decimals}f}"


def _half_up_expr(value: pl.Expr, decimals: int) -> pl.Expr:
    """`half_up` as a polars expression: the scaled whole number floor(round(v * 10^d, 9) + 0.5)."""
    return ((value * 10**decimals).round(9) + 0.5).floor().cast(pl.Int64)


def _percent_number_expr(value: pl.Expr, one_decimal: pl.Expr) -> pl.Expr:
    """`percent_number` as a polars expression for 0 <= value <= 100 (null elsewhere)."""
    whole = _half_up_expr(value, 0).cast(pl.String)
    tenths = _half_up_expr(value, 1)
    decimal = pl.concat_str([(tenths // 10).cast(pl.String), pl.lit("."), (tenths % 10).cast(pl.String)])
    return (
        pl.when((value < 0) | (value > 100)).then(None)
        .when(one_decimal & (value > 0) & (value < 0.05)).then(pl.lit("<0.1"))
        .when(one_decimal & (value >= 99.95) & (value < 100)).then(pl.lit(">99.9"))
        .when(one_decimal).then(decimal)
        .otherwise(whole)
    )


def _misleads_expr(value: pl.Expr) -> pl.Expr:
    """Whether a whole number would print a value strictly between 0 and 100 as 0 or 100."""
    rounded = value.round(9)
    return ((value > 0) & (value < 100) & ~((rounded >= 0.5) & (rounded < 99.5))).fill_null(False)


def percent_text_exprs(estimate: pl.Expr, low: pl.Expr, high: pl.Expr) -> tuple[pl.Expr, pl.Expr, pl.Expr]:
    """`percent_texts` for a whole column at once, as polars expressions of percentages (0-100):
    (the estimate alone as "12%", the estimate with decimals shared with its interval, the
    interval "10–15"); null where a value is missing or outside 0-100 (the caller then formats
    that cell with `percent_texts`). `tests/test_book_numbers.py` checks them against it."""
    alone = _misleads_expr(estimate)
    ends = (low.is_not_null() & high.is_not_null() & (low < high)
            & (_half_up_expr(low, 0) == _half_up_expr(high, 0))).fill_null(False)
    shared = alone | _misleads_expr(low) | _misleads_expr(high) | ends
    interval = pl.concat_str([_percent_number_expr(low, shared), pl.lit("–"), _percent_number_expr(high, shared)])
    return (
        pl.concat_str([_percent_number_expr(estimate, alone), pl.lit("%")]),
        pl.concat_str([_percent_number_expr(estimate, shared), pl.lit("%")]),
        interval,
    )
