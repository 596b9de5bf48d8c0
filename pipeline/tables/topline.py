"""Unweighted toplines: counts, percentages and summary statistics per wave, from `responses`.

Every respondent-level pass happens in DuckDB as one grouped query per variable type
(`sql/topline_codes.sql` for single-choice and rating codes, `sql/topline_values.sql` for numeric
and rating statistics, `sql/topline_multi.sql` for multiple-response sets). Python then assembles
the small aggregated results into one tidy long frame, the shape every later stage extends
(weighted estimates add columns such as estimate, se, ci_low, ci_high, deff, n_eff to the same
rows).

The long frame has one row per (wave, variable, row) with the columns of `CELL_SCHEMA`:

  wave        wave id
  variable    variable name (for a multiple-response set, the set's name)
  row_kind    "base" | "category" | "excluded" | "net" | "balance" | "item" | "statistic" | "missing"
              | "not-asked"
  row_order   position of the row in the variable's table (same for every wave)
  row_label   the label shown in the book
  code        category code as text; item column for items; statistic name ("n", "mean",
              "median", "min", "max") for statistics; null for base, net and missing rows
  count       respondents in the row (null for statistics)
  base        respondents the row's percentage is computed on
  percent     100 * count / base (null for base and statistic rows, and when base is 0)
  value       the statistic's value (statistic rows), or a balance score in points (percentage
              with a plus code minus percentage with a minus code, on the base)
  note        a short explanation shown under the table (e.g. codes excluded from a mean)

Bases. "base" rows count respondents with a valid answer: a code for single and rating
variables (codes excluded from the statistics still count: they are shown in the distribution), a
number for numeric variables, at least one answered item for a multiple-response set (the
respondents asked). "missing" rows count the wave's other respondents and take the wave's
respondent count as their base, so that nothing is silently dropped.

Routing (`asked_if`, `waves`; pipeline.staging.routing). The toplines read `responses` through
the routed view, where the answers of respondents not asked are masked. A variable with an
`asked_if` gets a "not-asked" row (count: respondents not asked, base: the wave's respondents);
its "missing" row then counts the respondents asked who gave no answer, on the base of those
asked. A wave that did not ask a variable (or a multi item) has no rows for it.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import duckdb
import polars as pl

from pipeline.sqlfiles import sql
from pipeline.staging.database import column_types, table_columns
from pipeline.staging.routing import asked_column, flagged, routed_relation
from pipeline.staging.spec import ANY_ITEM_LABEL, Code, Study, Variable

CELL_SCHEMA: dict[str, pl.DataType] = {
    "wave": pl.String(),
    "variable": pl.String(),
    "row_kind": pl.String(),
    "row_order": pl.Int32(),
    "row_label": pl.String(),
    "code": pl.String(),
    "count": pl.Int64(),
    "base": pl.Int64(),
    "percent": pl.Float64(),
    "value": pl.Float64(),
    "note": pl.String(),
}

ROW_KINDS = ("base", "category", "excluded", "net", "balance", "item", "statistic", "missing", "not-asked")
STATISTICS = {"n": "Number of answers", "mean": "Mean", "median": "Median", "min": "Minimum", "max": "Maximum"}
BASE_LABELS = {"asked": "Base: all asked", "answered": "Base: all giving an answer"}
MISSING_LABEL = {"multi": "Not asked", "default": "No answer"}
NOT_ASKED_LABEL = "Not asked"
ROUTED_VIEW = "__wavebook_routed"
ANY_LABEL = ANY_ITEM_LABEL


@dataclass(frozen=True)
class _Row:
    """One row of a variable's table before it is filled per wave."""

    kind: str
    label: str
    code: str | None = None
    members: tuple[str, ...] = ()  # codes summed by a net
    note: str | None = None


