"""Staging checks: every rule a raw wave file must pass, run in SQL, every problem collected.

Each rule is one query in `sql/check_*.sql` returning rows of (col, value, n, examples, detail);
this module turns them into `Problem`s with readable messages. Errors stop staging; warnings are
printed and recorded. The checks read one relation with the wave's columns under their spec
names: the raw temp table's wave view, or (staging a CSV file straight from the file) the wave's
rows just inserted into `responses`; the `wb_*` macros read text and typed columns alike.
Speed: the per-respondent work is a few passes. The row rules (missing and repeated ids,
missing design values, non-numbers, bounds, design weights) are counted for every column at
once by one screening pass (`check_screen.sql`), and a rule's own query, with its values,
counts and example ids, runs only where that count is not 0. The coded columns are counted once
per distinct value (`check_values.sql` -> wb_values); the code rules (codebook, 0/1 items,
integer codes) and the drift rules then work on that small table, and example ids are looked up
in one more pass (`check_examples.sql`) only when a rule found something.

Rules (severity): missing-column (error), extra-column (warning), empty-file (error),
missing-id, duplicate-id, code-outside-codebook, not-a-number, multi-not-binary,
out-of-bounds, missing-design-value, bad-design-weight, psu-in-several-strata,
stratum-without-population, population-too-small (errors), answered-not-asked (warning: an
answer from a respondent the variable's `asked_if` routes past it, a routing error in the data;
those answers are treated as not asked), derived-overlap (error: a respondent matching two `when`
conditions of a derived variable), and the drift rules against the earlier staged waves:
code-gone, code-new, share-shift (warnings).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, replace

import duckdb
import polars as pl

from pipeline.errors import Problem
from pipeline.sqlfiles import sql
from pipeline.staging.conditions import to_duckdb
from pipeline.staging.wave_columns import typed_raw
from pipeline.staging.database import table_columns
from pipeline.staging.replicate_columns import replicate_problems, wave_replicates
from pipeline.staging.spec import Study, Variable

# No design weight above this: more people than the world holds (about 8e9), so the value is a
# typing or unit error; it also keeps sums of squared weights finite (effective n, design effects).
LARGEST_WEIGHT = 1e12

# A category's unweighted share of the answers moving by more than this between the latest
# earlier wave and this one is reported (share-shift warning). 15 percentage points: common
# practice, no source; large enough that sampling noise at tracker sizes (n >= 300: SE of a
# share <= 2.9 points) almost never triggers it, small enough to catch a recoded question.
DRIFT_SHARE_THRESHOLD = 0.15
# A code that disappears (code-gone) or first appears (code-new) is reported only when its share
# of the answers was (is) at least 1%. The chance that a code chosen by a share p of the
# population is missed by all n respondents is (1 - p)^n: at p = 1% that is 0.7% for n = 500 and
# 3e-7 for n = 1,500, so the warning means a real change; rarer codes come and go by chance
# (threshold: common practice, no source; the probability is the binomial identity).
DRIFT_CODE_MIN_SHARE = 0.01
# At most this many problems per rule and column; the rest are summarised in one more problem.
MAX_PROBLEMS_PER_COLUMN = 10


@dataclass(frozen=True)
class _Columns:
    """The spec's columns that are present in the file, grouped by what the checks do with them."""

    codes: list[str]  # single and rating
    int_codes: list[str]
    items: list[str]
    numbers: list[str]  # numeric variables
    bounded: list[str]
    design: list[str]
    weights: list[str]  # base weight and selection probability

    @property
    def valued(self) -> list[str]:
        """The columns whose value frequencies feed the code rules and the drift rules."""
        return _unique([*self.codes, *self.items])


