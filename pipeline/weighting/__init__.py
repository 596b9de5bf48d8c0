"""The weighting engine: base weights, nonresponse adjustment, post-stratification, raking,
trimming and calibration, fitted per wave as a replayable recipe with diagnostics.

Entry points: `parse_steps` (spec -> steps), `fit_recipe` (data + steps -> FittedRecipe),
`weigh_wave` (study database -> stored weights and diagnostics, in pipeline.weighting.store).
"""

from pipeline.weighting.diagnostics import WeightingReport, WeightSummary
from pipeline.weighting.recipe import FittedRecipe, fit_recipe
from pipeline.weighting.steps import Step, parse_steps

__all__ = ["FittedRecipe", "Step", "WeightSummary", "WeightingReport", "fit_recipe", "parse_steps"]
