"""Design-based estimation: design, group totals, estimators, Taylor and replicate variance, intervals."""
