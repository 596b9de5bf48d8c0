"""Conditions over codebook variables: wavebook's own small expression language.

Used by `asked_if` (who was asked a question) and by the `when` conditions of derived variables.
A condition is tokenized and parsed here into a tree; it is never passed to `eval` and never
spliced into SQL text. The tree is bound to the codebook (names checked, literals converted to
the column's type) and compiled to a polars expression (`to_polars`) or a DuckDB expression of
the relational API (`to_duckdb`, constants as constant expressions, never SQL text).

Grammar (lowest precedence first; keywords are lower case):

    condition  := disjunct ("or" disjunct)*
    disjunct   := conjunct ("and" conjunct)*
    conjunct   := "not" conjunct | "(" condition ")" | test
    test       := NAME ("==" | "!=" | "<" | "<=" | ">" | ">=") literal
                | NAME ["not"] "in" "[" literal ("," literal)* "]"
                | NAME "is" ["not"] "missing"
    literal    := INTEGER | DECIMAL | "text" | 'text'

Missing answers: a comparison or an `in` / `not in` test is false for a respondent whose answer is
missing (only `is missing` is true for them), so every compiled condition is true or false for
every respondent, never null, in polars and in DuckDB alike; `not` then simply negates.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal

if TYPE_CHECKING:
    import duckdb
    import polars as pl

Value = int | float | str
Kind = Literal["int", "text", "number"]
_COMPARISONS = ("==", "!=", "<=", ">=", "<", ">")
_KEYWORDS = frozenset({"and", "or", "not", "in", "is", "missing"})
_TOKEN = re.compile(
    r"""(?P<space>\s+)
      | (?P<number>-?[0-9]+(?:\.[0-9]+)?)
      | (?P<name>[A-Za-z_][A-Za-z0-9_]*)
      | (?P<text>"[^"]*"|'[^']*')
      | (?P<op>==|!=|<=|>=|<|>|\(|\)|\[|\]|,)""",
    re.VERBOSE,
)
NAME_PATTERN = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


class ConditionError(ValueError):
    """A condition that cannot be parsed or bound: the message, the text and the offending position."""

    def __init__(self, message: str, text: str, position: int) -> None:
        super().__init__(message)
        self.message = message
        self.text = text
        self.position = position

    def render(self) -> str:
        """The message, then the condition with a caret under the offending token."""
        return f"{self.message}\n    {self.text}\n    {' ' * self.position}^"


@dataclass(frozen=True)
class Token:
    kind: str  # "number", "name", "keyword", "text", "op", "end"
    text: str
    position: int


@dataclass(frozen=True)
class Compare:
    """`name op value`."""

    name: str
    op: str
    value: Value
    position: int  # of the name
    value_position: int


@dataclass(frozen=True)
class Member:
    """`name in [values]` (negated: `name not in [values]`)."""

    name: str
    values: tuple[Value, ...]
    negated: bool
    position: int
    value_positions: tuple[int, ...]


@dataclass(frozen=True)
class IsMissing:
    """`name is missing` (negated: `name is not missing`)."""

    name: str
    negated: bool
    position: int


@dataclass(frozen=True)
class Not:
    operand: Node


@dataclass(frozen=True)
class AllOf:
    """Conjunction of two or more conditions."""

    operands: tuple[Node, ...]


@dataclass(frozen=True)
class AnyOf:
    """Disjunction of two or more conditions."""

    operands: tuple[Node, ...]


Node = Compare | Member | IsMissing | Not | AllOf | AnyOf


@dataclass(frozen=True)
class Condition:
    """A parsed condition: its text and its tree."""

    text: str
    tree: Node

    @property
    def names(self) -> tuple[str, ...]:
        """The variables the condition reads, in order of appearance."""
        return tuple(dict.fromkeys(_names(self.tree)))


def tokenize(text: str) -> list[Token]:
    """The tokens of `text`, ending with an "end" token; ConditionError at the first bad character."""
    tokens: list[Token] = []
    position = 0
    while position < len(text):
        match = _TOKEN.match(text, position)
        if match is None:
            char = text[position]
            if char in "\"'":
                raise ConditionError("text is not closed: add the closing quote", text, position)
            if char == "=":
                raise ConditionError("use == to compare", text, position)
            if char == "!":
                raise ConditionError("use != for 'not equal'", text, position)
            raise ConditionError(f"unexpected character {char!r}", text, position)
        kind = match.lastgroup or ""
        word = match.group()
        if kind == "name" and word in _KEYWORDS:
            kind = "keyword"
        if kind != "space":
            tokens.append(Token(kind, word, position))
        position = match.end()
    tokens.append(Token("end", "", len(text)))
    return tokens


def parse(text: str) -> Condition:
    """Parse `text` into a Condition (ConditionError with the position of the offending token)."""
    if not text.strip():
        raise ConditionError("the condition is empty", text, 0)
    parser = _Parser(text, tokenize(text))
    tree = parser.condition()
    token = parser.peek()
    if token.kind != "end":
        raise ConditionError(f"unexpected {_shown(token)}: expected 'and', 'or' or the end", text, token.position)
    return Condition(text, tree)


class _Parser:
    """Recursive descent over the token list (one method per grammar rule of the module docstring)."""

    def __init__(self, text: str, tokens: list[Token]) -> None:
        self.text = text
        self.tokens = tokens
        self.index = 0

    def peek(self) -> Token:
        return self.tokens[self.index]

    def take(self) -> Token:
        token = self.tokens[self.index]
        self.index += 1
        return token

    def fail(self, token: Token, expected: str) -> ConditionError:
        return ConditionError(f"unexpected {_shown(token)}: expected {expected}", self.text, token.position)

    def is_keyword(self, word: str) -> bool:
        token = self.peek()
        return token.kind == "keyword" and token.text == word

    def condition(self) -> Node:
        operands = [self.disjunct()]
        while self.is_keyword("or"):
            self.take()
            operands.append(self.disjunct())
        return operands[0] if len(operands) == 1 else AnyOf(tuple(operands))

    def disjunct(self) -> Node:
        operands = [self.conjunct()]
        while self.is_keyword("and"):
            self.take()
            operands.append(self.conjunct())
        return operands[0] if len(operands) == 1 else AllOf(tuple(operands))

    def conjunct(self) -> Node:
        token = self.peek()
        if self.is_keyword("not"):
            self.take()
            return Not(self.conjunct())
        if token.kind == "op" and token.text == "(":
            self.take()
            inner = self.condition()
            closing = self.peek()
            if not (closing.kind == "op" and closing.text == ")"):
                raise self.fail(closing, "')'")
            self.take()
            return inner
        if token.kind == "name":
            return self.test()
        raise self.fail(token, "a variable name, 'not' or '('")

    def test(self) -> Node:
        name = self.take()
        token = self.peek()
        if token.kind == "op" and token.text in _COMPARISONS:
            self.take()
            value, position = self.literal()
            return Compare(name.text, token.text, value, name.position, position)
        negated = False
        if self.is_keyword("not"):
            self.take()
            negated = True
            if not self.is_keyword("in"):
                raise self.fail(self.peek(), "'in' after 'not'")
        if self.is_keyword("in"):
            self.take()
            values, positions = self.literal_list()
            return Member(name.text, values, negated, name.position, positions)
        if self.is_keyword("is"):
            self.take()
            if self.is_keyword("not"):
                self.take()
                negated = True
            if not self.is_keyword("missing"):
                raise self.fail(self.peek(), "'missing'")
            self.take()
            return IsMissing(name.text, negated, name.position)
        raise self.fail(token, "a comparison (== != < <= > >=), 'in', 'not in' or 'is missing'")

    def literal(self) -> tuple[Value, int]:
        token = self.take()
        if token.kind == "number":
            return (float(token.text) if "." in token.text else int(token.text)), token.position
        if token.kind == "text":
            return token.text[1:-1], token.position
        raise self.fail(token, "a number or a quoted text")

    def literal_list(self) -> tuple[tuple[Value, ...], tuple[int, ...]]:
        opening = self.take()
        if not (opening.kind == "op" and opening.text == "["):
            raise self.fail(opening, "'[' starting a list of values")
        values: list[Value] = []
        positions: list[int] = []
        while True:
            value, position = self.literal()
            values.append(value)
            positions.append(position)
            token = self.take()
            if token.kind == "op" and token.text == "]":
                return tuple(values), tuple(positions)
            if not (token.kind == "op" and token.text == ","):
                raise self.fail(token, "',' or ']'")


def _shown(token: Token) -> str:
    return "end of the condition" if token.kind == "end" else f"'{token.text}'"


def name_positions(node: Node) -> list[tuple[str, int]]:
    """(variable name, position in the text) of every test of the tree, in order."""
    if isinstance(node, (Compare, Member, IsMissing)):
        return [(node.name, node.position)]
    if isinstance(node, Not):
        return name_positions(node.operand)
    return [pair for operand in node.operands for pair in name_positions(operand)]


def _names(node: Node) -> list[str]:
    return [name for name, _ in name_positions(node)]


# ---------------------------------------------------------------------------------------------
# Binding to the codebook
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ColumnInfo:
    """What a condition may do with one variable: its kind and, for coded variables, its codes.

    kind "int": integer codes (single-choice, rating, a multi-response item's 0/1);
    "text": text codes; "number": a numeric variable (any number, no code check).
    """

    kind: Kind
    codes: frozenset[Value] = frozenset()


def bind(condition: Condition, columns: Mapping[str, ColumnInfo]) -> Condition:
    """The condition with names checked and literals converted to each column's type.

    ConditionError (with the position of the offending name or literal) for an unknown variable,
    a text literal compared with a number, an ordering comparison of text codes, or a code the
    codebook does not declare.
    """
    return Condition(condition.text, _bind(condition.tree, columns, condition.text))


def _bind(node: Node, columns: Mapping[str, ColumnInfo], text: str) -> Node:
    if isinstance(node, Not):
        return Not(_bind(node.operand, columns, text))
    if isinstance(node, AllOf):
        return AllOf(tuple(_bind(n, columns, text) for n in node.operands))
    if isinstance(node, AnyOf):
        return AnyOf(tuple(_bind(n, columns, text) for n in node.operands))
    info = columns.get(node.name)
    if info is None:
        known = ", ".join(sorted(columns)[:12])
        raise ConditionError(f"'{node.name}' is not a codebook variable (known: {known})", text, node.position)
    if isinstance(node, IsMissing):
        return node
    if isinstance(node, Compare):
        if info.kind == "text" and node.op not in ("==", "!="):
            raise ConditionError(f"'{node.name}' has text codes: only == and != compare them", text, node.position)
        value = _typed(node.value, info, node.name, text, node.value_position)
        return Compare(node.name, node.op, value, node.position, node.value_position)
    values = tuple(
        _typed(v, info, node.name, text, p) for v, p in zip(node.values, node.value_positions, strict=True)
    )
    return Member(node.name, values, node.negated, node.position, node.value_positions)


def _typed(value: Value, info: ColumnInfo, name: str, text: str, position: int) -> Value:
    if info.kind == "text":
        if isinstance(value, float):
            raise ConditionError(f"'{name}' has text codes; {value} is not one of them", text, position)
        value = str(value)
    elif isinstance(value, str):
        raise ConditionError(f"'{name}' holds numbers: compare it with a number, not text", text, position)
    if info.kind != "number" and value not in info.codes:
        shown = ", ".join(str(c) for c in sorted(info.codes, key=str))
        raise ConditionError(f"{value!r} is not a code of '{name}' (codes: {shown})", text, position)
    return value


# ---------------------------------------------------------------------------------------------
# Showing and compiling a tree
# ---------------------------------------------------------------------------------------------


def show(node: Node) -> str:
    """A tree as a one-line prefix form, e.g. `(and (== a 1) (in b [1 2]))` (messages and tests)."""
    if isinstance(node, Compare):
        return f"({node.op} {node.name} {node.value!r})"
    if isinstance(node, Member):
        values = " ".join(repr(v) for v in node.values)
        return f"({'not-in' if node.negated else 'in'} {node.name} [{values}])"
    if isinstance(node, IsMissing):
        return f"({'is-not-missing' if node.negated else 'is-missing'} {node.name})"
    if isinstance(node, Not):
        return f"(not {show(node.operand)})"
    word = "and" if isinstance(node, AllOf) else "or"
    return f"({word} {' '.join(show(n) for n in node.operands)})"


def to_polars(node: Node, column: Callable[[str], pl.Expr] | None = None) -> pl.Expr:
    """The condition as a polars boolean expression, never null (module docstring)."""
    import polars as pl

    col = column or pl.col
    if isinstance(node, Compare):
        left, right = col(node.name), pl.lit(node.value)
        compared = {
            "==": left == right, "!=": left != right, "<": left < right,
            "<=": left <= right, ">": left > right, ">=": left >= right,
        }[node.op]
        return compared.fill_null(False)
    if isinstance(node, Member):
        inside = col(node.name).is_in(list(node.values))
        return (inside.not_() if node.negated else inside).fill_null(False)
    if isinstance(node, IsMissing):
        return col(node.name).is_not_null() if node.negated else col(node.name).is_null()
    if isinstance(node, Not):
        return to_polars(node.operand, col).not_()
    parts = [to_polars(n, col) for n in node.operands]
    return pl.all_horizontal(parts) if isinstance(node, AllOf) else pl.any_horizontal(parts)


def to_duckdb(node: Node, column: Callable[[str], duckdb.Expression] | None = None) -> duckdb.Expression:
    """The condition as a DuckDB relational-API boolean expression, never null (module docstring).

    Literals become constant expressions (values, not SQL text), so the condition cannot change
    the query's shape whatever its text.
    """
    import duckdb

    col = column or duckdb.ColumnExpression
    false = duckdb.ConstantExpression(False)
    if isinstance(node, Compare):
        left, right = col(node.name), duckdb.ConstantExpression(node.value)
        compared = {
            "==": left == right, "!=": left != right, "<": left < right,
            "<=": left <= right, ">": left > right, ">=": left >= right,
        }[node.op]
        return duckdb.CoalesceOperator(compared, false)
    if isinstance(node, Member):
        constants = [duckdb.ConstantExpression(v) for v in node.values]
        member = col(node.name).isnotin(*constants) if node.negated else col(node.name).isin(*constants)
        return duckdb.CoalesceOperator(member, false)
    if isinstance(node, IsMissing):
        return col(node.name).isnotnull() if node.negated else col(node.name).isnull()
    if isinstance(node, Not):
        return ~to_duckdb(node.operand, col)
    parts = [to_duckdb(n, col) for n in node.operands]
    combined = parts[0]
    for part in parts[1:]:
        combined = (combined & part) if isinstance(node, AllOf) else (combined | part)
    return combined