def unweighted_toplines(con: duckdb.DuckDBPyConnection, study: Study) -> pl.DataFrame:
    """Unweighted toplines of every codebook variable in every staged wave of `study`.

    For a category or net c of a variable in wave t:
        count = #{respondents i of wave t whose answer is in c},
        base = #{respondents of wave t with a valid answer},  percent = 100 * count / base.
    For a multiple-response item j: count = #{i asked: y_ij = 1}, base = #{i with y_ij answered}.
    Statistics of numeric and rating variables (after removing `exclude_from_statistics` codes):
    n, mean = sum(y) / n, median (midpoint of the two middle values for even n: the sample
    median, Hyndman & Fan 1996 type 7 at p = 0.5), minimum, maximum.

    Reads `responses` (and only the study's declared waves); returns a frame with `CELL_SCHEMA`,
    rows ordered by wave (spec order), variable (spec order) and row_order.
    """
    wave_ids = [w.id for w in study.waves]
    sizes = dict(con.execute(sql("topline_wave_sizes.sql"), {"waves": wave_ids}).fetchall())
    staged = [w for w in wave_ids if w in sizes]
    variables = list(study.variables.values())
    existing = table_columns(con, "responses")
    con.register(ROUTED_VIEW, routed_relation(con, study, wave_ids, [c for c in column_types(study) if c in existing]))
    try:
        code_counts = _code_counts(con, wave_ids, [v for v in variables if v.type in ("single", "rating")])
        statistics = _statistics(con, wave_ids, [v for v in variables if v.type in ("numeric", "rating")])
        multi_counts = _multi_counts(con, wave_ids, [v for v in variables if v.type == "multi"])
        asked = _asked_counts(con, wave_ids, [asked_column(name) for v in variables for name in flagged(v)])
    finally:
        con.unregister(ROUTED_VIEW)

    frames = []
    for variable in variables:
        waves = [w for w in staged if variable.asked_in(w)]
        asked_n = {w: asked.get((w, asked_column(variable.name)), sizes[w]) for w in waves}
        if variable.type == "multi":
            frames.append(_multi_rows(variable, waves, sizes, asked_n, multi_counts))
        else:
            frames.append(_coded_rows(variable, waves, sizes, asked_n, code_counts, statistics))
    if not frames:
        return pl.DataFrame(schema=CELL_SCHEMA)
    cells = pl.concat(frames, how="vertical")
    wave_rank = {w: i for i, w in enumerate(wave_ids)}
    variable_rank = {name: i for i, name in enumerate(study.variables)}
    return cells.sort(
        pl.col("wave").replace_strict(wave_rank, return_dtype=pl.Int32),
        pl.col("variable").replace_strict(variable_rank, return_dtype=pl.Int32),
        "row_order",
    )


def _code_counts(
    con: duckdb.DuckDBPyConnection, wave_ids: list[str], variables: list[Variable]
) -> dict[tuple[str, str], dict[str, int]]:
    """(wave, variable) -> {code as text: respondents} from one grouped query."""
    if not variables:
        return {}
    query = sql("topline_codes.sql", columns=[v.name for v in variables], source=ROUTED_VIEW)
    rows = con.execute(query, {"waves": wave_ids}).fetchall()
    counts: dict[tuple[str, str], dict[str, int]] = {}
    for wave, variable, code, count in rows:
        counts.setdefault((wave, variable), {})[code] = count
    return counts


def _statistics(
    con: duckdb.DuckDBPyConnection, wave_ids: list[str], variables: list[Variable]
) -> dict[tuple[str, str], dict[str, float]]:
    """(wave, variable) -> {"answered", "n", "mean", "median", "min", "max"} from one grouped query."""
    if not variables:
        return {}
    excluded = [(v.name, float(code)) for v in variables for code in v.unscored]
    params = {
        "waves": wave_ids,
        "excluded_variable": [name for name, _ in excluded],
        "excluded_value": [value for _, value in excluded],
    }
    result = con.execute(sql("topline_values.sql", columns=[v.name for v in variables], source=ROUTED_VIEW), params)
    names = [d[0] for d in result.description]
    return {(row[0], row[1]): dict(zip(names[2:], row[2:], strict=True)) for row in result.fetchall()}


def _multi_counts(
    con: duckdb.DuckDBPyConnection, wave_ids: list[str], variables: list[Variable]
) -> dict[tuple[str, str, str], tuple[int, int]]:
    """(level, wave, item or set name) -> (answered, selected) from one grouped query."""
    if not variables:
        return {}
    sets = [{"name": v.name, "items": list(v.items)} for v in variables]
    sets += [{"name": net_set(v.name, label), "items": list(items)} for v in variables for label, items in v.nets.items()]
    items = [column for v in variables for column in v.items]
    query = sql("topline_multi.sql", items=items, sets=sets, source=ROUTED_VIEW)
    rows = con.execute(query, {"waves": wave_ids}).fetchall()
    return {(level, wave, name): (answered, selected or 0) for level, wave, name, answered, selected in rows}


def net_set(variable: str, label: str) -> str:
    """The name under which the multi-response query counts a net of items."""
    return f"{variable}::net::{label}"


