"""Who was asked what: a variable's `waves` and `asked_if`, applied to staged responses.

A respondent is *asked* a variable when the wave asked it (`waves`, and for a multi-response
item the item's own `waves`) and the `asked_if` condition holds for them. The staged table keeps
the answers as given; reading it through this module adds, for every routed variable (and every
item with its own waves), a flag column `asked_column(name)`, and masks the answers of the
respondents not asked (a routing error in the data: `check` reports them), so that they are
out of every base of that variable.

The same rule exists twice, compiled from the same tree: `route_frame` (polars, for the
estimation stage's frames) and `routed_relation` (DuckDB relational API, for the toplines);
`tests/test_conditions.py` checks that both select the same respondents. Flags are computed from
the stored answers before any masking, in both.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from pipeline.staging.conditions import to_duckdb, to_polars

if TYPE_CHECKING:
    import duckdb
    import polars as pl

    from pipeline.staging.spec import Study, Variable

ASKED_PREFIX = "__asked__"


def asked_column(name: str) -> str:
    """The flag column saying who was asked variable (or multi item) `name`."""
    return f"{ASKED_PREFIX}{name}"


def flagged(variable: Variable) -> list[str]:
    """The names (variable, or multi items with their own waves) that get an asked flag."""
    names = [variable.name] if variable.asked_if is not None or variable.waves is not None else []
    return names + [item for item in variable.items if item in variable.item_waves]


def _waves_of(variable: Variable, name: str) -> list[tuple[str, ...]]:
    lists = [variable.waves] if variable.waves is not None else []
    if name != variable.name and name in variable.item_waves:
        lists.append(variable.item_waves[name])
    return lists


def asked_polars(variable: Variable, name: str | None = None) -> pl.Expr | None:
    """Polars flag: asked `variable` (or its item `name`); None when everyone was asked."""
    import polars as pl

    name = name or variable.name
    parts = [pl.col("wave").is_in(list(waves)) for waves in _waves_of(variable, name)]
    if variable.asked_if is not None:
        parts.append(to_polars(variable.asked_if.tree))
    return pl.all_horizontal(parts) if parts else None


def asked_duckdb(variable: Variable, name: str | None = None) -> duckdb.Expression | None:
    """DuckDB flag: asked `variable` (or its item `name`); None when everyone was asked."""
    import duckdb

    name = name or variable.name
    parts = [
        duckdb.ColumnExpression("wave").isin(*(duckdb.ConstantExpression(w) for w in waves))
        for waves in _waves_of(variable, name)
    ]
    if variable.asked_if is not None:
        parts.append(to_duckdb(variable.asked_if.tree))
    if not parts:
        return None
    combined = parts[0]
    for part in parts[1:]:
        combined = combined & part
    return combined


def _masks(variable: Variable) -> dict[str, str]:
    """Answer column -> the flag column that masks it."""
    if variable.type != "multi":
        return {variable.name: asked_column(variable.name)} if flagged(variable) else {}
    out = {}
    for item in variable.items:
        if item in variable.item_waves:
            out[item] = asked_column(item)
        elif variable.name in flagged(variable):
            out[item] = asked_column(variable.name)
    return out


def route_frame(frame: pl.DataFrame, study: Study) -> pl.DataFrame:
    """`frame` (staged rows with a `wave` column) with the asked flags added and unasked answers masked."""
    import polars as pl

    flags = [
        asked_polars(v, name).alias(asked_column(name))  # type: ignore[union-attr]
        for v in study.variables.values()
        for name in flagged(v)
    ]
    if not flags:
        return frame
    masks = {c: f for v in study.variables.values() for c, f in _masks(v).items() if c in frame.columns}
    return frame.with_columns(flags).with_columns(
        pl.when(pl.col(flag)).then(pl.col(column)).otherwise(None).alias(column) for column, flag in masks.items()
    )


def routed_relation(
    con: duckdb.DuckDBPyConnection, study: Study, wave_ids: list[str], columns: list[str]
) -> duckdb.DuckDBPyRelation:
    """`responses` of the waves, reading `columns`, with the asked flags and unasked answers masked."""
    import duckdb

    wave_filter = duckdb.ColumnExpression("wave").isin(*(duckdb.ConstantExpression(w) for w in wave_ids))
    masks = {c: f for v in study.variables.values() for c, f in _masks(v).items()}
    flags = {asked_column(name): asked_duckdb(v, name) for v in study.variables.values() for name in flagged(v)}
    null = duckdb.ConstantExpression(None)
    selected = [duckdb.ColumnExpression("wave"), duckdb.ColumnExpression("respondent_id")]
    for column in columns:
        if column in masks:
            flag = flags[masks[column]]
            selected.append(duckdb.CaseExpression(flag, duckdb.ColumnExpression(column)).otherwise(null).alias(column))
        else:
            selected.append(duckdb.ColumnExpression(column))
    selected += [expression.alias(name) for name, expression in flags.items()]
    return con.table("responses").filter(wave_filter).select(*selected)
