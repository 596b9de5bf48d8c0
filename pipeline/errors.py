"""Errors the user can act on. The CLI prints them and exits with the error's `exit_code`
(1 for a problem with the data or the spec, 2 for a usage error; see pipeline/cli.py).

Every input problem is collected before stopping: a `WavebookError` carries the whole list,
so the user fixes everything in one round.
"""

from __future__ import annotations

from dataclasses import dataclass, field


@dataclass(frozen=True)
class Problem:
    """One problem found in an input: what rule failed, where, how often, and examples."""

    rule: str
    message: str
    severity: str = "error"  # "error" stops the run; "warning" is printed and recorded
    file: str | None = None
    column: str | None = None
    value: str | None = None
    count: int | None = None
    examples: tuple[str, ...] = field(default_factory=tuple)
    line: int | None = None  # line of the file (1 = the first line, e.g. a CSV header)

    def render(self) -> str:
        """One readable line: severity, where, the message, the count and up to five example ids."""
        where = ", ".join(
            part
            for part in (
                f"file {self.file}" if self.file else "",
                f"line {self.line}" if self.line is not None else "",
                f"column '{self.column}'" if self.column else "",
                f"value '{self.value}'" if self.value is not None else "",
            )
            if part
        )
        text = f"{self.severity}: [{self.rule}] {self.message}"
        if where:
            text += f" ({where})"
        if self.count is not None:
            text += f"; {self.count} row{'s' if self.count != 1 else ''}"
        if self.examples and all(e.startswith("row ") for e in self.examples):
            text += "; e.g. rows " + ", ".join(e.removeprefix("row ") for e in self.examples[:5])
        elif self.examples:
            text += "; e.g. ids " + ", ".join(self.examples[:5])
        return text


class WavebookError(Exception):
    """A problem with the user's spec or data. `problems` holds every problem found."""

    exit_code = 1

    def __init__(self, summary: str, problems: list[Problem] | None = None) -> None:
        self.summary = summary
        self.problems = list(problems or [])
        super().__init__(self.render())

    def render(self) -> str:
        """The summary followed by one line per problem."""
        lines = [self.summary]
        lines += ["  " + p.render() for p in self.problems]
        return "\n".join(lines)


class SpecError(WavebookError):
    """The study spec is invalid (unknown keys, wrong types, undeclared references...)."""


class DataError(WavebookError):
    """A data file breaks a rule (duplicate ids, codes outside the codebook, bad design values...)."""


class UsageError(WavebookError):
    """The command line itself is wrong (an option out of range, options that contradict); exit 2."""

    exit_code = 2