def expected_columns(study: Study, wave_id: str) -> dict[str, str]:
    """Every column (spec name) the spec requires in a wave's file -> where the spec declares it.

    Columns of variables (and multi items) the wave did not ask (`waves`) are not required.
    """
    out = {study.respondent_id: "respondent_id"}
    design = study.design
    for key in ("strata", "psu", "base_weight", "selection_probability"):
        column = getattr(design, key)
        if column is not None:
            out.setdefault(column, f"design.{key}")
    for variable in study.variables.values():
        for column in variable.wave_columns(wave_id):
            where = f"variables.{variable.name}" + (".items" if variable.type == "multi" else "")
            if wave_id in variable.column:
                where += f".column.{wave_id}"
            out.setdefault(column, where)
    for column in wave_replicates(study, wave_id):
        out.setdefault(column, "variance.replicate_columns")
    return out


def run_checks(
    con: duckdb.DuckDBPyConnection,
    study: Study,
    *,
    raw: str,
    file_columns: list[str],
    file: str,
    previous: list[str],
    wave: str,
    sources: dict[str, str] | None = None,
    ignored: tuple[str, ...] = (),
) -> list[Problem]:
    """Every problem of the raw table `raw` (read from `file`), errors and warnings together.

    `raw` holds the wave's columns under their spec names (pipeline.staging.wave_columns);
    sources: spec column -> its name in the file, for messages; ignored: file columns left out.
    previous: the earlier staged waves (spec order) the drift rules compare with, read from the
    `responses` table of `con`; empty to skip drift.
    """
    expected = expected_columns(study, wave)
    present = set(file_columns)
    named = sources or {}
    problems = [
        Problem(
            "missing-column",
            f"column '{named.get(column, column)}' (declared at {where}) is not in the file",
            file=file,
            column=named.get(column, column),
        )
        for column, where in expected.items()
        if column not in present
    ]
    derived = {v.name for v in study.variables.values() if v.derived}
    extra = [c for c in file_columns if c not in expected and c not in derived] + list(ignored)
    if extra:
        problems.append(
            Problem(
                "extra-column",
                f"{len(extra)} column{'s' if len(extra) != 1 else ''} in the file "
                f"{'are' if len(extra) != 1 else 'is'} not in the spec and will not be staged: {', '.join(extra)}",
                severity="warning",
                file=file,
            )
        )
    rows = con.execute(sql("check_row_count.sql", raw=raw)).fetchall()[0][0]
    if rows == 0:
        return [*problems, Problem("empty-file", "the file has no data rows", file=file, count=0)]
    if study.respondent_id not in present:
        return problems
    present &= set(expected)
    problems += replicate_problems(con, study, raw=raw, present=present, file=file, wave=wave)
    columns = _present_columns(study, present)
    _setup_tables(con, study, raw, columns)
    context = _Context(con, study, file, raw, columns)
    problems += context.rule_problems()
    problems += context.routing_problems(present)
    if previous:
        problems += context.drift_problems(previous)
    return problems


def _unique(columns: list[str]) -> list[str]:
    return list(dict.fromkeys(columns))


def _present_columns(study: Study, present: set[str]) -> _Columns:
    variables = list(study.variables.values())
    design = study.design
    return _Columns(
        codes=[v.name for v in variables if v.type in ("single", "rating") and v.name in present],
        int_codes=[v.name for v in variables if v.int_coded and v.name in present],
        items=[c for v in variables if v.type == "multi" for c in v.items if c in present],
        numbers=[v.name for v in variables if v.type == "numeric" and v.name in present],
        bounded=[
            v.name
            for v in variables
            if v.type == "numeric" and v.name in present and (v.minimum is not None or v.maximum is not None)
        ],
        design=[c for c in design.columns if c in present],
        weights=[c for c in (design.base_weight, design.selection_probability) if c is not None and c in present],
    )


