"""How the book prints numbers (pipeline.book.numbers): the book's own display conventions.

The expected strings follow the rules in the module docstring (no outside source: they are
display choices); the rounding identity half_up(x) = floor(x + 0.5) is checked on random values.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.book.numbers import half_up, percent_texts, statistic_interval, statistic_number


@pytest.mark.parametrize(("percent", "shown"), [(12.5, "13%"), (12.49, "12%"), (0.0, "0%"), (100.0, "100%"), (50.5, "51%")])
def test_percentages_round_half_up_to_whole_numbers(percent: float, shown: str) -> None:
    assert percent_texts(percent)[0] == shown


@pytest.mark.parametrize(
    ("estimate", "low", "high", "figure", "interval"),
    [
        (99.87, 99.52, 99.97, "99.9%", "99.5–>99.9"),  # whole numbers would print 100% and "100–100"
        (0.3, 0.1, 0.9, "0.3%", "0.1–0.9"),  # whole numbers would print 0% with "0–1"
        (0.0, 0.0, 0.24, "0.0%", "0.0–0.2"),  # the estimate is exactly 0, but the upper end is not
        (100.0, 99.6, 100.0, "100.0%", "99.6–100.0"),  # an exact 100 keeps the decimal of its interval
        (100.0, 99.3, 100.0, "100%", "99–100"),  # no end rounds to a misleading 100: whole numbers
        (41.3, 41.1, 41.4, "41.3%", "41.1–41.4"),  # the two ends would both print 41
        (12.5, 10.5, 18.49, "13%", "11–18"),  # whole numbers: half up, like the figures
        (99.6, 98.1, 99.96, "99.6%", "98.1–>99.9"),  # one decimal still shows 100.0: ">99.9"
        (0.02, 0.0, 0.04, "<0.1%", "0.0–<0.1"),
    ],
)
def test_percentages_keep_a_decimal_where_whole_numbers_mislead(
    estimate: float, low: float, high: float, figure: str, interval: str
) -> None:
    assert percent_texts(estimate, low, high) == (figure, interval)


@given(st.floats(min_value=0, max_value=1e6, allow_nan=False))
def test_half_up_is_floor_of_x_plus_a_half(x: float) -> None:
    # identity for x >= 0 (up to binary noise 1e-9 around halves, which half_up absorbs)
    assert half_up(x) in (math.floor(x + 0.5), math.floor(x + 0.5 + 1e-9))


def test_integer_valued_statistics_print_without_decimals() -> None:
    assert statistic_number("median", 7.0) == "7"  # not "7.00"
    assert statistic_interval("median", 7.0, 7.0) == "7–7"
    assert statistic_interval("median", 6.5, 8.0) == "6.50–8.00"  # a Woodruff end between codes
    assert statistic_number("min", 0.0) == "0" and statistic_number("max", 10.0) == "10"
    assert statistic_number("n", 1578.0) == "1,578"
    assert statistic_number("mean", 7.0) == "7.00"  # a mean is not integer-valued
    assert statistic_number("median", 437.5) == "437.50"


def test_balance_scores_print_signed_whole_points_with_their_interval() -> None:
    from pipeline.book.tables import format_cell

    row = {"statistic": "balance", "base_unweighted": 200, "estimate": 0.124, "ci_low": -0.036, "ci_high": 0.205,
           "se": 0.041, "deff": 1.3, "flags": ""}  # an export row: shares, printed as points
    cell = format_cell(row, None, "balance", weighted=True)
    assert (cell.text, cell.interval, cell.se, cell.deff) == ("+12", "-4 to +21", "4.10", "1.30")
    assert format_cell({**row, "estimate": 0.002}, None, "balance", weighted=True).text == "0"
    assert format_cell({**row, "estimate": -0.07, "se": None}, None, "balance", weighted=False).text == "-7"


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(
    st.one_of(st.floats(0, 100), st.sampled_from([0.0, 0.04, 0.05, 0.4999999999, 0.5, 12.5, 99.5, 99.95, 100.0])),
    st.floats(0, 5), st.floats(0, 5), st.booleans()), min_size=1, max_size=40))
def test_percent_texts_of_a_whole_column_equal_the_one_at_a_time_rule(rows) -> None:
    """`percent_text_exprs` (polars, the book's fast path) prints exactly what `percent_texts` prints."""
    import polars as pl

    from pipeline.book.numbers import percent_text_exprs

    triples = [(e, max(0.0, e - a), min(100.0, e + b)) if ends else (e, None, None) for e, a, b, ends in rows]
    frame = pl.DataFrame(triples, schema={"e": pl.Float64, "l": pl.Float64, "h": pl.Float64}, orient="row")
    alone, shared, interval = percent_text_exprs(pl.col("e"), pl.col("l"), pl.col("h"))
    out = frame.select(alone.alias("a"), shared.alias("s"), interval.alias("i"))
    for (e, low, high), (a, s, i) in zip(triples, out.iter_rows(), strict=True):
        assert a == percent_texts(e)[0]
        assert (s, i) == percent_texts(e, low, high)
