"""What the tables of a run come to: `BannerTables` (cells, tests, notes, the Total's changes) and `ChanceMarks`."""

from __future__ import annotations

from dataclasses import dataclass, field

import polars as pl

from pipeline.tables.spec import TablesSpec


@dataclass(frozen=True)
class ChanceMarks:
    """How many marks chance alone would make: tests made, and tests x level for each level.

    If no difference existed, each test at level alpha marks with probability alpha, so the expected
    number of false marks is (number of tests) x alpha (linearity of expectation; with Holm or BH
    adjustment fewer). For the book's methodology.
    """

    tests: int
    levels: tuple[float, ...]

    @property
    def expected(self) -> tuple[float, ...]:
        """Expected chance marks at each level."""
        return tuple(self.tests * level for level in self.levels)

    def sentence(self) -> str:
        """The methodology sentence."""
        parts = " and ".join(f"about {e:,.0f} at the {100 * lv:g}% level" for e, lv in zip(self.expected,
                                                                                            self.levels, strict=True))
        return (f"The banner tables make {self.tests:,} significance tests. If nothing differed in the population, "
                f"chance alone would still mark {parts}: read single marks with care and look for patterns that "
                "repeat across waves and groups.")


@dataclass(frozen=True)
class BannerTables:
    """The result: cells (every wave, stub row and banner column, with marks; percentages 0-100), tests,
    chance marks, notes, and the Total's change from the previous wave for every variable (`totals`:
    wave, table, row, change_from_previous, se_change, change_mark). `spec` None: no `[tables]`."""

    cells: pl.DataFrame
    tests: pl.DataFrame
    chance: ChanceMarks
    spec: TablesSpec | None
    notes: tuple[str, ...] = ()
    totals: pl.DataFrame = field(default_factory=pl.DataFrame)