def _setup_tables(con: duckdb.DuckDBPyConnection, study: Study, raw: str, columns: _Columns) -> None:
    """Temp tables the check queries join: column roles, valid codes, strata sizes, value counts."""
    design = study.design
    variables = {c: v for v in study.variables.values() for c in v.columns}
    names = columns.valued
    roles = pl.DataFrame(
        {
            "col": names,
            "int_coded": [c in columns.int_codes or c in columns.items for c in names],
            "is_item": [c in columns.items for c in names],
        },
        schema={"col": pl.String, "int_coded": pl.Boolean, "is_item": pl.Boolean},
    )
    allowed = [(c, str(code)) for c in columns.codes for code in variables[c].valid_codes]
    allowed += [(c, code) for c in columns.items for code in ("0", "1")]
    sizes = design.population or design.sampling_fraction
    frames = {
        "check_setup_columns.sql": roles,
        "check_setup_allowed.sql": pl.DataFrame(allowed, schema={"col": pl.String, "code": pl.String}, orient="row"),
        "check_setup_strata.sql": pl.DataFrame(
            {"code": [str(k) for k in sizes], "size": [float(v) for v in sizes.values()]},
            schema={"code": pl.String, "size": pl.Float64},
        ),
    }
    for name, frame in frames.items():
        _register_table(con, name, frame)
    if names:
        con.execute(sql("check_values.sql", raw=raw, columns=names), {"names": names})


def _register_table(con: duckdb.DuckDBPyConnection, name: str, frame: pl.DataFrame) -> None:
    """Run a `create temp table ... as select * from <frame>` file with `frame` registered."""
    con.register("__wavebook_frame", frame)
    try:
        con.execute(sql(name, frame="__wavebook_frame"))
    finally:
        con.unregister("__wavebook_frame")


Row = tuple[str, str | None, int, list, str | None]


@dataclass(frozen=True)
class _Rule:
    name: str
    severity: str
    describe: Callable[[Row], str]
    counts_rows: bool = True  # whether n counts rows (shown as "; n rows") or something else