def _asked_counts(con: duckdb.DuckDBPyConnection, wave_ids: list[str], flags: list[str]) -> dict[tuple[str, str], int]:
    """(wave, asked-flag column) -> respondents asked, from one grouped query over the routed view."""
    if not flags:
        return {}
    rows = con.execute(sql("topline_asked.sql", flags=flags, source=ROUTED_VIEW), {"waves": wave_ids}).fetchall()
    return {(wave, flag): asked for wave, flag, asked in rows}


def _code_text(code: Code) -> str:
    """A code as the text DuckDB gives for CAST(code AS VARCHAR)."""
    return str(code)


def _category_rows(variable: Variable, seen_codes: Iterable[str]) -> list[_Row]:
    """Categories of a single-choice or rating variable, in table order.

    Single: the codebook's codes in spec order. Scale: every integer from the lowest to the
    highest labelled code not excluded from the statistics (unlabelled codes are labelled by their
    number), then the other labelled codes (e.g. "don't know"). Codes found in the data but not
    in the codebook are appended, labelled as such, so that no answer is dropped.
    """
    labels = {_code_text(code): label for code, label in variable.values.items()}
    scored = [c for c in variable.values if c not in variable.unscored]
    if variable.type == "rating" and scored and all(isinstance(c, int) for c in scored):
        order = [str(c) for c in range(min(scored), max(scored) + 1)]
        order += [code for code in labels if code not in order]
    else:
        order = list(labels)
    rows = [_Row("category", labels.get(code, code), code) for code in order]
    known = set(order)
    rows += [
        _Row("category", f"Code {code} (not in the codebook)", code) for code in sorted(set(seen_codes) - known)
    ]
    return rows


def _coded_rows(
    variable: Variable,
    waves: list[str],
    sizes: dict[str, int],
    asked: dict[str, int],
    code_counts: dict[tuple[str, str], dict[str, int]],
    statistics: dict[tuple[str, str], dict[str, float]],
) -> pl.DataFrame:
    """The rows of a single-choice, rating or numeric variable for every wave that asked it."""
    coded = variable.type in ("single", "rating")
    outside = {_code_text(c) for c in variable.exclude_from_base}
    layout: list[_Row] = [_Row("base", base_label(variable))]
    if coded:
        seen = {code for w in waves for code in code_counts.get((w, variable.name), {})}
        categories = _category_rows(variable, seen)
        layout += [row for row in categories if row.code not in outside]
        layout += [_Row("excluded", row.label, row.code) for row in categories if row.code in outside]
        layout += [
            _Row("net", label, members=tuple(_code_text(c) for c in codes)) for label, codes in variable.nets.items()
        ]
        layout += [_Row("balance", label, note=_balance_note(variable, label)) for label in variable.balance]
    if variable.type in ("numeric", "rating"):
        note = _exclusion_note(variable)
        layout += [_Row("statistic", label, code=key, note=note) for key, label in STATISTICS.items()]
    layout.append(_Row("missing", MISSING_LABEL["default"]))
    if variable.asked_if is not None:
        layout.append(_Row("not-asked", NOT_ASKED_LABEL))

    records = []
    for wave in waves:
        counts = code_counts.get((wave, variable.name), {})
        stats = statistics.get((wave, variable.name), {})
        answered = sum(counts.values()) if coded else int(stats.get("answered") or 0)
        in_base = answered - sum(counts.get(code, 0) for code in outside)
        for order, row in enumerate(layout):
            if row.kind == "base":
                records.append(_record(wave, variable, order, row, count=in_base, base=in_base))
            elif row.kind == "category":
                records.append(_record(wave, variable, order, row, count=counts.get(row.code, 0), base=in_base))
            elif row.kind == "excluded":
                records.append(_record(wave, variable, order, row, count=counts.get(row.code, 0), base=asked[wave]))
            elif row.kind == "net":
                count = sum(counts.get(code, 0) for code in set(row.members))
                records.append(_record(wave, variable, order, row, count=count, base=in_base))
            elif row.kind == "balance":
                plus, minus = ({_code_text(c) for c in side} for side in variable.balance[row.label])
                difference = sum(counts.get(c, 0) for c in plus) - sum(counts.get(c, 0) for c in minus)
                value = 100.0 * difference / in_base if in_base else None
                records.append(_record(wave, variable, order, row, base=in_base, value=value))
            elif row.kind == "statistic":
                n = int(stats.get("n") or 0)
                value = float(n) if row.code == "n" else stats.get(row.code)
                records.append(_record(wave, variable, order, row, base=n, value=value))
            elif row.kind == "missing":
                records.append(_record(wave, variable, order, row, count=asked[wave] - answered, base=asked[wave]))
            else:
                records.append(_record(wave, variable, order, row, count=sizes[wave] - asked[wave], base=sizes[wave]))
    return pl.DataFrame(records, schema=CELL_SCHEMA, orient="row")


