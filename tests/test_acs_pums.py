"""Supplied successive-difference replicate weights against the Census Bureau's published check table.

Source: U.S. Census Bureau, "PUMS Estimates for User Verification", ACS 2017-2021 5-year
(`../shared/reference/acs_pums_2017_2021_5yr/pums_estimates_17_21.csv`, see its SOURCE.md), and the
ACS PUMS User Guide section VII.B: Var = (4/80) sum_r (X_r - X)^2 around the full-sample estimate.
Every person characteristic the files allow is checked for WY, VT and DC: the weighted total and
its SE, each rounded to an integer, must equal the published values exactly.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline.estimation.replicate_variance import replicate_variance
from pipeline.estimation.replicates import supplied_factors, supplied_replicate_totals

FOLDER = Path(__file__).resolve().parents[1].parent / "shared" / "reference" / "acs_pums_2017_2021_5yr"
STATES = {"WY": "56", "VT": "50", "DC": "11"}
REPLICATES = [f"PWGTP{r}" for r in range(1, 81)]

pytestmark = pytest.mark.skipif(not FOLDER.is_dir(), reason=f"reference folder {FOLDER} is absent")


def characteristic(name: str) -> pl.Expr | None:
    """The person-level indicator of a published characteristic, or None if the files lack its variables."""
    if name == "Total population":
        return pl.lit(1.0)
    if name == "Total males (SEX=1)":
        return (pl.col("SEX") == 1).cast(pl.Float64)
    if name == "Total females (SEX=2)":
        return (pl.col("SEX") == 2).cast(pl.Float64)
    if name == "Age 85 and over":
        return (pl.col("AGEP") >= 85).cast(pl.Float64)
    ages = re.fullmatch(r"Age (\d+)-(\d+)", name)
    if ages:
        low, high = int(ages.group(1)), int(ages.group(2))
        return pl.col("AGEP").is_between(low, high).cast(pl.Float64)
    return None


def half_up(x: float) -> int:
    """Round half away from zero, as published tables round (not Python's round-half-even)."""
    return int(math.floor(x + 0.5))


@pytest.mark.parametrize("state", sorted(STATES))
def test_sdr_estimates_and_standard_errors_match_census_table(state):
    published = pl.read_csv(FOLDER / "pums_estimates_17_21.csv", schema_overrides={"ST": pl.Utf8}).filter(
        pl.col("ST") == STATES[state]
    )
    quantities = {
        row["CHARACTERISTIC"]: expr
        for row in published.iter_rows(named=True)
        if (expr := characteristic(row["CHARACTERISTIC"])) is not None
    }
    assert len(quantities) == 16  # total, males, females and the 13 age groups
    persons = pl.read_csv(
        FOLDER / f"acs_pums_2017_2021_5yr_person_{state}.csv",
        columns=["AGEP", "SEX", "PWGTP", *REPLICATES],
    )
    estimate = supplied_replicate_totals(persons, quantities, ["PWGTP"])[0]
    replicate = supplied_replicate_totals(persons, quantities, REPLICATES, source=f"person_{state}.csv")
    rf = supplied_factors("sdr", len(REPLICATES))
    se = np.sqrt(replicate_variance(estimate, replicate, rf))
    expected = {row["CHARACTERISTIC"]: row for row in published.iter_rows(named=True)}
    mismatches = [
        (name, half_up(estimate[k]), half_up(se[k]), expected[name]["PUMS_EST_17_TO_21"], expected[name]["PUMS_SE_17_TO_21"])
        for k, name in enumerate(quantities)
        if (half_up(estimate[k]), half_up(se[k]))
        != (expected[name]["PUMS_EST_17_TO_21"], expected[name]["PUMS_SE_17_TO_21"])
    ]
    # Census "PUMS Estimates for User Verification" 2017-2021: estimate and SE equal after rounding
    assert mismatches == []