class _Context:
    """One wave's checks: runs the rule queries and words their rows as Problems."""

    def __init__(self, con: duckdb.DuckDBPyConnection, study: Study, file: str, raw: str, columns: _Columns) -> None:
        self.con = con
        self.study = study
        self.file = file
        self.raw = raw
        self.columns = columns
        self.owner: dict[str, Variable] = {c: v for v in study.variables.values() for c in v.columns}

    def run(self, rule: _Rule, name: str, params: dict | None = None, **context: object) -> list[Problem]:
        """Run `sql/<name>` (identifiers in `context`, values in `params`) and word its rows.

        Queries over the value counts return a sixth column, the raw spellings of each bad value;
        their example ids are then looked up in one more query (only when there are problems).
        """
        rows = self.con.execute(sql(name, raw=self.raw, **context), params or {}).fetchall()
        if rows and len(rows[0]) == 6:
            rows = self.with_examples(rows)
        return _capped([self.problem(rule, row) for row in rows])

    def with_examples(self, rows: list[tuple]) -> list[Row]:
        """Fill the examples of value-count rows (col, value, n, [], detail, spellings)."""
        bad = [(key, row[0], val) for key, row in enumerate(rows) for val in row[5]]
        frame = pl.DataFrame(bad, schema={"key": pl.Int64, "col": pl.String, "val": pl.String}, orient="row")
        _register_table(self.con, "check_setup_bad.sql", frame)
        columns = _unique([row[0] for row in rows])
        found = dict(
            self.con.execute(
                sql("check_examples.sql", raw=self.raw, id=self.study.respondent_id, columns=columns),
                {"names": columns},
            ).fetchall()
        )
        return [
            (col, value, n, sorted(found.get(key, []))[:5], detail)
            for key, (col, value, n, _, detail, _) in enumerate(rows)
        ]

    def problem(self, rule: _Rule, row: Row) -> Problem:
        col, value, n, examples, _ = row
        return Problem(
            rule.name,
            rule.describe(row),
            severity=rule.severity,
            file=self.file,
            column=col,
            value=value,
            count=int(n) if rule.counts_rows else None,
            examples=tuple(str(e) for e in examples or ()),
        )

    def routing_problems(self, present: set[str]) -> list[Problem]:
        """answered-not-asked: respondents outside a variable's `asked_if` who answered it anyway.

        The condition is compiled to a DuckDB expression over the raw columns read through the
        typing macros (pipeline.staging.conditions.to_duckdb), never to SQL text.
        """
        import duckdb

        typed = typed_raw(self.study)
        problems: list[Problem] = []
        raw = self.con.table(self.raw)
        for variable in self.study.variables.values():
            condition = variable.asked_if
            columns = [c for c in variable.columns if c in present]
            if condition is None or not columns or not set(condition.names) <= present:
                continue
            answered = [~duckdb.FunctionExpression("wb_blank", duckdb.ColumnExpression(c)) for c in columns]
            any_answer = answered[0]
            for more in answered[1:]:
                any_answer = any_answer | more
            routed_past = raw.filter(~to_duckdb(condition.tree, typed) & any_answer)
            n, examples = self.count_and_examples(routed_past)
            if not n:
                continue
            problems.append(Problem(
                "answered-not-asked",
                f"{n} respondent{'s' if n != 1 else ''} answered '{variable.name}' although its asked_if "
                f"\"{condition.text}\" routes them past it (a routing error in the data); "
                "their answers are treated as not asked",
                severity="warning", file=self.file, column=variable.name, count=n, examples=tuple(examples),
            ))
        return problems + self.overlap_problems(present)

    def count_and_examples(self, rows: object) -> tuple[int, list[str]]:
        """How many raw rows a DuckDB relation holds, and the first five respondent ids among them."""
        import duckdb

        n = int(rows.aggregate([duckdb.FunctionExpression("count", duckdb.StarExpression())]).fetchall()[0][0])
        if not n:
            return 0, []
        ids = duckdb.FunctionExpression("wb_text", duckdb.ColumnExpression(self.study.respondent_id)).alias("id")
        return n, [str(r[0]) for r in rows.select(ids).order("id").limit(5).fetchall()]

    def overlap_problems(self, present: set[str]) -> list[Problem]:
        """derived-overlap: respondents matching two `when` conditions of one derived variable."""
        import duckdb

        typed = typed_raw(self.study)
        problems: list[Problem] = []
        raw = self.con.table(self.raw)
        one, zero = duckdb.ConstantExpression(1), duckdb.ConstantExpression(0)
        for variable in self.study.variables.values():
            if not variable.derived or not all(set(c.names) <= present for c in variable.when.values()):
                continue
            matches = [duckdb.CaseExpression(to_duckdb(c.tree, typed), one).otherwise(zero) for c in variable.when.values()]
            total = matches[0]
            for more in matches[1:]:
                total = total + more
            twice = raw.filter(total >= duckdb.ConstantExpression(2))
            n, examples = self.count_and_examples(twice)
            if not n:
                continue
            problems.append(Problem(
                "derived-overlap",
                f"{n} respondent{'s' if n != 1 else ''} match more than one `when` condition of derived.{variable.name}; "
                "make the conditions exclusive",
                file=self.file, column=variable.name, count=n, examples=tuple(examples),
            ))
        return problems

    def screen(self) -> dict[tuple[str, str], int]:
        """(rule, column) -> how many rows the rule's query would report, for every row rule and
        column, from one pass over the wave (`sql/check_screen.sql`)."""
        study, cols, design = self.study, self.columns, self.study.design
        id_col = study.respondent_id
        numbers = _unique([*cols.numbers, *cols.weights])
        bounds = [self.owner[c] for c in cols.bounded]
        keys = [("missing-id", id_col), ("duplicate-id", id_col)]
        keys += [("missing-design-value", c) for c in cols.design]
        keys += [("not-a-number", c) for c in numbers]
        keys += [("out-of-bounds", c) for c in cols.bounded]
        keys += [(rule, c) for c in cols.weights for rule in ("bad-design-weight", "weight-out-of-range")]
        params: dict[str, object] = {"largest": LARGEST_WEIGHT} if cols.weights else {}
        if bounds:
            params["minimum"] = [v.minimum if v.minimum is not None else -math.inf for v in bounds]
            params["maximum"] = [v.maximum if v.maximum is not None else math.inf for v in bounds]
        counts = self.con.execute(
            sql(
                "check_screen.sql",
                raw=self.raw,
                id=id_col,
                design=cols.design,
                numbers=numbers,
                bounded=cols.bounded,
                weights=[{"name": c, "probability": c == design.selection_probability} for c in cols.weights],
            ),
            params,
        ).fetchall()[0]
        return dict(zip(keys, counts, strict=True))

    def rule_problems(self) -> list[Problem]:
        """The error rules, each one query over all the columns it concerns; the row rules only
        where the screen (one pass for them all) found something."""
        study, cols, design = self.study, self.columns, self.study.design
        id_col = study.respondent_id
        screen = self.screen()

        def failing(rule: str, columns: list[str]) -> list[str]:
            return [c for c in columns if screen[(rule, c)]]

        found: list[Problem] = []
        if screen[("missing-id", id_col)]:
            found = self.run(
                _Rule("missing-id", "error", lambda r: f"{r[2]} rows have no respondent id; every row needs one"),
                "check_missing_id.sql",
                {"column": id_col},
                id=id_col,
            )
            found = [replace(p, examples=tuple(f"row {e}" for e in p.examples)) for p in found]
        if screen[("duplicate-id", id_col)]:
            found += self.run(
                _Rule(
                    "duplicate-id",
                    "error",
                    lambda r: (
                        "1 respondent id appears" if r[4] == "1" else f"{r[4]} respondent ids appear"
                    )
                    + " on more than one row (ids must be unique within a wave)",
                ),
                "check_duplicate_id.sql",
                {"column": id_col},
                id=id_col,
            )
        if cols.codes:
            found += self.run(
                _Rule(
                    "code-outside-codebook",
                    "error",
                    lambda r: f"code '{r[1]}' is not a code of {self.role(r[0])} (valid: {self.valid(r[0])}); "
                    f"add it to variables.{self.owner[r[0]].name}.values or fix the data",
                ),
                "check_codes.sql",
            )
        not_a_number = _Rule(
            "not-a-number", "error", lambda r: f"'{r[1]}' is not a number; {self.role(r[0])} holds numbers"
        )
        if cols.int_codes:
            found += self.run(not_a_number, "check_codes_not_numeric.sql")
        numbers = failing("not-a-number", _unique([*cols.numbers, *cols.weights]))
        if numbers:
            found += self.run(not_a_number, "check_not_numeric.sql", {"names": numbers}, id=id_col, columns=numbers)
        if cols.items:
            found += self.run(
                _Rule(
                    "multi-not-binary",
                    "error",
                    lambda r: f"'{r[1]}' in item '{r[0]}' of multi-response set '{self.owner[r[0]].name}': "
                    "items hold 1 (selected), 0 (not selected) or nothing (not asked)",
                ),
                "check_multi_binary.sql",
            )
        bounded = failing("out-of-bounds", cols.bounded)
        if bounded:
            bounds = [self.owner[c] for c in bounded]
            found += self.run(
                _Rule("out-of-bounds", "error", self.bounds_message),
                "check_bounds.sql",
                {
                    "names": bounded,
                    "minimum": [v.minimum if v.minimum is not None else -math.inf for v in bounds],
                    "maximum": [v.maximum if v.maximum is not None else math.inf for v in bounds],
                },
                id=id_col,
                columns=bounded,
            )
        missing = failing("missing-design-value", cols.design)
        if missing:
            found += self.run(
                _Rule(
                    "missing-design-value",
                    "error",
                    lambda r: f"{r[2]} rows have no {self.design_key(r[0])} value; every respondent needs one",
                ),
                "check_design_missing.sql",
                {"names": missing},
                id=id_col,
                columns=missing,
            )
        weights = failing("bad-design-weight", cols.weights)
        if weights:
            found += self.run(
                _Rule(
                    "bad-design-weight",
                    "error",
                    lambda r: (
                        "base weights must be positive"
                        if r[0] == design.base_weight
                        else "selection probabilities must be in (0, 1]"
                    )
                    + f" ({r[4]})",
                ),
                "check_weights.sql",
                {"names": weights},
                id=id_col,
                columns=[{"name": c, "probability": c == design.selection_probability} for c in weights],
            )
        found += self.weight_size_problems(failing("weight-out-of-range", cols.weights))
        found += self.strata_problems()
        return found

    def weight_size_problems(self, out_of_range: list[str]) -> list[Problem]:
        """Design weights (base weight or 1 / selection probability) too large to compute with
        (error weight-out-of-range, above LARGEST_WEIGHT or not finite; queried for the columns
        `out_of_range` only, where the screen found some) and those above
        `design.extreme_weight_ratio` times the median weight (warning extreme-weight, with ids)."""
        design, id_col = self.study.design, self.study.respondent_id
        found: list[Problem] = []
        for column in self.columns.weights:
            context = {"id": id_col, "column": column, "probability": column == design.selection_probability}
            params = {"column": column, "largest": LARGEST_WEIGHT}
            weight = "1 / the selection probability" if context["probability"] else "the base weight"
            found += [] if column not in out_of_range else self.run(
                _Rule(
                    "weight-out-of-range",
                    "error",
                    lambda r, weight=weight: f"{weight} is not a finite number at most {LARGEST_WEIGHT:g} ({r[4]}); "
                    "no person stands for that many others: fix the value",
                ),
                "check_weight_range.sql",
                params,
                **context,
            )
            found += self.run(
                _Rule(
                    "extreme-weight",
                    "warning",
                    lambda r, weight=weight: f"{weight} is over {design.extreme_weight_ratio:g} times the median "
                    f"weight ({r[4]}); one respondent would carry much of the total: check the value "
                    "(design.extreme_weight_ratio sets the ratio)",
                ),
                "check_weight_ratio.sql",
                {**params, "ratio": design.extreme_weight_ratio},
                **context,
            )
        return found

    def strata_problems(self) -> list[Problem]:
        """PSU ids across strata, and the strata's population sizes / sampling fractions."""
        design, id_col = self.study.design, self.study.respondent_id
        present = set(self.columns.design)
        found: list[Problem] = []
        if design.psu_ids == "unique" and design.psu in present and design.strata in present:
            found += self.run(
                _Rule(
                    "psu-in-several-strata",
                    "error",
                    lambda r: f"{r[4]} PSU id(s) appear in more than one stratum (e.g. PSU '{r[1]}') but "
                    'design.psu_ids = "unique"; set psu_ids = "within-stratum" if PSU ids restart within each stratum',
                ),
                "check_psu_unique.sql",
                {"column": design.psu},
                id=id_col,
                psu=design.psu,
                strata=design.strata,
            )
        sizes = design.population or design.sampling_fraction
        key = "design.population" if design.population else "design.sampling_fraction"
        int_keys = all(isinstance(k, int) for k in sizes)
        if sizes and design.strata in present:
            found += self.run(
                _Rule(
                    "stratum-without-population",
                    "error",
                    lambda r: f"stratum '{r[1]}' is in the data but has no entry in {key}; add one",
                ),
                "check_strata_population.sql",
                {"column": design.strata},
                id=id_col,
                strata=design.strata,
                int_keys=int_keys,
            )
        unit = design.psu if design.psu is not None else id_col
        if design.population and unit in present and (design.strata is None or design.strata in present):
            found += self.run(
                _Rule(
                    "population-too-small",
                    "error",
                    lambda r: f"{'stratum ' + repr(r[1]) if r[1] is not None else 'the sample'} has {r[2]} sampled "
                    f"{'PSUs' if design.psu else 'respondents'} but design.population gives {float(r[4]):g}",
                    counts_rows=False,
                ),
                "check_population_size.sql",
                {"column": design.strata or unit},
                strata=design.strata,
                unit=unit,
                int_keys=int_keys,
            )
        return found

    def drift_problems(self, previous: list[str]) -> list[Problem]:
        """Warnings where this wave's codes differ from the earlier staged waves (`previous`, spec order)."""
        staged = set(table_columns(self.con, "responses"))
        columns = [c for c in self.columns.valued if c in staged]
        if not columns:
            return []
        self.con.execute(sql("check_drift_current.sql"))
        self.con.execute(sql("check_drift_previous.sql", columns=columns), {"names": columns, "waves": previous})
        threshold = DRIFT_SHARE_THRESHOLD
        return [
            *self.run(
                _Rule(
                    "code-gone",
                    "warning",
                    lambda r: f"code '{r[1]}' was answered in earlier waves ({r[2]} row{'s' if r[2] != 1 else ''}, "
                    f"last in {r[4]}) but by nobody in this wave; check the questionnaire routing or the coding",
                    counts_rows=False,
                ),
                "check_drift_gone.sql",
                {"waves": previous, "min_share": DRIFT_CODE_MIN_SHARE},
            ),
            *self.run(
                _Rule(
                    "code-new",
                    "warning",
                    lambda r: f"code '{r[1]}' is answered for the first time in this wave (never in "
                    f"{', '.join(previous)})",
                ),
                "check_drift_new.sql",
                {"min_share": DRIFT_CODE_MIN_SHARE},
            ),
            *self.run(
                _Rule(
                    "share-shift",
                    "warning",
                    lambda r: f"the unweighted share of code '{r[1]}' moved by more than "
                    f"{100 * threshold:g} points: {r[4]}",
                    counts_rows=False,
                ),
                "check_drift_share.sql",
                {"last": previous[-1], "threshold": threshold},
            ),
        ]

    def bounds_message(self, row: Row) -> str:
        col, side, n, _, extreme = row
        variable = self.owner[col]
        bound = variable.minimum if side == "below" else variable.maximum
        word = "minimum" if side == "below" else "maximum"
        most = "lowest" if side == "below" else "highest"
        return f"{n} values {side} the declared {word} {bound:g} (variables.{variable.name}.{word}); {most} {extreme}"

    def valid(self, col: str) -> str:
        codes = [str(c) for c in self.owner[col].valid_codes]
        return ", ".join(codes[:12]) + (f", ... ({len(codes)} codes)" if len(codes) > 12 else "")

    def role(self, col: str) -> str:
        design = self.study.design
        if col in (design.base_weight, design.selection_probability):
            return self.design_key(col)
        variable = self.owner[col]
        return f"{variable.type} variable '{variable.name}'"

    def design_key(self, col: str) -> str:
        design = self.study.design
        for key in ("strata", "psu", "base_weight", "selection_probability"):
            if getattr(design, key) == col:
                return f"design.{key}"
        return col


def _capped(problems: list[Problem]) -> list[Problem]:
    """At most MAX_PROBLEMS_PER_COLUMN problems per (rule, column), the most frequent first,
    and one summary problem for the rest."""
    by_column: dict[tuple[str, str | None], list[Problem]] = {}
    for p in problems:
        by_column.setdefault((p.rule, p.column), []).append(p)
    out: list[Problem] = []
    for (rule, column), group in by_column.items():
        if len(group) <= MAX_PROBLEMS_PER_COLUMN:
            out += group
            continue
        group = sorted(group, key=lambda p: -(p.count or 0))
        kept, rest = group[:MAX_PROBLEMS_PER_COLUMN], group[MAX_PROBLEMS_PER_COLUMN:]
        out += kept
        out.append(
            Problem(
                rule,
                f"and {len(rest)} more distinct values breaking the same rule",
                severity=rest[0].severity,
                file=rest[0].file,
                column=column,
                count=sum(p.count or 0 for p in rest) if rest[0].count is not None else None,
                examples=tuple(e for p in rest for e in p.examples)[:5],
            )
        )
    return out