def _multi_rows(
    variable: Variable,
    waves: list[str],
    sizes: dict[str, int],
    asked_n: dict[str, int],
    multi_counts: dict[tuple[str, str, str], tuple[int, int]],
) -> pl.DataFrame:
    """The rows of a multiple-response set for every wave that asked it: base, items (those the
    wave asked), "any" net, then "not asked" (no item answered), or with an `asked_if` "no answer"
    (asked, no item answered) and "not asked" (outside the filter)."""
    note = "Percentages of respondents asked; respondents could choose more than one, so items add to more than 100%."
    layout = [_Row("base", base_label(variable), note=note)]
    layout += [_Row("item", label, code=column) for column, label in variable.items.items()]
    layout += [_Row("net", label, members=tuple(items)) for label, items in variable.nets.items()]
    layout += [_Row("net", ANY_LABEL)]
    if variable.asked_if is not None:
        layout += [_Row("missing", MISSING_LABEL["default"]), _Row("not-asked", NOT_ASKED_LABEL)]
    else:
        layout += [_Row("missing", MISSING_LABEL["multi"])]
    records = []
    for wave in waves:
        asked, any_selected = multi_counts.get(("set", wave, variable.name), (0, 0))
        for order, row in enumerate(layout):
            if row.kind == "base":
                records.append(_record(wave, variable, order, row, count=asked, base=asked))
            elif row.kind == "item":
                if not variable.asked_in(wave, row.code):
                    continue
                answered, selected = multi_counts.get(("item", wave, row.code), (0, 0))
                records.append(_record(wave, variable, order, row, count=selected, base=answered))
            elif row.kind == "net" and row.members:
                _, selected = multi_counts.get(("set", wave, net_set(variable.name, row.label)), (0, 0))
                records.append(_record(wave, variable, order, row, count=selected, base=asked))
            elif row.kind == "net":
                records.append(_record(wave, variable, order, row, count=any_selected, base=asked))
            elif row.kind == "missing":
                records.append(_record(wave, variable, order, row, count=asked_n[wave] - asked, base=asked_n[wave]))
            else:
                records.append(_record(wave, variable, order, row, count=sizes[wave] - asked_n[wave], base=sizes[wave]))
    return pl.DataFrame(records, schema=CELL_SCHEMA, orient="row")


def _balance_note(variable: Variable, label: str) -> str:
    """How a balance score is formed, shown under the table."""
    plus, minus = variable.balance[label]
    return (f"{label}: the percentage answering {', '.join(map(str, plus))} minus the percentage answering "
            f"{', '.join(map(str, minus))}, in points.")


def base_label(variable: Variable) -> str:
    """Which base the percentages use: all asked (a multi set: anyone answering an item), all giving
    an answer, or all giving an answer excluding the `exclude_from_base` codes (named by label)."""
    if variable.type == "multi":
        return BASE_LABELS["asked"]
    if not variable.exclude_from_base:
        return BASE_LABELS["answered"]
    labels = [str(variable.values.get(code, code)) for code in variable.exclude_from_base]
    return "Base: excluding " + ", ".join(label[:1].lower() + label[1:] for label in labels)


def _exclusion_note(variable: Variable) -> str | None:
    """The note saying which codes a rating's statistics leave out, or None."""
    if not variable.unscored:
        return None
    labels = {_code_text(code): label for code, label in variable.values.items()}
    parts = [f"{code} ({labels[_code_text(code)]})" if _code_text(code) in labels else str(code)
             for code in variable.unscored]
    return "Statistics exclude code " + ", ".join(parts) + "."


def _record(
    wave: str,
    variable: Variable,
    order: int,
    row: _Row,
    *,
    count: int | None = None,
    base: int | None = None,
    value: float | None = None,
) -> tuple:
    """One output row in `CELL_SCHEMA` order; percent = 100 * count / base for counted rows."""
    percent = None
    if row.kind in ("category", "excluded", "net", "item", "missing", "not-asked") and base:
        percent = 100.0 * count / base
    return (wave, variable.name, row.kind, order, row.label, row.code, count, base, percent, value, row.note)
