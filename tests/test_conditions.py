"""The condition language (asked_if, when): parse trees, error positions, binding, and the
polars and DuckDB compilations selecting the same respondents."""

from __future__ import annotations

import duckdb
import polars as pl
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.staging.conditions import (
    AllOf,
    AnyOf,
    ColumnInfo,
    Compare,
    ConditionError,
    IsMissing,
    Member,
    Node,
    Not,
    bind,
    parse,
    show,
    to_duckdb,
    to_polars,
)

VALID = [
    ("shop_freq != 5", "(!= shop_freq 5)"),
    ("age_band in [1, 2] and shop_freq <= 2", "(and (in age_band [1 2]) (<= shop_freq 2))"),
    ("not (age_band in [1, 2] and shop_freq <= 2)", "(not (and (in age_band [1 2]) (<= shop_freq 2)))"),
    ("a == 1 or b == 2 and c == 3", "(or (== a 1) (and (== b 2) (== c 3)))"),
    ("(a == 1 or b == 2) and c == 3", "(and (or (== a 1) (== b 2)) (== c 3))"),
    ("a == 1 and b == 2 and c == 3", "(and (== a 1) (== b 2) (== c 3))"),
    ("not not a == 1", "(not (not (== a 1)))"),
    ("channel not in ['shop', \"web\"]", "(not-in channel ['shop' 'web'])"),
    ("spend is missing or spend > 12.5", "(or (is-missing spend) (> spend 12.5))"),
    ("spend is not missing", "(is-not-missing spend)"),
    ("x >= -3", "(>= x -3)"),
    ("x < 0.25", "(< x 0.25)"),
    ("  a==1  ", "(== a 1)"),
    ("channel == 'a b'", "(== channel 'a b')"),
    ("notable == 1", "(== notable 1)"),  # a keyword prefix is still a name
]

INVALID = [
    ("", 0, "the condition is empty"),
    ("shop_freq = 5", 10, "use == to compare"),
    ("a == ", 5, "expected a number or a quoted text"),
    ("(a == 1", 7, "expected ')'"),
    ("a == 1 b == 2", 7, "expected 'and', 'or' or the end"),
    ("a in 1", 5, "expected '[' starting a list of values"),
    ("a in [1 2]", 8, "expected ',' or ']'"),
    ("a in []", 6, "expected a number or a quoted text"),
    ("a == 'open", 5, "text is not closed"),
    ("a is 1", 5, "expected 'missing'"),
    ("a not == 1", 6, "expected 'in' after 'not'"),
    ("a ! 1", 2, "use != for 'not equal'"),
    ("a == 1 and", 10, "expected a variable name, 'not' or '('"),
    ("and a == 1", 0, "expected a variable name, 'not' or '('"),
    ("a == 1 ; drop", 7, "unexpected character ';'"),
    ("a == b", 5, "expected a number or a quoted text"),
    ("1 == a", 0, "expected a variable name"),
]

COLUMNS = {
    "a": ColumnInfo("int", frozenset({1, 2, 3, 4, 5})),
    "b": ColumnInfo("text", frozenset({"x", "y", "z"})),
    "c": ColumnInfo("number"),
}

BIND_ERRORS = [
    ("d == 1", 0, "'d' is not a codebook variable"),
    ("a == 1 and b < 'x'", 11, "only == and != compare them"),
    ("a == 'x'", 5, "compare it with a number"),
    ("a in [1, 9]", 9, "9 is not a code of 'a'"),
    ("b == 'w'", 5, "'w' is not a code of 'b'"),
    ("b == 1.5", 5, "has text codes"),
]


@pytest.mark.parametrize(("text", "tree"), VALID)
def test_valid_conditions_parse_into_the_expected_tree(text: str, tree: str) -> None:
    assert show(parse(text).tree) == tree


@pytest.mark.parametrize(("text", "position", "message"), INVALID)
def test_invalid_conditions_point_at_the_offending_token(text: str, position: int, message: str) -> None:
    with pytest.raises(ConditionError) as exc:
        parse(text)
    assert exc.value.position == position
    assert message in exc.value.message
    caret_line = exc.value.render().splitlines()[-1]
    assert caret_line == "    " + " " * position + "^"


