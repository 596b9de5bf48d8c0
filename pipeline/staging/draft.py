"""Draft a study spec from a data file (`wavebook init`): a starting point the user reviews.

Each column's values are profiled in one SQL pass (sql/draft_profile.sql) and the column is
drafted as: an item of a multi-response set (0/1 columns sharing a name prefix such as
aware_kestrel, aware_lumen), a single-choice variable (at most MAX_SINGLE_CODES distinct whole
numbers or short texts), or numeric (other numbers).
Free-text columns are listed in a closing comment and left out. The draft is valid for
`load_spec`; comments marked REVIEW say what a person must check.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import re
from collections import defaultdict
from dataclasses import dataclass
from pathlib import Path

import duckdb

from pipeline.errors import DataError, Problem
from pipeline.sqlfiles import sql
from pipeline.staging.readers import read_raw

MAX_SINGLE_CODES = 20  # a column with more distinct values is drafted as numeric (or left out if text)
_RAW = "__wavebook_draft"
_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")
_RESERVED = ("wave", "respondent_id")  # column names of the study database's responses table
_ID_NAMES = ("id", "resp_id", "respondent_id", "respid", "serial", "record")
_WEIGHT_NAME = re.compile(r"(^|_)(wt|weight|wgt)(_|$)|weight", re.IGNORECASE)
_PROBABILITY_NAME = re.compile(r"(^|_)(p|prob|pi)(_|$)|probab", re.IGNORECASE)


@dataclass(frozen=True)
class _Profile:
    n: int
    distinct: int
    non_numbers: int
    fractions: int
    lowest: float | None
    highest: float | None
    codes: tuple[str, ...] | None  # distinct values when few

    @property
    def binary(self) -> bool:
        return self.non_numbers == 0 and self.codes is not None and set(self.codes) <= {"0", "1"}

    @property
    def whole_numbers(self) -> bool:
        return self.non_numbers == 0 and self.fractions == 0


def toml_string(text: str) -> str:
    """A TOML basic string (JSON string escapes are valid TOML escapes)."""
    return json.dumps(str(text), ensure_ascii=False)


def toml_key(key: str) -> str:
    """A TOML key: bare when it may be, else quoted."""
    return key if _BARE_KEY.match(key) else toml_string(key)


def draft_spec(data_path: str | Path, *, spec_path: str | Path | None = None, id_column: str | None = None) -> str:
    """The text of a draft spec for the wave file `data_path`.

    spec_path: where the draft will be written (the wave file path is made relative to its
    folder; default: the current folder). id_column: the respondent id column (default: the
    first column with unique, non-empty values, preferring id-like names). DataError when the
    file cannot be read or no column can be the id.
    """
    data = Path(data_path).resolve()
    folder = Path(spec_path).resolve().parent if spec_path is not None else Path.cwd().resolve()
    con = duckdb.connect()
    try:
        columns = read_raw(con, data, _RAW)
        profiles = _profiles(con, columns)
        respondent_id = _pick_id(con, data, columns, id_column)
    finally:
        con.close()
    return _Writer(data, folder, columns, profiles, respondent_id).text()


def _profiles(con: duckdb.DuckDBPyConnection, columns: list[str]) -> dict[str, _Profile]:
    if not columns:
        return {}
    rows = con.execute(sql("draft_profile.sql", raw=_RAW, columns=columns), {"max_codes": MAX_SINGLE_CODES}).fetchall()
    profiles = {}
    for col, n, distinct, non_numbers, fractions, lowest, highest, codes in rows:
        if codes is not None and non_numbers == 0 and fractions == 0:
            codes = sorted({str(int(float(c))) for c in codes}, key=int)
        elif codes is not None:
            codes = sorted(codes)
        profiles[col] = _Profile(n, distinct, non_numbers, fractions, lowest, highest, None if codes is None else tuple(codes))
    return profiles


def _pick_id(con: duckdb.DuckDBPyConnection, data: Path, columns: list[str], id_column: str | None) -> str:
    if id_column is not None:
        if id_column not in columns:
            raise DataError(
                f"cannot draft a spec from {data}",
                [Problem("missing-column", f"--id column '{id_column}' is not in the file", file=str(data), column=id_column)],
            )
        return id_column
    named = [c for c in columns if c.lower() in _ID_NAMES or c.lower().endswith("_id")]
    for column in [*named, *[c for c in columns if c not in named]]:
        if con.execute(sql("draft_unique.sql", raw=_RAW, column=column)).fetchall()[0][0]:
            return column
    raise DataError(
        f"cannot draft a spec from {data}",
        [Problem("no-id-column", "no column has unique, non-empty values; name the id with --id COLUMN", file=str(data))],
    )


class _Writer:
    """Builds the draft's lines."""

    def __init__(
        self,
        data: Path,
        folder: Path,
        columns: list[str],
        profiles: dict[str, _Profile],
        respondent_id: str,
    ) -> None:
        self.data = data
        self.folder = folder
        self.columns = columns
        self.profiles = profiles
        self.respondent_id = respondent_id

    def text(self) -> str:
        lines = self.header() + self.design()
        multi, in_sets = self.multi_sets()
        skipped: list[str] = []
        done: set[str] = set()
        for column in self.columns:
            if column == self.respondent_id or column in done:
                continue
            if column in in_sets:
                name = in_sets[column]
                lines += self.multi(name, multi[name])
                done.update(multi[name])
                continue
            block = None if column in _RESERVED else self.variable(column)
            if block is None:
                profile = self.profiles.get(column)
                why = (
                    "a name wavebook reserves for itself: rename the column to stage it"
                    if column in _RESERVED
                    else "always empty"
                    if profile is None
                    else f"text with {profile.distinct:,} distinct values"
                )
                skipped.append(f"#   {column}: {why}")
            else:
                lines += block
        if skipped:
            lines += [
                "",
                "# Not drafted (staging will list them as extra columns; declare them here to stage them):",
                *skipped,
            ]
        return "\n".join(lines) + "\n"

    def header(self) -> list[str]:
        file = os.path.relpath(self.data, self.folder)
        today = dt.date.today().isoformat()
        return [
            f"# Draft study spec written by `wavebook init` from {self.data.name} on {today}.",
            "# Lines marked REVIEW need a person: labels, variable types, the sample design.",
            "# Check it with: wavebook check <this file>",
            "",
            f"title = {toml_string(self.data.stem)}   # REVIEW: the study's name, shown on the book",
            "notes = []   # REVIEW: methodology notes shown in the book",
            f"respondent_id = {toml_string(self.respondent_id)}",
            "",
            "[waves.W1]",
            'label = "Wave 1"   # REVIEW: e.g. "Wave 1 (March 2026)"',
            f"file = {toml_string(Path(file).as_posix())}",
            "# fieldwork = [2026-03-02, 2026-03-21]   # start and end dates",
        ]

    def design(self) -> list[str]:
        numeric = [c for c in self.columns if (p := self.profiles.get(c)) is not None and p.non_numbers == 0]
        weight = next((c for c in numeric if _WEIGHT_NAME.search(c)), "weight_column")
        probability = next((c for c in numeric if _PROBABILITY_NAME.search(c)), "probability_column")
        return [
            "",
            "[design]",
            'kind = "probability"   # REVIEW: "nonprobability" for a quota sample or an online panel',
            '# strata = "stratum_column"   # REVIEW: the stratum column, if the sample was stratified',
            '# psu = "cluster_column"      # REVIEW: the first-stage unit (cluster), if clustered',
            '# psu_ids = "within-stratum"   # or "unique" when PSU ids do not restart within strata',
            f"# base_weight = {toml_string(weight)}   # REVIEW: a design weight column, or:",
            f"# selection_probability = {toml_string(probability)}",
            '# single_psu = "error"         # strata with one PSU: "error", "certainty", "grand-mean" or "collapse"',
            "# (if a design column is drafted below as a variable, you may keep or delete that variable)",
        ]

    def multi_sets(self) -> tuple[dict[str, list[str]], dict[str, str]]:
        """0/1 columns sharing a prefix (text before the last '_'), at least two per set."""
        groups: dict[str, list[str]] = defaultdict(list)
        for column in self.columns:
            profile = self.profiles.get(column)
            if column != self.respondent_id and profile is not None and profile.binary and "_" in column:
                groups[column.rsplit("_", 1)[0]].append(column)
        taken = set(self.columns)
        sets: dict[str, list[str]] = {}
        for prefix, items in groups.items():
            if len(items) >= 2:
                name = prefix if prefix not in taken else f"{prefix}_set"
                sets[name] = items
        return sets, {item: name for name, items in sets.items() for item in items}

    def multi(self, name: str, items: list[str]) -> list[str]:
        lines = [
            "",
            f"[variables.{toml_key(name)}]",
            f"label = {toml_string(name)}   # REVIEW: the question text",
            'type = "multi"   # one 0/1 column per item',
            "",
            f"[variables.{toml_key(name)}.items]   # REVIEW: item labels",
        ]
        prefix = len(name) + 1 if all(i.startswith(name + "_") for i in items) else 0
        lines += [f"{toml_key(i)} = {toml_string(i[prefix:])}" for i in items]
        return lines

    def variable(self, column: str) -> list[str] | None:
        profile = self.profiles.get(column)
        head = ["", f"[variables.{toml_key(column)}]", f"label = {toml_string(column)}   # REVIEW: the question text"]
        if profile is None:
            return None
        if profile.codes is not None and (profile.whole_numbers or profile.non_numbers > 0):
            return head + self.single(profile)
        if profile.non_numbers == 0:
            return head + [
                'type = "numeric"',
                f"# minimum = {_number(profile.lowest)}   # REVIEW: bounds checked at staging "
                f"(seen {_number(profile.lowest)} to {_number(profile.highest)})",
                f"# maximum = {_number(profile.highest)}",
            ]
        return None

    def single(self, profile: _Profile) -> list[str]:
        codes = list(profile.codes or ())
        pairs = ", ".join(f"{toml_key(c)} = {toml_string(c)}" for c in codes)
        return [
            f'type = "single"   # {len(codes)} codes seen; REVIEW: "rating" for a rating scale '
            "(then add exclude_from_statistics and nets)",
            f"values = {{ {pairs} }}   # REVIEW: label each code",
        ]


def _number(x: float | None) -> str:
    if x is None:
        return "0"
    return str(int(x)) if float(x).is_integer() else repr(float(x))
