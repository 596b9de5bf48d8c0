"""Wave over wave: the change of every banner cell from the previous wave (and from a reference wave).

Waves drawn as independent samples: the change d = theta_t - theta_s has variance

    v(d) = v(theta_t) + v(theta_s)

(independent estimators), tested with t = d / sqrt(v(d)) on the Welch-Satterthwaite degrees of
freedom v(d)^2 / (v_t^2 / df_t + v_s^2 / df_s) (Satterthwaite 1946, Biometrics Bulletin 2:110-114).

Waves that re-interview the same PSUs (`design.same_psus_across_waves = true`): the two waves are
stacked into one design (`pipeline.tables.stacked`), a PSU drawn in both contributing its
covariance: with z_hj(t) the PSU totals of the linearized values of wave t,

    v(d) = sum_h n_h/(n_h-1) sum_j ((z_hj(t) - z_hj(s)) - mean_h)^2,

the with-replacement PSU variance of the PSU totals of the difference (each wave's calibration
residuals kept within its own wave).
"""

from __future__ import annotations

import numpy as np
import polars as pl
from scipy import special

from pipeline.tables.significance import TEST_COLUMNS, mark, testable
from pipeline.tables.spec import TablesSpec

KEY = ["table", "row", "banner", "column"]


def satterthwaite(v_a: np.ndarray, df_a: np.ndarray, v_b: np.ndarray, df_b: np.ndarray) -> np.ndarray:
    """(v_a + v_b)^2 / (v_a^2 / df_a + v_b^2 / df_b) (Satterthwaite 1946); NaN when both variances are 0."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return (v_a + v_b) ** 2 / (v_a**2 / df_a + v_b**2 / df_b)


def wave_pairs(wave_ids: list[str], reference: str | None) -> list[tuple[str, str]]:
    """(wave, earlier wave) pairs: each wave with the previous one, and with `reference` when declared."""
    pairs = list(zip(wave_ids[1:], wave_ids[:-1], strict=True))
    if reference is not None:
        pairs += [(w, reference) for w in wave_ids if w != reference and (w, reference) not in pairs]
    return pairs


def wave_tests(cells: pl.DataFrame, spec: TablesSpec, wave_ids: list[str],
               stacked: dict[tuple[str, str], pl.DataFrame] | None = None) -> pl.DataFrame:
    """One "waves" test per cell and wave pair (`TEST_COLUMNS`); `stacked` gives the variances of
    the changes of waves stacked into one design, keyed by (wave, earlier wave), on `KEY`."""
    ok = cells.filter(testable(cells, spec)).select(*KEY, "wave", "variable", "statistic", "estimate", "se", "df")
    frames = []
    for wave, earlier in wave_pairs(wave_ids, spec.reference_wave):
        joined = ok.filter(pl.col("wave") == wave).join(ok.filter(pl.col("wave") == earlier), on=KEY, suffix="_b")
        if joined.height == 0:
            continue
        v_a, v_b = (joined["se"] ** 2).to_numpy(), (joined["se_b"] ** 2).to_numpy()
        var = v_a + v_b
        df = satterthwaite(v_a, joined["df"].to_numpy(), v_b, joined["df_b"].to_numpy())
        if stacked is not None and (wave, earlier) in stacked:
            same = joined.select(KEY).join(stacked[(wave, earlier)], on=KEY, how="left", maintain_order="left")
            var = same["variance"].to_numpy().astype(float)
            df = same["df"].to_numpy().astype(float)
        diff = (joined["estimate"] - joined["estimate_b"]).to_numpy()
        se = np.sqrt(np.maximum(var, 0.0))
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.where(se > 0, diff / se, np.nan)
        p = 2 * special.stdtr(df, -np.abs(t))  # t survival function
        frames.append(joined.select(
            pl.lit("waves").alias("comparison"), "wave", pl.lit(earlier).alias("wave_b"), "table", "variable", "row",
            "banner", pl.col("column").alias("column_a"), pl.col("column").alias("column_b"),
        ).with_columns(
            difference=pl.Series(diff), se_difference=pl.Series(se), statistic=pl.Series(t), df_num=pl.lit(1.0),
            df_den=pl.Series(df), p_value=pl.Series(p),
        ).with_columns(pl.col(c).fill_nan(None) for c in ("se_difference", "statistic", "p_value", "df_den")))
    if not frames:
        return pl.DataFrame(schema=TEST_COLUMNS)
    tests = pl.concat(frames, how="vertical_relaxed").with_columns(pl.col("row").cast(pl.Int32))
    return mark(tests, spec, group=["wave", "wave_b", "table", "row", "banner"])


def change_columns(cells: pl.DataFrame, tests: pl.DataFrame, wave_ids: list[str]) -> pl.DataFrame:
    """`cells` with change_from_previous, se_change and change_mark ("up"/"down" when significant)."""
    previous = dict(zip(wave_ids[1:], wave_ids[:-1], strict=True))
    change = tests.filter(pl.col("comparison") == "waves").filter(
        pl.col("wave_b") == pl.col("wave").replace_strict(previous, default=None)
    ).select(
        "wave", "table", "row", "banner", pl.col("column_a").alias("column"),
        pl.col("difference").alias("change_from_previous"), pl.col("se_difference").alias("se_change"),
        pl.when(pl.col("significant")).then(
            pl.when(pl.col("difference") > 0).then(pl.lit("up")).otherwise(pl.lit("down"))
        ).otherwise(pl.lit("")).alias("change_mark"),
    )
    return cells.join(change, on=["wave", *KEY], how="left").with_columns(pl.col("change_mark").fill_null(""))