@pytest.mark.parametrize(("text", "position", "message"), BIND_ERRORS)
def test_binding_checks_names_types_and_codes(text: str, position: int, message: str) -> None:
    with pytest.raises(ConditionError) as exc:
        bind(parse(text), COLUMNS)
    assert exc.value.position == position
    assert message in exc.value.message


def test_binding_converts_literals_to_the_column_type() -> None:
    text_codes = {"b": ColumnInfo("text", frozenset({"1", "2"}))}
    assert show(bind(parse("b in [1, 2]"), text_codes).tree) == "(in b ['1' '2'])"


# ---------------------------------------------------------------------------------------------
# Property: polars and DuckDB select the same rows
# ---------------------------------------------------------------------------------------------

_A = st.integers(1, 5)
_B = st.sampled_from(["x", "y", "z"])
_C = st.sampled_from([-1.5, 0.0, 0.25, 2.0, 7.5])
_OPS = st.sampled_from(["==", "!=", "<", "<=", ">", ">="])


def _leaves() -> st.SearchStrategy[Node]:
    return st.one_of(
        st.builds(lambda op, v: Compare("a", op, v, 0, 0), _OPS, _A),
        st.builds(lambda op, v: Compare("b", op, v, 0, 0), st.sampled_from(["==", "!="]), _B),
        st.builds(lambda op, v: Compare("c", op, v, 0, 0), _OPS, _C),
        st.builds(lambda vs, neg: Member("a", tuple(vs), neg, 0, (0,) * len(vs)), st.lists(_A, min_size=1, max_size=3),
                  st.booleans()),
        st.builds(lambda vs, neg: Member("b", tuple(vs), neg, 0, (0,) * len(vs)), st.lists(_B, min_size=1, max_size=3),
                  st.booleans()),
        st.builds(lambda name, neg: IsMissing(name, neg, 0), st.sampled_from(["a", "b", "c"]), st.booleans()),
    )


_TREES = st.recursive(
    _leaves(),
    lambda inner: st.one_of(
        st.builds(Not, inner),
        st.builds(lambda xs: AllOf(tuple(xs)), st.lists(inner, min_size=2, max_size=3)),
        st.builds(lambda xs: AnyOf(tuple(xs)), st.lists(inner, min_size=2, max_size=3)),
    ),
    max_leaves=8,
)

_ROWS = st.lists(
    st.tuples(st.none() | _A, st.none() | _B, st.none() | _C), min_size=1, max_size=40
)


_CON = duckdb.connect()  # one in-memory connection for every example (each registers its own frame)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(tree=_TREES, rows=_ROWS)
def test_polars_and_duckdb_forms_select_the_same_rows(tree: Node, rows: list[tuple]) -> None:
    frame = pl.DataFrame(
        {"id": list(range(len(rows))), "a": [r[0] for r in rows], "b": [r[1] for r in rows], "c": [r[2] for r in rows]},
        schema={"id": pl.Int64, "a": pl.Int64, "b": pl.String, "c": pl.Float64},
    )
    by_polars = frame.filter(to_polars(tree))["id"].to_list()
    flags = frame.select(to_polars(tree).alias("f"))["f"]
    assert flags.null_count() == 0  # true or false for every respondent, never null
    _CON.register("t", frame)
    try:
        by_duckdb = sorted(r[0] for r in _CON.table("t").filter(to_duckdb(tree)).select("id").fetchall())
    finally:
        _CON.unregister("t")
    assert by_polars == by_duckdb, show(tree)


def test_missing_answers_fail_every_comparison_and_membership() -> None:
    frame = pl.DataFrame({"a": [None, 1, 3]}, schema={"a": pl.Int64})
    picked = {
        text: frame.select(to_polars(parse(text).tree).alias("f"))["f"].to_list()
        for text in ("a != 1", "a not in [1]", "not a == 1", "a is missing")
    }
    assert picked == {
        "a != 1": [False, False, True],
        "a not in [1]": [False, False, True],
        "not a == 1": [True, False, True],
        "a is missing": [True, False, False],
    }


def test_a_text_literal_may_hold_the_other_quote() -> None:
    """A text literal may hold the other quote character; the tree keeps it verbatim."""
    assert parse("b == \"it's\"").tree == Compare("b", "==", "it's", 0, 5)
