"""Which columns a wave's file holds, under which names and codes, and the wave view staging reads.

A questionnaire changes between waves: a variable may be asked in some waves only (`waves`, also
on multi items), be named differently in one wave's file (`column = { W1 = "q5_old" }`) or use
other codes there (`recode = { W1 = { 6 = 5 } }`). `wave_view` lays a view over the raw text
table of one wave with every column under its spec name and every code recoded, and with each
derived variable (`[derived.<name>]`) computed from its `when` conditions, so the checks, the
drift comparison and the insert all see the wave as the codebook describes it.

`wave_signature` is what the staged `waves` table records of the spec for a wave (its column
set with file names, types, codes and recodes); when it no longer matches the spec, `run`
restages the wave (pipeline.runner.waves_to_stage).
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable
from typing import TYPE_CHECKING

from pipeline.staging.conditions import to_duckdb
from pipeline.staging.replicate_columns import wave_replicates

if TYPE_CHECKING:
    import duckdb

    from pipeline.staging.spec import Study, Variable

WAVE_VIEW = "__wavebook_wave"


def wave_sources(study: Study, wave_id: str) -> dict[str, str]:
    """Spec column -> its name in the wave's file, for every codebook column the wave asked and every
    supplied replicate weight (`replicate_weight_<r>` -> the file's column, `replicate_columns`)."""
    out: dict[str, str] = {}
    for variable in study.variables.values():
        for column in variable.wave_columns(wave_id):
            out[column] = variable.column.get(wave_id, column) if variable.type != "multi" else column
    return {**out, **wave_replicates(study, wave_id)}


def typed_file_columns(study: Study, wave_id: str) -> dict[str, str]:
    """File column -> "code", "item" or "number" for the columns of a wave's file the spec reads as
    numbers (integer-coded single/rating, multi items, numeric variables, base weight, selection
    probability): pipeline.staging.readers reads them typed. Text codes, strata and PSU ids (unless
    a codebook variable types them), the respondent id and supplied replicate weights (whose
    checks report values and lines as written) stay text."""
    out: dict[str, str] = {}
    for variable in study.variables.values():
        for column in variable.wave_columns(wave_id):
            source = variable.column.get(wave_id, column) if variable.type != "multi" else column
            if variable.type == "multi":
                out[source] = "item"
            elif variable.type == "numeric":
                out[source] = "number"
            elif variable.int_coded:
                out[source] = "code"
    design = study.design
    for column in (design.base_weight, design.selection_probability):
        if column is not None and column not in study.variables and column != study.respondent_id:
            out.setdefault(column, "number")
    return out


def wave_recodes(study: Study, wave_id: str) -> dict[str, dict[str, str]]:
    """Spec column -> {code as text in the file: codebook code as text} for the wave."""
    return {
        variable.name: {str(old): str(new) for old, new in variable.recode[wave_id].items()}
        for variable in study.variables.values()
        if wave_id in variable.recode and variable.asked_in(wave_id)
    }


def wave_view(
    con: duckdb.DuckDBPyConnection, study: Study, wave_id: str, raw: str, file_columns: list[str]
) -> tuple[str, list[str], list[str]]:
    """Register WAVE_VIEW over the raw table: spec names, recoded codes (text, as in the file).

    Returns (view name, its columns, file columns left out because a renamed column of this wave
    or a derived variable takes their name; they are reported as extra columns). The view keeps the raw table's
    `rowid` (row numbers in messages). A wave with nothing renamed or recoded reads `raw` itself. Recodes compare the code as the
    integer-code macro reads it (`wb_code`: '6', '6.0', '06' and a typed 6.0 alike) or the trimmed
    text; a recoded column holds its codes as that text.
    """
    import duckdb

    sources = wave_sources(study, wave_id)
    renamed = {source: column for column, source in sources.items() if source != column}
    derived = [v for v in study.variables.values() if v.derived]
    shadowed = [c for c in file_columns if (c in sources and sources[c] != c and c not in renamed)
                or c in {v.name for v in derived}]
    recodes = wave_recodes(study, wave_id)
    if not renamed and not recodes and not derived:
        return raw, list(file_columns), []
    selected, columns = [duckdb.ColumnExpression("rowid").alias("rowid")], []
    for file_column in file_columns:
        if file_column in shadowed:
            continue
        column = renamed.get(file_column, file_column)
        value = duckdb.ColumnExpression(file_column)
        if column in recodes:
            macro = "wb_code" if study.variables[column].int_coded else "wb_text"
            code = duckdb.FunctionExpression(macro, duckdb.ColumnExpression(file_column))
            pairs = list(recodes[column].items())
            case = duckdb.CaseExpression(code == duckdb.ConstantExpression(pairs[0][0]), duckdb.ConstantExpression(pairs[0][1]))
            for old, new in pairs[1:]:
                case = case.when(code == duckdb.ConstantExpression(old), duckdb.ConstantExpression(new))
            value = case.otherwise(code)
        selected.append(value.alias(column))
        columns.append(column)
    relation = con.table(raw).select(*selected)
    computed = []
    for variable in derived:
        if all(set(c.names) <= set(columns) for c in variable.when.values()):
            computed.append(derived_code(study, variable).alias(variable.name))
            columns.append(variable.name)
    if computed:
        relation = relation.select(duckdb.StarExpression(), *computed)
    con.register(WAVE_VIEW, relation)
    return WAVE_VIEW, columns, shadowed


def typed_raw(study: Study) -> Callable[[str], duckdb.Expression]:
    """Column name -> its raw text read as the codebook types it (for conditions over raw text):
    text codes trimmed (`wb_text`), integer codes, 0/1 items and numbers as numbers (`wb_number`)."""
    import duckdb

    owners = {c: v for v in study.variables.values() for c in v.columns}

    def typed(column: str) -> duckdb.Expression:
        owner = owners[column]
        macro = "wb_text" if owner.type in ("single", "rating") and not owner.int_coded else "wb_number"
        return duckdb.FunctionExpression(macro, duckdb.ColumnExpression(column))

    return typed


def derived_code(study: Study, variable: Variable) -> duckdb.Expression:
    """A derived variable's code as text: the code of the first `when` condition that holds, else NULL."""
    import duckdb

    typed = typed_raw(study)
    pairs = list(variable.when.items())
    case = duckdb.CaseExpression(to_duckdb(pairs[0][1].tree, typed), duckdb.ConstantExpression(str(pairs[0][0])))
    for code, condition in pairs[1:]:
        case = case.when(to_duckdb(condition.tree, typed), duckdb.ConstantExpression(str(code)))
    return case.otherwise(duckdb.ConstantExpression(None))


def wave_signature(study: Study, wave_id: str, types: dict[str, str]) -> str:
    """A digest of what the spec says a wave's staged rows hold: columns (file name, type), codes, recodes."""
    sources = wave_sources(study, wave_id)
    codes = {
        name: [str(c) for c in v.valid_codes] for name, v in study.variables.items() if v.asked_in(wave_id)
    }
    content = {
        "respondent_id": study.respondent_id,
        "design": [c for c in study.design.columns],
        "columns": {c: [sources.get(c, c), types[c]] for c in types if c in sources or c in study.design.columns},
        "codes": codes,
        "recodes": wave_recodes(study, wave_id),
        "derived": {v.name: {str(c): w.text for c, w in v.when.items()} for v in study.variables.values() if v.derived},
    }
    replicates = wave_replicates(study, wave_id)
    if replicates:  # only then, so the signatures of studies without supplied replicates stay as they were
        content["replicates"] = replicates
    return hashlib.sha256(json.dumps(content, sort_keys=True).encode()).hexdigest()
