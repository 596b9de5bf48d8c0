"""Replicate-weight columns shipped with the data (`[variance] method = "supplied"`).

`variance.replicate_columns` is a regular expression matched against the whole column names of
each wave's file (in the file's column order; the spec's own columns never count as matches) or an
explicit list of names (in that order). Replicate r of a wave is staged in `responses` as the
DOUBLE design column `replicate_weight_<r>` (r = 1..R), whatever the file calls it, so waves whose
files name them differently line up replicate by replicate; R must be the same in every wave.

The checks (`replicate_problems`, run with the other staging checks): the pattern matches no
column of the file (no-replicate-columns); the wave's R differs from another wave's file
(replicate-count-differs); values missing or not finite numbers (bad-replicate-weight, errors,
with the first line, its value and example ids, for every column at once); negative values
(negative-replicate-weight, a warning: calibrated successive-difference replicates may be
negative, the ACS 2017-2021 PUMS person files carry some, and the variance formula needs no sign).
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import TYPE_CHECKING

from pipeline.errors import DataError, Problem

if TYPE_CHECKING:
    import duckdb

    from pipeline.estimation.options import VarianceOptions
    from pipeline.staging.spec import Study

STAGED_PREFIX = "replicate_weight_"
_HEADERS: dict[tuple[str, int, int], tuple[str, ...] | None] = {}  # (path, mtime, size) -> column names


def staged_name(r: int) -> str:
    """The `responses` column of replicate r (1-based)."""
    return f"{STAGED_PREFIX}{r}"


def supplied_options(study: Study) -> VarianceOptions | None:
    """The study's `[variance]` options when its replicate weights are supplied (and valid), else None."""
    from pipeline.estimation.options import parse_variance

    options, problems = parse_variance(study.variance)
    return options if options.supplied and not problems else None


def file_columns(path: Path) -> tuple[str, ...] | None:
    """The column names of a wave file (CSV header or Parquet schema), None when it cannot be read
    (staging reports why); remembered per file version (path, modification time, size)."""
    try:
        stat = path.stat()
    except OSError:
        return None
    key = (str(path), stat.st_mtime_ns, stat.st_size)
    if key not in _HEADERS:
        _HEADERS[key] = _read_columns(path)
    return _HEADERS[key]


def _read_columns(path: Path) -> tuple[str, ...] | None:
    import polars as pl

    from pipeline.staging.readers import csv_header, file_format

    try:
        if file_format(path) == "parquet":
            return tuple(pl.read_parquet_schema(path))
        return tuple(csv_header(path))
    except (DataError, OSError, pl.exceptions.PolarsError, ValueError):
        return None


def matched_columns(options: VarianceOptions, columns: tuple[str, ...] | list[str], own: set[str]) -> list[str]:
    """The replicate-weight columns among a file's `columns`, in replicate order: the pattern's whole-name
    matches in file order, leaving out the spec's `own` columns; or the listed names the file has."""
    given = options.replicate_columns
    if isinstance(given, str):
        pattern = re.compile(given)
        return [c for c in columns if pattern.fullmatch(c) and c not in own]
    return [c for c in given or () if c in columns]


def wave_replicates(study: Study, wave_id: str) -> dict[str, str]:
    """Staged name -> file column of each replicate weight of the wave (empty unless supplied).

    A listed name the file lacks keeps its place (so the checks report it as a missing column)."""
    options = supplied_options(study)
    if options is None:
        return {}
    if not isinstance(options.replicate_columns, str):
        return {staged_name(r): c for r, c in enumerate(options.replicate_columns or (), start=1)}
    columns = file_columns(study.wave(wave_id).file) or ()
    own = set(study.own_columns())
    return {staged_name(r): c for r, c in enumerate(matched_columns(options, columns, own), start=1)}


def replicate_count(study: Study) -> int:
    """R, the number of replicate-weight columns staged (0 unless supplied): the list's length, or
    the pattern's matches in the first wave file (spec order) that can be read; `replicate_problems`
    refuses a wave whose file has another count."""
    options = supplied_options(study)
    if options is None:
        return 0
    if not isinstance(options.replicate_columns, str):
        return len(options.replicate_columns or ())
    for wave in study.waves:
        found = wave_replicates(study, wave.id)
        if found:
            return len(found)
    return 0


def staged_columns(study: Study) -> list[str]:
    """The `responses` columns of the replicate weights, in replicate order."""
    return [staged_name(r) for r in range(1, replicate_count(study) + 1)]


def replicate_problems(
    con: duckdb.DuckDBPyConnection, study: Study, *, raw: str, present: set[str], file: str, wave: str
) -> list[Problem]:
    """The replicate-weight problems of one wave (module docstring); `raw` is the wave view, with the
    replicate columns under their staged names, `present` the view's columns."""
    options = supplied_options(study)
    if options is None:
        return []
    sources = wave_replicates(study, wave)
    if not sources:
        return [Problem("no-replicate-columns", f"variance.replicate_columns '{options.replicate_columns}' matches no "
                        "column of this file (the pattern must match whole column names)", file=file,
                        value=str(options.replicate_columns))]
    problems = _count_problems(study, wave, len(sources), file)
    columns = [c for c in sources if c in present]
    if not columns:
        return problems
    from pipeline.sqlfiles import sql

    counts = con.execute(sql("check_replicate_counts.sql", raw=raw, columns=columns)).fetchall()[0]
    columns = [c for c, n in zip(columns, counts, strict=True) if n]  # details only where something failed
    if not columns:
        return problems
    rows = con.execute(
        sql("check_replicate_weights.sql", raw=raw, id=study.respondent_id, columns=columns), {"names": columns}
    ).fetchall()
    csv = not file.lower().endswith(".parquet")
    what = {"missing": "missing replicate weights: every respondent needs one",
            "not-a-number": "replicate weights that are not finite numbers",
            "negative": "negative replicate weights (accepted: calibrated replicates may be negative; check they "
                        "are meant to be)"}
    for col, kind, n, first_row, value, examples in rows:
        problems.append(Problem(
            "negative-replicate-weight" if kind == "negative" else "bad-replicate-weight",
            f"{what[kind]} (replicate {col.removeprefix(STAGED_PREFIX)} of variance.replicate_columns)",
            severity="warning" if kind == "negative" else "error",
            file=file, column=sources[col], value=value, count=int(n), examples=tuple(str(e) for e in examples),
            line=int(first_row) + 2 if csv else None,
        ))
    return problems


def _count_problems(study: Study, wave: str, count: int, file: str) -> list[Problem]:
    """replicate-count-differs: this wave's R against every other wave whose file can be read."""
    others = {}
    for other in study.waves:
        if other.id != wave and file_columns(other.file) is not None:
            n = len(wave_replicates(study, other.id))
            if n != count:
                others[other.id] = n
    if not others:
        return []
    listed = ", ".join(f"{w}: {n}" for w, n in others.items())
    return [Problem("replicate-count-differs", f"this wave has {count} replicate-weight columns but other waves have "
                    f"another number ({listed}); every wave needs the same replicates", file=file, value=str(count))]
