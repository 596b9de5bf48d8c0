"""The study spec's `[variance]` table: how the result book's standard errors are computed.

```toml
[variance]
method = "taylor"      # "taylor" (default), "jackknife", "stratified-jackknife", "brr", "fay", "bootstrap"
                       # or "supplied"
replicates = 500       # bootstrap only: number of replicates R
seed = 20260301        # bootstrap only: random seed, so reruns reproduce
fay = 0.5              # "fay" (or supplied replicates made by Fay's method) only: Fay's coefficient rho in (0, 1)
level = 0.95           # confidence level of the intervals shown
```

Replicate methods replay the study's weighting recipe in every replicate (see
`pipeline.estimation.replicates`); Taylor linearization uses the residuals of the weighting's
calibration (see `pipeline.estimation.taylor`).

Replicate weights shipped with the data (`method = "supplied"`) are used as they are, never
re-created:

```toml
[variance]
method = "supplied"
replicate_columns = 'PWGTP\\d+'   # a regular expression matched against whole column names of each
                                 # wave file (in the file's column order), or a list of column names
replicate_method = "sdr"         # required: how they were made: "sdr", "jackknife",
                                 # "stratified-jackknife", "brr", "fay" or "bootstrap"
multiplier = 0.05                # optional: default from replicate_method (SUPPLIED_MULTIPLIERS):
                                 # sdr 4/R, jackknife (R-1)/R, brr 1/R, fay 1/(R (1-rho)^2), bootstrap 1/R
multipliers = [0.5, 0.5]         # stratified-jackknife only (required there): one per replicate column
fay = 0.5                        # replicate_method = "fay" only (required there)
df = 40                          # degrees of freedom; default R - 1; brr and fay must give it (the
                                 # number of half-sample pairs)
centre = "full-sample"           # deviations from the full-sample estimate (default) or "replicate-mean"
```

The rules of the supplied options are `replicates.supplied_option_problems`, the same the
`estimate` command applies; an option that does not apply to the chosen method is an error.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass

from pipeline.errors import Problem
from pipeline.estimation.replicates import supplied_option_problems
from pipeline.renamed import renamed_value

METHODS = ("taylor", "jackknife", "stratified-jackknife", "brr", "fay", "bootstrap", "supplied")
SUPPLIED_KEYS = ("replicate_columns", "replicate_method", "multiplier", "multipliers", "df", "centre")
KEYS = ("method", "replicates", "seed", "fay", "level", *SUPPLIED_KEYS)


@dataclass(frozen=True)
class VarianceOptions:
    """Validated `[variance]` options (defaults: Taylor linearization, 95% intervals).

    With method "supplied": replicate_columns (a pattern, or a tuple of names), replicate_method,
    multiplier (None: the method's default), multipliers, df (None: R - 1) and centre describe the
    replicate weights shipped with the data (module docstring)."""

    method: str = "taylor"
    replicates: int | None = None
    seed: int | None = None
    fay: float = 0.0
    level: float = 0.95
    replicate_columns: str | tuple[str, ...] | None = None
    replicate_method: str | None = None
    multiplier: float | None = None
    multipliers: tuple[float, ...] | None = None
    df: int | None = None
    centre: str = "full-sample"

    @property
    def supplied(self) -> bool:
        """True when the replicate weights come with the data."""
        return self.method == "supplied"


def parse_variance(
    raw: Mapping[str, object], *, columns: Mapping[str, str] | None = None
) -> tuple[VarianceOptions, list[Problem]]:
    """Validate a raw `[variance]` table; returns the options and every problem found (keys named).

    columns: the spec's own columns (respondent id, design, codebook) -> where the spec declares
    them; replicate_columns may name or match none of them (the full-sample weight above all).
    """
    problems: list[Problem] = []

    def bad(key: str, message: str, value: object) -> None:
        problems.append(Problem("variance-option", f"variance.{key}: {message}", value=str(value)))

    for key in raw:
        if key not in KEYS:
            bad(key, f"unknown key (known: {', '.join(KEYS)})", raw[key])
    method = raw.get("method", "taylor")
    renamed = renamed_value("variance.method", method)
    if renamed is not None:
        problems.append(renamed)
    elif method not in METHODS:
        bad("method", f"must be one of {', '.join(METHODS)}", method)
    replicates = raw.get("replicates")
    if replicates is not None and (isinstance(replicates, bool) or not isinstance(replicates, int) or replicates < 2):
        bad("replicates", "must be a whole number of at least 2", replicates)
    elif replicates is not None and method != "bootstrap":
        bad("replicates", "applies to method = \"bootstrap\" only (other methods set R from the design)", replicates)
    seed = raw.get("seed")
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, int) or seed < 0):
        bad("seed", "must be a whole number >= 0", seed)
    elif seed is not None and method != "bootstrap":
        bad("seed", "applies to method = \"bootstrap\" only (an option that does not apply is an error)", seed)
    fay = raw.get("fay", 0.0)
    if method == "supplied":
        pass  # the supplied rules below check it against the replicate method
    elif isinstance(fay, bool) or not isinstance(fay, int | float) or not 0.0 <= float(fay) < 1.0:
        bad("fay", "must be a number in [0, 1)", fay)
    elif method == "fay" and float(fay) == 0.0:
        bad("fay", "method = \"fay\" needs a coefficient in (0, 1), e.g. fay = 0.5", fay)
    level = raw.get("level", 0.95)
    if isinstance(level, bool) or not isinstance(level, int | float) or not 0.5 <= float(level) < 1.0:
        bad("level", "must be a number in [0.5, 1)", level)
    supplied = _supplied(raw, bad, columns or {}) if method == "supplied" else {}
    if method != "supplied":
        for key in SUPPLIED_KEYS:
            if key in raw:
                bad(key, f"applies to method = \"supplied\" only (replicate weights shipped with the data), not "
                    f"{method}", raw[key])
    if problems:
        return VarianceOptions(), problems
    return (
        VarianceOptions(
            method=str(method),
            replicates=replicates,  # type: ignore[arg-type]
            seed=seed,  # type: ignore[arg-type]
            fay=float(fay),  # type: ignore[arg-type]
            level=float(level),  # type: ignore[arg-type]
            **supplied,  # type: ignore[arg-type]
        ),
        [],
    )


def _supplied(raw: Mapping[str, object], bad, columns: Mapping[str, str]) -> dict[str, object]:  # noqa: ANN001
    """The supplied replicate-weight keys checked (`bad(key, message, value)` for each problem)."""
    given = raw.get("replicate_columns")
    pattern: str | tuple[str, ...] | None = None
    if given is None:
        bad("replicate_columns", "method = \"supplied\" needs the replicate-weight columns: a regular expression "
            "matched against whole column names (e.g. 'PWGTP\\d+') or a list of names", None)
    elif isinstance(given, str):
        try:
            compiled = re.compile(given)
        except re.error as exc:
            bad("replicate_columns", f"is not a valid regular expression ({exc})", given)
        else:
            pattern = given
            for column, where in columns.items():
                if compiled.fullmatch(column):
                    bad("replicate_columns", f"the pattern also matches '{column}' ({where}); anchor it so only the "
                        "replicate-weight columns match", given)
    elif isinstance(given, list) and given and all(isinstance(c, str) and c for c in given):
        pattern = tuple(given)
        for column in dict.fromkeys(c for c in given if given.count(c) > 1):
            bad("replicate_columns", f"names '{column}' more than once", column)
        for column in (c for c in dict.fromkeys(given) if c in columns):
            bad("replicate_columns", f"'{column}' is {columns[column]}, not a replicate-weight column", column)
    else:
        bad("replicate_columns", "must be a regular expression (a string) or a non-empty list of column names", given)
    method = raw.get("replicate_method")
    if method is None:
        bad("replicate_method", "method = \"supplied\" needs how the replicate weights were made: sdr, jackknife, "
            "stratified-jackknife, brr, fay or bootstrap (it sets the default multiplier and df)", None)
    multipliers = raw.get("multipliers")
    broken = [] if method is None else supplied_option_problems(
        method, fay=raw.get("fay", 0.0), multiplier=raw.get("multiplier"), df=raw.get("df"),
        centre=raw.get("centre", "full-sample"), multipliers=multipliers,
    )
    for key, message, value in broken:
        bad(key, message, value)
    if isinstance(pattern, tuple) and isinstance(multipliers, list) and len(multipliers) != len(pattern):
        bad("multipliers", f"{len(multipliers)} multipliers for {len(pattern)} replicate-weight columns", multipliers)
    if method is None or broken:
        return {}
    multiplier = raw.get("multiplier")
    return {
        "replicate_columns": pattern,
        "replicate_method": method,
        "multiplier": None if multiplier is None else float(multiplier),  # type: ignore[arg-type]
        "multipliers": None if multipliers is None else tuple(float(m) for m in multipliers),  # type: ignore[union-attr]
        "df": raw.get("df"),
        "centre": raw.get("centre", "full-sample"),
    }
