"""Build the margins of a step on the weighting classes: collapse small categories, match targets.

Collapsing (our own rule): while some category of a margin (or a target category with no
respondent) has fewer than `min_count` respondents, merge codes of one of its variables:
the next declared group of that variable's `order` that touches the small category, or, for
`order = "adjacent"`, the small category's code group with the neighbouring group (in code
order) holding fewer respondents. Every merge is reported with the count that triggered it.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import polars as pl

from pipeline.errors import Problem
from pipeline.weighting.classes import ClassIndex, Margin, group_label
from pipeline.weighting.targets import PROPORTION_TOLERANCE, TargetTable, margin_name

TOTALS_AGREE_RTOL = 1e-6  # count margins of one step must describe the same population total


@dataclass(frozen=True)
class Collapse:
    """Collapse rule: min respondents per category, merge order per variable (groups of codes or 'adjacent')."""

    min_count: int
    order: dict[str, tuple[tuple[str, ...], ...] | str] = field(default_factory=dict)


def _sort_codes(codes: Sequence[str]) -> list[str]:
    try:
        return sorted(codes, key=float)
    except ValueError:
        return sorted(codes)


class _Grouping:
    """Current merge state: variable -> code -> the group (tuple of codes) it belongs to."""

    def __init__(self, codes: dict[str, list[str]]) -> None:
        self.codes = codes
        self.group = {v: {c: (c,) for c in cs} for v, cs in codes.items()}

    def merge(self, variable: str, codes: Sequence[str]) -> tuple[str, ...]:
        members = {m for c in codes if c in self.group[variable] for m in self.group[variable][c]}
        merged = tuple(c for c in self.codes[variable] if c in members)
        for c in merged:
            self.group[variable][c] = merged
        return merged

    def label(self, variable: str, code: str) -> str:
        return group_label(self.group[variable].get(code, (code,)))

    def groups(self, variable: str) -> list[tuple[str, ...]]:
        seen: list[tuple[str, ...]] = []
        for c in self.codes[variable]:
            if self.group[variable][c] not in seen:
                seen.append(self.group[variable][c])
        return seen


def _category_keys(classes: ClassIndex, variables: tuple[str, ...], grouping: _Grouping) -> pl.Series:
    """(C,) category label of each class ("3 x 5+6"), after merging."""
    labels = [
        pl.col(v).replace_strict({c: group_label(g) for c, g in grouping.group[v].items()}, return_dtype=pl.String)
        for v in variables
    ]
    return classes.frame.select(pl.concat_str(labels, separator="\x1f").alias("key"))["key"]


def _category_counts(
    classes: ClassIndex, variables: tuple[str, ...], grouping: _Grouping
) -> dict[tuple[str, ...], int]:
    keys = _category_keys(classes, variables, grouping)
    counted = pl.DataFrame({"key": keys, "n": classes.counts}).group_by("key").agg(pl.col("n").sum())
    return {tuple(k.split("\x1f")): int(n) for k, n in counted.iter_rows()}


def _target_keys(targets: dict[tuple[str, ...], float], variables: tuple[str, ...], grouping: _Grouping) -> dict[tuple[str, ...], float]:
    out: dict[tuple[str, ...], float] = {}
    for codes, t in targets.items():
        key = tuple(grouping.label(v, c) for v, c in zip(variables, codes))
        out[key] = out.get(key, 0.0) + t
    return out


def _next_merge(
    variables: tuple[str, ...],
    small: tuple[str, ...],
    collapse: Collapse,
    grouping: _Grouping,
    used: dict[str, int],
    classes: ClassIndex,
) -> tuple[str, tuple[str, ...]] | None:
    for v, label in zip(variables, small):
        rule = collapse.order.get(v)
        codes = set(label.split("+"))
        if isinstance(rule, tuple):
            for i, grp in enumerate(rule[used.get(v, 0):], start=used.get(v, 0)):
                if codes & set(grp) and not set(grp) <= codes:
                    used[v] = i + 1
                    return v, grouping.merge(v, tuple(codes) + grp)
        elif rule == "adjacent":
            groups = grouping.groups(v)
            where = next(i for i, g in enumerate(groups) if set(g) == codes)
            neighbours = [groups[i] for i in (where - 1, where + 1) if 0 <= i < len(groups)]
            if neighbours:
                margin_counts = _category_counts(classes, (v,), grouping)
                partner = min(neighbours, key=lambda g: margin_counts.get((group_label(g),), 0))
                return v, grouping.merge(v, tuple(codes) + partner)
    return None


def build_margins(
    classes: ClassIndex,
    margin_vars: Sequence[tuple[str, ...]],
    targets: TargetTable,
    *,
    code_order: dict[str, list[str]],
    collapse: Collapse | None,
    where: str,
) -> tuple[list[Margin], list[str], list[Problem]]:
    """Margins of one step with their targets, after collapsing; returns (margins, merge notes, problems).

    Problems: a margin missing from the targets, a target code unknown to the data, a data
    category without target, a positive target with no respondent, proportions not summing to 1,
    count margins whose totals disagree, a small category the collapse order cannot fix.
    """
    problems: list[Problem] = []
    notes: list[str] = []
    all_vars = sorted({v for m in margin_vars for v in m})
    codes = {
        v: _sort_codes(list(dict.fromkeys([*code_order.get(v, []), *classes.frame[v].unique().to_list()])))
        for v in all_vars
    }
    grouping = _Grouping(codes)
    wanted: dict[tuple[str, ...], dict[tuple[str, ...], float]] = {}
    unknown: set[tuple[tuple[str, ...], tuple[str, ...]]] = set()
    for m in margin_vars:
        table = targets.get(m)
        if table is None:
            problems.append(Problem("target-missing", f"{where}: no targets for margin '{margin_name(m)}' in {targets.source}", column=margin_name(m)))
            continue
        for key in table:
            for v, c in zip(m, key):
                if c not in codes[v]:
                    unknown.add((m, key))
                    problems.append(
                        Problem("target-unknown-category",
                                f"{where}: target category '{' x '.join(key)}' of margin '{margin_name(m)}': code '{c}' "
                                f"of '{v}' is neither in the codebook nor in the data",
                                column=v, value=c)
                    )
        wanted[m] = {k: t for k, t in table.items() if (m, k) not in unknown}
    if any(p.rule == "target-missing" for p in problems):
        return [], notes, problems
    used: dict[str, int] = {}
    threshold = collapse.min_count if collapse is not None else 0
    for _ in range(sum(len(c) for c in codes.values()) + 1):
        small = None
        for m, table in wanted.items():
            counts = _category_counts(classes, m, grouping)
            tkeys = _target_keys(table, m, grouping)
            for key in sorted(set(counts) | {k for k, t in tkeys.items() if t > 0}, key=lambda k: counts.get(k, 0)):
                if counts.get(key, 0) < max(threshold, 1 if tkeys.get(key, 0.0) > 0 else 0):
                    small = (m, key, counts.get(key, 0))
                    break
            if small:
                break
        if small is None or collapse is None or problems:
            break
        merge = _next_merge(small[0], small[1], collapse, grouping, used, classes)
        if merge is None:
            problems.append(
                Problem("collapse-exhausted",
                        f"{where}: category '{' x '.join(small[1])}' of margin '{margin_name(small[0])}' has {small[2]} "
                        f"respondent(s), fewer than min_count {threshold}, and the collapse order has no further merge "
                        "for it; add a group to `collapse.order` or lower `min_count`",
                        column=margin_name(small[0]), value=" x ".join(small[1]), count=small[2])
            )
            return [], notes, problems
        notes.append(
            f"{where}: merged {merge[0]} codes {group_label(merge[1])} (category '{' x '.join(small[1])}' of "
            f"'{margin_name(small[0])}' had {small[2]} respondent(s) < {threshold})"
        )
    margins: list[Margin] = []
    for m, table in wanted.items():
        counts = _category_counts(classes, m, grouping)
        tkeys = _target_keys(table, m, grouping)
        name = margin_name(m)
        for key, n in counts.items():
            if key not in tkeys:
                problems.append(Problem("target-no-category",
                                        f"{where}: data category '{' x '.join(key)}' of margin '{name}' has no target; "
                                        "add it to the targets (or merge it with `collapse`)",
                                        column=name, value=" x ".join(key), count=n))
            elif tkeys[key] == 0:
                problems.append(Problem("target-zero",
                                        f"{where}: category '{' x '.join(key)}' of margin '{name}' has target 0 but holds "
                                        "respondents; weights must stay positive: merge it or remove those respondents",
                                        column=name, value=" x ".join(key), count=n))
        for key, t in tkeys.items():
            if t > 0 and key not in counts:
                problems.append(Problem("target-empty-cell",
                                        f"{where}: category '{' x '.join(key)}' of margin '{name}' has target {t:g} but no "
                                        "respondent; merge it with `collapse` or drop it from the targets",
                                        column=name, value=" x ".join(key), count=0))
        values = [t for k, t in tkeys.items() if k in counts]
        all_values = list(tkeys.values())
        kind = "proportion" if abs(sum(all_values) - 1.0) <= PROPORTION_TOLERANCE else "count"
        if kind == "count" and max(all_values, default=0) <= 1.0:
            problems.append(Problem("target-proportions",
                                    f"{where}: targets of margin '{name}' look like proportions but sum to "
                                    f"{sum(all_values):.6g}, not 1", column=name))
        cats = tuple(sorted(counts))
        lookup = {k: i for i, k in enumerate(cats)}
        of_class = (
            _category_keys(classes, m, grouping)
            .replace_strict({"\x1f".join(k): i for k, i in lookup.items()}, return_dtype=pl.Int64)
            .to_numpy()
        )
        if values:
            margins.append(Margin(name, m, tuple(" x ".join(k) for k in cats), of_class,
                                  np.array([tkeys.get(k, 0.0) for k in cats]), kind))
    count_totals = {mg.name: float(mg.targets.sum()) for mg in margins if mg.kind == "count"}
    if count_totals and not problems:
        ref = max(count_totals.values())
        if any(abs(t - ref) > TOTALS_AGREE_RTOL * ref for t in count_totals.values()):
            problems.append(Problem("target-totals-disagree",
                                    f"{where}: count margins describe different population totals: "
                                    + ", ".join(f"'{k}' {v:,.6g}" for k, v in count_totals.items()),
                                    column=", ".join(count_totals)))
    return margins, notes, problems
