"""Two waves that re-interview the same PSUs, stacked into one design for the variance of their changes.

With `design.same_psus_across_waves = true`, the rows of waves s and t are put into one frame
(a wave indicator added), each wave's weighting classes numbered after the other's, and ONE
grouped pass estimates every cell of both waves: the cell of wave w in column d is the ratio of
the totals of y a d 1[wave = w] and a d 1[wave = w]. A PSU drawn in both waves then holds both
waves' linearized values, so the variance of the change theta_t - theta_s is the PSU variance of
z_hj(t) - z_hj(s) (`wave_change` module docstring), their covariance included. Each wave keeps its
own weighting: the replay maps the stacked class totals to each wave's recipe, and the
calibration residuals use the block-diagonal auxiliary matrix, so each wave is calibrated within
itself. The two waves' respondents are different people, so the within-PSU products of a wave-s
and a wave-t quantity vanish.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import polars as pl

from pipeline.estimation.options import VarianceOptions
from pipeline.staging.spec import Study
from pipeline.tables.banners import Banner
from pipeline.tables.cells import WavePlan, plan_wave
from pipeline.tables.fit import DesignInputs, fit_wave
from pipeline.tables.spec import TablesSpec
from pipeline.weighting import FittedRecipe

WAVE = "__wave"


@dataclass(frozen=True)
class WaveRows:
    """One wave's weighted rows (`pipeline.tables.wave_frame` plus derived columns), recipe and layout."""

    wave: str
    frame: pl.DataFrame
    recipe: FittedRecipe
    layout: pl.DataFrame
    inputs: DesignInputs


def _in_wave(banners: dict[str, Banner], wave: str) -> dict[str, Banner]:
    """The banners with every column restricted to `wave` (keys prefixed by the wave)."""
    return {name: Banner(name, tuple(replace(c, key=f"{wave}|{c.key}", domain=c.domain & (pl.col(WAVE) == wave))
                                     for c in b.columns)) for name, b in banners.items()}


def _reweight(recipes: list[FittedRecipe]):  # noqa: ANN202 - a replay function
    sizes = [len(r.class_labels) for r in recipes]
    edges = np.cumsum([0, *sizes])

    def replay(totals: np.ndarray) -> np.ndarray:
        totals = np.atleast_2d(totals)
        return np.concatenate([r.replay(totals[:, a:b]) for r, a, b in zip(recipes, edges[:-1], edges[1:],
                                                                           strict=True)], axis=1)
    return replay, edges


def _block_diagonal(blocks: list[np.ndarray]) -> np.ndarray | None:
    blocks = [np.asarray(b, dtype=np.float64) for b in blocks]
    if not any(b.shape[1] for b in blocks):
        return None
    out = np.zeros((sum(b.shape[0] for b in blocks), sum(b.shape[1] for b in blocks)))
    r = c = 0
    for b in blocks:
        out[r:r + b.shape[0], c:c + b.shape[1]] = b
        r, c = r + b.shape[0], c + b.shape[1]
    return out


def stacked_change_variance(study: Study, spec: TablesSpec, banners: dict[str, Banner], options: VarianceOptions,
                            earlier: WaveRows, later: WaveRows, *, weight: str, classes: str) -> pl.DataFrame:
    """Variance and df of the change of every cell from `earlier` to `later`, on the stacked design.

    Returns (table, row, banner, column, variance, df) on the cells' scale (percentage points for
    percentages); df is the smaller of the two cells' domain degrees of freedom.
    """
    replay, edges = _reweight([earlier.recipe, later.recipe])
    frames = []
    for rows, offset in ((earlier, 0), (later, int(edges[1]))):
        frames.append(rows.frame.with_columns(pl.lit(rows.wave).alias(WAVE), (pl.col(classes) + offset).alias(classes)))
    stacked = pl.concat(frames, how="diagonal_relaxed")
    wp = WavePlan()
    for rows in (earlier, later):
        plan_wave(study, spec, _in_wave(banners, rows.wave), rows.layout, into=wp, medians=False, joints=False)
    calibration = _block_diagonal([earlier.recipe.calibration_matrix(), later.recipe.calibration_matrix()])
    inputs = replace(later.inputs, reweight=replay, calibration_matrix=calibration)
    state = fit_wave(stacked, wp.plan, {}, inputs, weight=weight)
    refs = {}
    for ref in wp.refs:
        wave, key = ref.column.key.split("|", 1)
        refs[(wave, ref.table, ref.row, ref.banner, key)] = ref
    pairs = [(ref, refs.get((earlier.wave, ref.table, ref.row, ref.banner, key)))
             for (wave, _, _, _, key), ref in refs.items() if wave == later.wave]
    pairs = [(a, b) for a, b in pairs if b is not None and a.statistic in ("percent", "balance", "mean")]
    a = np.array([p[0].estimator for p in pairs], dtype=np.int64)
    b = np.array([p[1].estimator for p in pairs], dtype=np.int64)
    cross = state.cross([(None, None, None, None)] * len(pairs)) if state.within is not None else None
    scale = np.array([100.0 if p[0].statistic in ("percent", "balance") else 1.0 for p in pairs])
    variance = state.difference_variance(a, b, cross) * scale**2
    return pl.DataFrame({
        "table": [p[0].table for p in pairs], "row": [p[0].row for p in pairs],
        "banner": [p[0].banner for p in pairs], "column": [p[0].column.key.split("|", 1)[1] for p in pairs],
        "variance": variance, "df": np.minimum(state.domain_df[a], state.domain_df[b]),
    }, schema_overrides={"row": pl.Int32})
