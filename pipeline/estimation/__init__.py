"""Design-based estimation: design, group totals, estimators, Taylor and replicate variance, intervals.

Entry points: `estimate` (a polars DataFrame, one row per estimate) and `estimate_table` (the same as
an `EstimateTable`). The building blocks (`group_totals`, `Ratios`, `taylor_variance`, ...) are
importable from their modules for the tables and tests stages.
"""

from pipeline.estimation.api import estimate, estimate_table
from pipeline.estimation.design import PsuLayout, SampleDesign
from pipeline.estimation.estimands import Contrast, Ratios
from pipeline.estimation.result import Estimate, EstimateTable
from pipeline.estimation.taylor import Calibration, taylor_variance
from pipeline.estimation.totals import GroupTotals, group_totals

__all__ = [
    "Calibration",
    "Contrast",
    "Estimate",
    "EstimateTable",
    "GroupTotals",
    "PsuLayout",
    "Ratios",
    "SampleDesign",
    "estimate",
    "estimate_table",
    "group_totals",
    "taylor_variance",
]
