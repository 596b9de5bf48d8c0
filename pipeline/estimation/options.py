"""The study spec's `[variance]` table: how the result book's standard errors are computed.

```toml
[variance]
method = "taylor"      # "taylor" (default), "jackknife", "stratified-jackknife", "brr", "fay" or "bootstrap"
replicates = 500       # bootstrap only: number of replicates R
seed = 20260301        # bootstrap only: random seed, so reruns reproduce
fay = 0.5              # "fay" only: Fay's coefficient rho in (0, 1)
level = 0.95           # confidence level of the intervals shown
```

Replicate methods replay the study's weighting recipe in every replicate (see
`pipeline.estimation.replicates`); Taylor linearization uses the residuals of the weighting's
calibration (see `pipeline.estimation.taylor`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from pipeline.errors import Problem
from pipeline.renamed import renamed_value

METHODS = ("taylor", "jackknife", "stratified-jackknife", "brr", "fay", "bootstrap")
KEYS = ("method", "replicates", "seed", "fay", "level")


@dataclass(frozen=True)
class VarianceOptions:
    """Validated `[variance]` options (defaults: Taylor linearization, 95% intervals)."""

    method: str = "taylor"
    replicates: int | None = None
    seed: int | None = None
    fay: float = 0.0
    level: float = 0.95


def parse_variance(raw: Mapping[str, object]) -> tuple[VarianceOptions, list[Problem]]:
    """Validate a raw `[variance]` table; returns the options and every problem found (keys named)."""
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
    if isinstance(fay, bool) or not isinstance(fay, int | float) or not 0.0 <= float(fay) < 1.0:
        bad("fay", "must be a number in [0, 1)", fay)
    elif method == "fay" and float(fay) == 0.0:
        bad("fay", "method = \"fay\" needs a coefficient in (0, 1), e.g. fay = 0.5", fay)
    level = raw.get("level", 0.95)
    if isinstance(level, bool) or not isinstance(level, int | float) or not 0.5 <= float(level) < 1.0:
        bad("level", "must be a number in [0.5, 1)", level)
    if problems:
        return VarianceOptions(), problems
    return (
        VarianceOptions(
            method=str(method),
            replicates=replicates,  # type: ignore[arg-type]
            seed=seed,  # type: ignore[arg-type]
            fay=float(fay),  # type: ignore[arg-type]
            level=float(level),  # type: ignore[arg-type]
        ),
        [],
    )
