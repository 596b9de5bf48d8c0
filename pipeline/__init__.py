"""wavebook: stage, weight and estimate tracking-survey waves, and publish an HTML result book.

The package is a set of small stage modules; the `wavebook` command (`pipeline.cli`) is a thin
layer over them. Heavy libraries (polars, duckdb, scipy) are imported inside the modules that
need them, so that `wavebook --help` stays fast.
"""

__version__ = "0.1.0"
