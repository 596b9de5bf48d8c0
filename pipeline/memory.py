"""The memory budget of a run: how many answer columns of a wave are estimated at once.

`wavebook run --memory-budget SIZE` (default `DEFAULT_BUDGET`, 2 GB) bounds the respondent-level
working set of the estimation: each wave's answer columns are read from the study database and
estimated in batches of variables (`variable_batches`), so peak memory grows with rows x batch
width, not rows x every column. A batch is one grouped pass for the toplines and, with
`[tables]`, one for the banner cells of its stubs, whose (groups x quantities) matrices come off
the budget too (`extra`, from `pipeline.tables.Tabulation.batch_bytes`). Results do not depend on
the batching, since every estimate, its variance and its design effect read only its own quantities.
"""

from __future__ import annotations

import argparse
import re
from collections.abc import Mapping
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from pipeline.staging.spec import Study

DEFAULT_BUDGET = 2 * 2**30
# bytes held per respondent and answer column of a batch while it is estimated: the value (8) and
# its integer codes (8); the grouped pass's other arrays (group and combination codes, weights,
# bincount scratch) are per set of columns, not per column, and come off the budget once as
# BATCH_OVERHEAD per respondent. Planning figures checked with bench/bench_study_run.py, not bounds.
BYTES_PER_VALUE = 16
BATCH_OVERHEAD = 96
_UNITS = {"": 1, "B": 1, "K": 2**10, "KB": 2**10, "M": 2**20, "MB": 2**20, "G": 2**30, "GB": 2**30}


def parse_size(text: str) -> int:
    """Bytes of a size such as "2GB", "512MB", "1.5G" or "3000000000" (binary units); ArgumentTypeError otherwise."""
    match = re.fullmatch(r"\s*(\d+(?:\.\d+)?)\s*([KMG]?B?)\s*", str(text).upper())
    if not match or float(match.group(1)) <= 0:
        raise argparse.ArgumentTypeError(f"{text!r} is not a size such as 2GB or 512MB")
    return int(float(match.group(1)) * _UNITS[match.group(2)])


def variable_batches(study: Study, rows: int, budget: int, *, held_columns: int = 0,
                     extra: Mapping[str, int] | None = None) -> list[list[str]]:
    """The study's variables in spec order, cut into batches whose estimation fits in `budget` bytes.

    A variable costs rows x BYTES_PER_VALUE per column it reads (its items for a multiple-response
    set) plus one for each derived statistic column (mean and median of a numeric or rating
    variable), plus `extra[name]` bytes when given (the banner tables' working set of its stub);
    `held_columns` (the weighting and break columns, held for the whole wave) come off the budget
    first, then BATCH_OVERHEAD bytes per respondent. Every batch holds at least one variable.
    """
    per_column = max(rows, 1) * BYTES_PER_VALUE
    room = max(budget - (held_columns * 8 + BATCH_OVERHEAD) * max(rows, 1), per_column)
    batches: list[list[str]] = []
    used = 0
    for name, variable in study.variables.items():
        cost = per_column * (len(variable.columns) + (2 if variable.type in ("numeric", "rating") else 0))
        cost += (extra or {}).get(name, 0)
        if not batches or used + cost > room:
            batches.append([])
            used = 0
        batches[-1].append(name)
        used += cost
    return batches
