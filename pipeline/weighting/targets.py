"""Population targets for post-stratification, raking and calibration.

Targets come from a long CSV with header `variable,category,target` (and optionally `wave`: rows
with a wave apply to that wave only, rows without one to every wave) or inline in the spec as
`totals = { region = { 1 = 0.55, 2 = 0.45 }, "age_band x sex" = { "1 x 1" = 0.06, ... } }`.
A crossed margin is named by joining its variables with " x " and its categories by joining
the codes with " x ". Targets of one margin are proportions (they sum to 1) or counts.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field, replace
from pathlib import Path

from pipeline.errors import Problem

CROSS = " x "
_CROSS_RE = re.compile(r"\s+x\s+")
PROPORTION_TOLERANCE = 1e-6  # proportions must sum to 1 within this (rounding of published shares)


def margin_name(variables: tuple[str, ...]) -> str:
    """The name of a (possibly crossed) margin: its variables joined by " x "."""
    return CROSS.join(variables)


def split_margin(name: str) -> tuple[str, ...]:
    """The variables of a margin name ("age_band x sex" -> ("age_band", "sex"))."""
    return tuple(part.strip() for part in _CROSS_RE.split(name.strip()) if part.strip())


def split_category(label: str) -> tuple[str, ...]:
    """The codes of a category label ("3 x 2" -> ("3", "2"))."""
    return tuple(part.strip() for part in _CROSS_RE.split(str(label).strip()))


@dataclass(frozen=True)
class TargetTable:
    """Targets by margin: margin name -> {category label (codes joined by " x ") -> target}.

    waves: wave id -> margins of that wave only (a `wave` column, or `targets = { W1 = ... }`);
    every_wave: whether `margins` apply to the waves too (False for `targets = { W1 = ... }`,
    where a wave not listed has no targets). `for_wave` gives one wave's plain table.
    """

    margins: dict[str, dict[tuple[str, ...], float]]
    source: str
    waves: dict[str, dict[str, dict[tuple[str, ...], float]]] = field(default_factory=dict)
    every_wave: bool = True

    def get(self, variables: tuple[str, ...]) -> dict[tuple[str, ...], float] | None:
        """The targets of the margin over `variables` (None when the table lacks that margin)."""
        return self.margins.get(margin_name(variables))

    def for_wave(self, wave: str) -> TargetTable:
        """The targets of one wave: its own margins, and the every-wave margins it does not replace."""
        common = self.margins if self.every_wave else {}
        return TargetTable({**common, **self.waves.get(wave, {})}, source=self.source)

    def all_margins(self) -> set[str]:
        """Every margin named, for any wave."""
        return set(self.margins) | {m for margins in self.waves.values() for m in margins}


def _add(
    margins: dict[str, dict[tuple[str, ...], float]],
    problems: list[Problem],
    *,
    where: str,
    margin: str,
    category: str,
    raw_target: object,
    line: int | None = None,
) -> None:
    variables = split_margin(margin)
    codes = split_category(category)
    if len(codes) != len(variables):
        problems.append(
            Problem(
                "target-category",
                f"{where}: category '{category}' of margin '{margin}' has {len(codes)} part(s) but the margin "
                f"crosses {len(variables)} variable(s); join one code per variable with ' x '",
                column=margin,
                value=str(category),
                line=line,
            )
        )
        return
    if isinstance(raw_target, str) and not raw_target.strip():
        problems.append(
            Problem("target-value", f"{where}: the target of category '{category}' is empty", column=margin, value=category, line=line)
        )
        return
    try:
        target = float(raw_target)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        problems.append(
            Problem("target-value", f"{where}: target '{raw_target}' is not a number", column=margin, value=category, line=line)
        )
        return
    if not target >= 0 or target == float("inf"):
        problems.append(
            Problem("target-value", f"{where}: target {raw_target} must be a finite number >= 0", column=margin, value=category,
                    line=line)
        )
        return
    cells = margins.setdefault(margin_name(variables), {})
    if codes in cells:
        problems.append(
            Problem("target-duplicate", f"{where}: category '{category}' of margin '{margin}' is listed twice", column=margin,
                    value=category, line=line)
        )
        return
    cells[codes] = target


def read_targets_csv(path: Path, *, where: str) -> tuple[TargetTable | None, list[Problem]]:
    """Read a long targets CSV (`variable,category,target`); returns the table and every problem found.

    The file is read with the standard csv module (targets files are small), so each problem names
    its line: target-file for a missing, unreadable, empty, non-UTF-8 or semicolon-separated file or
    a wrong header; ragged-row for a row whose field count differs from the header's; and the
    problems of each target (target-category, target-value, target-duplicate).
    """
    import csv
    import io

    if not path.is_file():
        return None, [Problem("target-file", f"{where}: targets file not found", file=str(path))]

    def unusable(message: str, line: int | None = None) -> tuple[None, list[Problem]]:
        return None, [Problem("target-file", f"{where}: {message}", file=str(path), line=line)]

    try:
        raw = path.read_bytes()
    except OSError as exc:
        return unusable(f"the targets file cannot be read ({exc.strerror or exc})")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        return unusable(f"line {line} is not UTF-8 text; the targets file must be saved as UTF-8", line)
    reader = csv.reader(io.StringIO(text, newline=""))
    header = [cell.strip() for cell in next(reader, [])]
    if not any(header):
        return unusable("the targets file is empty; it needs the header variable,category,target and one row per target", 1)
    if len(header) == 1 and ";" in header[0]:
        return unusable("the header is separated by semicolons; a targets file is comma-separated: variable,category,target", 1)
    missing = [c for c in ("variable", "category", "target") if c not in header]
    if missing:
        return unusable(f"targets file lacks column(s) {', '.join(missing)}; the header must be variable,category,target", 1)
    index = [header.index(c) for c in ("variable", "category", "target")]
    wave_index = header.index("wave") if "wave" in header else None
    margins: dict[str, dict[tuple[str, ...], float]] = {}
    waves: dict[str, dict[str, dict[tuple[str, ...], float]]] = {}
    problems: list[Problem] = []
    label = f"{where} ({path.name})"
    for record in reader:
        if not any(cell.strip() for cell in record):
            continue
        if len(record) != len(header):
            problems.append(
                Problem(
                    "ragged-row",
                    f"{label}: this row has {len(record)} field(s) but the header has {len(header)}",
                    line=reader.line_num,
                    value=",".join(record)[:60],
                )
            )
            continue
        margin, category, target = (record[i].strip() for i in index)
        wave = record[wave_index].strip() if wave_index is not None else ""
        into = waves.setdefault(wave, {}) if wave else margins
        _add(into, problems, where=label, margin=margin, category=category, raw_target=target, line=reader.line_num)
    problems = [replace(p, file=str(path)) for p in problems]
    return TargetTable(margins, source=str(path), waves=waves), problems


def inline_targets(raw: object, *, where: str) -> tuple[TargetTable | None, list[Problem]]:
    """Targets given inline in the spec: {margin name: {category label: target}}."""
    problems: list[Problem] = []
    if not isinstance(raw, dict) or not all(isinstance(v, dict) for v in raw.values()):
        return None, [Problem("spec-type", f"{where} must be a table of margins, each a table category = target")]
    margins: dict[str, dict[tuple[str, ...], float]] = {}
    for margin, cells in raw.items():
        for category, target in cells.items():
            _add(margins, problems, where=where, margin=str(margin), category=str(category), raw_target=target)
    return TargetTable(margins, source=where), problems
