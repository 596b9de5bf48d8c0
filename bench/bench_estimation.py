"""Benchmark: Taylor vs replicate variances from group totals vs the dense respondent-by-replicate method.

Data (invented, seeded): n = 1,000,000 respondents in 100 strata x 4 PSUs, base weights, three
raking margins (age 6 x sex 2 x region 5 = 60 weighting classes), a banner of 10 columns and
three questions of 10 categories: 300 estimate cells (proportions in domains), K = 311 totals.

What each timing counts:
  grouped pass   the project's `group_totals` (all 311 quantities): group key factorised once,
                 weights summed per (group, distinct answer combination), then matrix products.
  cross-tab pass a hand-written pass for this benchmark's categorical cells only (one weighted
                 bincount per question), kept as a yardstick for `group_totals`.
  Taylor         grouped pass + raking of the full sample on class totals + calibration-residual
                 Taylor variances of the 300 cells (`taylor_variance`).
  jackknife      grouped pass + 400 stratified-jackknife replicates, raking replayed in every
                 replicate on class totals (helper W's raking engine `pipeline.weighting.ipf.rake`, all replicates at
                 once) + replicate totals (`replicate_totals`) + variances.
  bootstrap      the same with 500 Rao-Wu bootstrap replicates.
  replicate totals alone  `replicate_totals` in its two dense formulations, the (PSU, class)
                 layout product (chosen here) and the (R, G) group product (used before it), for
                 the bootstrap and for Fay's BRR (rho = 0.5) on the same groups with each stratum's
                 4 PSUs split into 2 pairs; with the floating-point rate of each over the R*P*C*K
                 multiply-adds that both perform (the machine's BLAS peak bounds them).
  dense          the plain method on a random subsample of `--dense-rows` respondents, extrapolated
                 linearly to n (its matrices would not fit in 4 GB at full size: n x R replicate
                 weights plus n x K indicators, about 5.7 GB for R = 400): build the n x K
                 indicator matrix, build the n x R replicate weights (base weight x PSU factor x
                 replayed class factor, the replay itself not counted), then W' Y (numpy).
Each timing is the best of `--repeats` runs (the machine may be shared), with the CPU time of
the process over the same runs (best of the repeats; above wall time when threads run in parallel,
its ratio to wall time shows how much of a shared machine a step got). Peak memory is the
process's maximum resident set size (grouped methods and the dense subsample run in separate
processes). Prints figures and ratios; asserts nothing.

    python bench/bench_estimation.py [--rows 1000000] [--dense-rows 100000] [--repeats 3]
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import replace
from pathlib import Path
from typing import TypeVar

import numpy as np
import polars as pl

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from pipeline.estimation.design import PsuLayout  # noqa: E402
from pipeline.estimation.estimands import Ratios  # noqa: E402
from pipeline.estimation.replicate_variance import replicate_variance  # noqa: E402
from pipeline.estimation.replicates import make_replicates, replicate_totals, reweighted_totals  # noqa: E402
from pipeline.estimation.taylor import Calibration, taylor_variance  # noqa: E402
from pipeline.estimation.totals import GroupTotals, group_totals  # noqa: E402
from pipeline.weighting.classes import Margin  # noqa: E402
from pipeline.weighting.ipf import rake  # noqa: E402
from pipeline.weighting.recipe import reference_coded  # noqa: E402

STRATA, PSUS, BANNER, QUESTIONS, CATEGORIES = 100, 4, 10, 3, 10
AGE, SEX, REGION = 6, 2, 5
JACKKNIFE_REPLICATES, BOOTSTRAP_REPLICATES = STRATA * PSUS, 500
T = TypeVar("T")


def make_data(rows: int, seed: int = 11) -> pl.DataFrame:
    """Invented respondents: design, weighting variables, banner and three 10-category questions."""
    rng = np.random.default_rng(seed)
    psu = rng.integers(0, STRATA * PSUS, rows)
    age, sex, region = rng.integers(0, AGE, rows), rng.integers(0, SEX, rows), rng.integers(0, REGION, rows)
    segment = rng.integers(0, BANNER, rows)
    cols = {
        "stratum": psu // PSUS,
        "psu": psu % PSUS,
        "w0": rng.uniform(50.0, 150.0, rows),
        "cls": (age * SEX + sex) * REGION + region,
        "segment": segment,
    }
    psu_effect = rng.normal(0.0, 0.4, STRATA * PSUS)[psu]
    for q in range(QUESTIONS):
        score = rng.normal(0.0, 1.0, rows) + psu_effect + 0.1 * segment + 0.2 * age
        cols[f"q{q}"] = np.clip(np.floor(score * 2.0 + 5.0), 0, CATEGORIES - 1).astype(np.int64)
    return pl.DataFrame(cols)


def quantities() -> tuple[dict[str, pl.Expr], Ratios]:
    """K = 311 quantities (1, 10 banner indicators, 300 category-in-column indicators) and the 300 proportions."""
    q: dict[str, pl.Expr] = {"one": pl.lit(1.0)}
    for d in range(BANNER):
        q[f"col{d}"] = (pl.col("segment") == d).cast(pl.Float64)
    num, den = [], []
    for d in range(BANNER):
        for k in range(QUESTIONS):
            for a in range(CATEGORIES):
                num.append(len(q))
                den.append(1 + d)
                q[f"q{k}={a}|col{d}"] = ((pl.col(f"q{k}") == a) & (pl.col("segment") == d)).cast(pl.Float64)
    return q, Ratios(num, den)


def margins(population: float) -> list[Margin]:
    """Raking margins on the 60 classes, with invented population shares."""
    cls = np.arange(AGE * SEX * REGION)
    age, sex, region = cls // (SEX * REGION), (cls // REGION) % SEX, cls % REGION
    shares = {
        "age": (age, np.array([0.12, 0.17, 0.18, 0.18, 0.17, 0.18])),
        "sex": (sex, np.array([0.49, 0.51])),
        "region": (region, np.array([0.22, 0.18, 0.25, 0.15, 0.20])),
    }
    return [
        Margin(name, (name,), tuple(map(str, range(len(s)))), of_class, s * population, "count")
        for name, (of_class, s) in shares.items()
    ]


def make_reweight(population: float):
    """The raking replay: (R, C) class totals of base weights -> (R, C) class factors."""
    ms = margins(population)

    def reweight(b: np.ndarray) -> np.ndarray:
        fit = rake(b.T, ms, np.full(b.shape[0], population), tolerance=1e-8, max_iterations=200)
        return fit.factors.T

    return reweight, ms


def crosstab_totals(frame: pl.DataFrame, names: tuple[str, ...]) -> GroupTotals:
    """The same group totals as `group_totals` for this benchmark's categorical cells, by cross-tabulation.

    Every quantity here is an indicator of (banner column d, answer a to question k), so one
    weighted bincount per question over the integer code (group, d, a) gives all its cells: three
    narrow aggregations instead of 311 weighted sums. The group key is factorised once through
    its (dense, integer) code range. The bench's own sketch of a faster grouped pass for
    categorical cells.
    """
    key = ((frame["stratum"] * PSUS + frame["psu"]) * (AGE * SEX * REGION) + frame["cls"]).to_numpy()
    present = np.flatnonzero(np.bincount(key, minlength=STRATA * PSUS * AGE * SEX * REGION))
    rank = np.zeros(STRATA * PSUS * AGE * SEX * REGION, dtype=np.int64)
    rank[present] = np.arange(len(present))
    g = rank[key]
    groups = len(present)
    w = frame["w0"].to_numpy()
    d = frame["segment"].to_numpy()
    cells = BANNER * CATEGORIES
    totals = np.zeros((groups, len(names)))
    counts = np.zeros((groups, len(names)), dtype=np.int64)
    column = 1 + BANNER + (np.arange(BANNER)[:, None] * QUESTIONS * CATEGORIES + np.arange(CATEGORIES)[None, :]).ravel()
    for k in range(QUESTIONS):
        code = (g * BANNER + d) * CATEGORIES + frame[f"q{k}"].to_numpy()
        totals[:, column + k * CATEGORIES] = np.bincount(code, weights=w, minlength=groups * cells).reshape(groups, cells)
        counts[:, column + k * CATEGORIES] = np.bincount(code, minlength=groups * cells).reshape(groups, cells)
    by_column = (g * BANNER + d)
    totals[:, 1 : 1 + BANNER] = np.bincount(by_column, weights=w, minlength=groups * BANNER).reshape(groups, BANNER)
    counts[:, 1 : 1 + BANNER] = np.bincount(by_column, minlength=groups * BANNER).reshape(groups, BANNER)
    totals[:, 0] = totals[:, 1 : 1 + BANNER].sum(axis=1)
    counts[:, 0] = counts[:, 1 : 1 + BANNER].sum(axis=1)
    cls = present % (AGE * SEX * REGION)
    psu = present // (AGE * SEX * REGION)
    return GroupTotals(
        stratum=psu // PSUS,
        psu=psu,
        cls=cls,
        totals=totals,
        counts=counts,
        columns=names,
        psu_stratum=np.repeat(np.arange(STRATA), PSUS),
        stratum_labels=tuple(map(str, range(STRATA))),
        psu_labels=tuple(map(str, range(STRATA * PSUS))),
    )


def best_of_with_cpu(repeats: int, step: Callable[[], T]) -> tuple[T, float, float]:
    """Run `step` `repeats` times: its last result, the shortest wall-clock time (filters load from other
    jobs) and the shortest process CPU time."""
    walls, cpus = [], []
    for _ in range(repeats):
        start, cpu = time.perf_counter(), time.process_time()
        result = step()
        walls.append(time.perf_counter() - start)
        cpus.append(time.process_time() - cpu)
    return result, min(walls), min(cpus)


def timed(out: dict, name: str, repeats: int, step: Callable[[], T]) -> T:
    """Time `step` (best of `repeats`) into out[name] (wall seconds) and out[name + "_cpu"] (CPU seconds)."""
    result, out[name], out[f"{name}_cpu"] = best_of_with_cpu(repeats, step)
    return result


def grouped_phase(rows: int, repeats: int) -> dict:
    """Both grouped passes, then Taylor, jackknife and bootstrap timings from the group totals."""
    frame = make_data(rows)
    q, ratios = quantities()
    population = float(frame["w0"].sum()) * 1.05
    reweight, ms = make_reweight(population)
    out: dict = {"rows": rows, "K": len(q), "cells": len(ratios)}

    gt = timed(
        out, "grouped_pass", repeats,
        lambda: group_totals(frame, q, weight="w0", strata="stratum", psu="psu", classes="cls"),
    )
    out["groups"] = len(gt.psu)
    out["peak_rss_mb_after_pass"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    fast = timed(out, "crosstab_pass", repeats, lambda: crosstab_totals(frame, tuple(q)))
    out["crosstab_max_rel_diff"] = float(np.max(np.abs(fast.totals - gt.totals)) / np.max(np.abs(gt.totals)))
    out["crosstab_counts_equal"] = bool(np.array_equal(fast.counts, gt.counts))

    def taylor() -> tuple[np.ndarray, np.ndarray]:
        theta = ratios.value(reweighted_totals(gt, reweight=reweight, base="one"))
        f_full = reweight(gt.class_totals(gt.totals[:, [0]]).T)[0]
        final = replace(gt, totals=gt.totals * f_full[gt.cls][:, None])
        layout = PsuLayout(gt.psu_stratum, gt.stratum_labels, np.zeros(gt.n_strata), "error")
        _, v = taylor_variance(final, ratios, layout, calibration=Calibration(reference_coded(ms)[0], 0))
        return theta, v

    theta, v_taylor = timed(out, "taylor_after_pass", repeats, taylor)

    methods = (("jackknife", "stratified-jackknife", None), ("bootstrap", "bootstrap", BOOTSTRAP_REPLICATES))
    for name, method, reps in methods:

        def replicate(method: str = method, reps: int | None = reps) -> tuple[np.ndarray, int]:
            rf = make_replicates(method, gt.psu_stratum, replicates=reps, seed=5)
            theta_r = ratios.value(replicate_totals(gt, rf, reweight=reweight, base="one"))
            return replicate_variance(theta, theta_r, rf), rf.n_replicates

        v, n_rep = timed(out, f"{name}_after_pass", repeats, replicate)
        out[f"{name}_replicates"] = n_rep
        out[f"{name}_se_ratio_median"] = float(np.median(np.sqrt(v / v_taylor)))
    # Fay's BRR needs 2 PSUs per stratum: the same groups with the 4 PSUs of a stratum split into 2 pairs
    paired = replace(gt, stratum=gt.psu // 2, psu_stratum=np.arange(gt.n_psus) // 2,
                     stratum_labels=tuple(map(str, range(gt.n_psus // 2))))
    for name, g, rf in (
        ("bootstrap", gt, make_replicates("bootstrap", gt.psu_stratum, replicates=BOOTSTRAP_REPLICATES, seed=5)),
        ("fay", paired, make_replicates("fay", paired.psu_stratum, fay=0.5)),
    ):
        by_how = {
            how: timed(out, f"{name}_totals_{how}", repeats,
                       lambda how=how, g=g, rf=rf: replicate_totals(g, rf, reweight=reweight, base="one", how=how))
            for how in ("layout", "groups")
        }
        out[f"{name}_totals_max_rel_diff"] = float(
            np.max(np.abs(by_how["layout"] - by_how["groups"])) / np.max(np.abs(by_how["groups"]))
        )
        out[f"{name}_totals_gflop"] = 2.0 * rf.n_replicates * g.n_psus * g.n_classes * len(q) / 1e9
        out[f"{name}_totals_replicates"] = rf.n_replicates
    out["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return out


def dense_phase(rows: int, sample: int, repeats: int) -> dict:
    """The plain method on a random subsample: n_s x K indicators, n_s x R replicate weights, W' Y."""
    frame = make_data(rows)
    q, ratios = quantities()
    population = float(frame["w0"].sum()) * 1.05
    reweight, _ = make_reweight(population)
    gt = group_totals(frame, {"one": pl.lit(1.0)}, weight="w0", strata="stratum", psu="psu", classes="cls")
    rf = make_replicates("stratified-jackknife", gt.psu_stratum)
    by_psu_class = np.zeros((gt.n_psus, gt.n_classes))
    np.add.at(by_psu_class, (gt.psu, gt.cls), gt.totals[:, 0])
    f = reweight(rf.factors @ by_psu_class)  # the replay, shared with the grouped method and not counted here
    sub = frame.sample(n=sample, seed=3)
    psu_index = (sub["stratum"] * PSUS + sub["psu"]).to_numpy()
    cls = sub["cls"].to_numpy()
    w0 = sub["w0"].to_numpy()[:, None]
    y, y_seconds, y_cpu = best_of_with_cpu(repeats, lambda: sub.select([e.alias(k) for k, e in q.items()]).to_numpy())
    w, w_seconds, w_cpu = best_of_with_cpu(repeats, lambda: w0 * rf.factors.T[psu_index] * f.T[cls])
    t_r, product_seconds, product_cpu = best_of_with_cpu(repeats, lambda: w.T @ y)
    ratios.value(t_r)
    scale = rows / sample
    return {
        "dense_rows": sample,
        "dense_y_seconds": y_seconds * scale,
        "dense_w_seconds": w_seconds * scale,
        "dense_product_seconds": product_seconds * scale,
        "dense_seconds_extrapolated": (y_seconds + w_seconds + product_seconds) * scale,
        "dense_cpu_extrapolated": (y_cpu + w_cpu + product_cpu) * scale,
        "dense_peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "dense_full_matrices_gb": rows * (rf.n_replicates + len(q)) * 8 / 1e9,
    }


def run_phase(args: list[str]) -> dict:
    done = subprocess.run([sys.executable, __file__, *args], capture_output=True, text=True, check=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> None:
    """Run both phases in fresh processes and print the figures and ratios."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--dense-rows", type=int, default=100_000)
    parser.add_argument("--repeats", type=int, default=3, help="best of this many runs per timed step")
    parser.add_argument("--phase", choices=["grouped", "dense"])
    args = parser.parse_args()
    if args.phase == "grouped":
        print(json.dumps(grouped_phase(args.rows, args.repeats)))
        return
    if args.phase == "dense":
        print(json.dumps(dense_phase(args.rows, args.dense_rows, args.repeats)))
        return
    common = ["--rows", str(args.rows), "--repeats", str(args.repeats)]
    g = run_phase(["--phase", "grouped", *common])
    d = run_phase(["--phase", "dense", *common, "--dense-rows", str(args.dense_rows)])
    dense = d["dense_seconds_extrapolated"]
    print(f"n = {g['rows']:,} respondents, {STRATA} strata x {PSUS} PSUs, {g['groups']:,} groups, "
          f"{g['cells']} cells (K = {g['K']} totals), 60 raking classes")
    print(f"dense method, extrapolated from {d['dense_rows']:,} rows: {dense:.1f} s wall, "
          f"{d['dense_cpu_extrapolated']:.1f} s CPU (indicators {d['dense_y_seconds']:.1f} s, "
          f"n x R weights {d['dense_w_seconds']:.1f} s, W'Y {d['dense_product_seconds']:.1f} s); its full matrices "
          f"would need {d['dense_full_matrices_gb']:.1f} GB")
    print(f"cross-tab pass equals group_totals: max relative difference {g['crosstab_max_rel_diff']:.1e}, "
          f"counts equal {g['crosstab_counts_equal']}")
    for label, key in (("project's group_totals pass", "grouped_pass"), ("bench's cross-tab pass", "crosstab_pass")):
        taylor = g[key] + g["taylor_after_pass"]
        taylor_cpu = g[f"{key}_cpu"] + g["taylor_after_pass_cpu"]
        print(f"-- with the {label}: {g[key]:.2f} s wall, {g[f'{key}_cpu']:.2f} s CPU")
        print(f"   Taylor (pass + raking + calibrated variance)        {taylor:7.2f} s ({taylor_cpu:5.2f} s CPU)   "
              f"{dense / taylor:6.1f} x faster than dense")
        for name in ("jackknife", "bootstrap"):
            total = g[key] + g[f"{name}_after_pass"]
            total_cpu = g[f"{key}_cpu"] + g[f"{name}_after_pass_cpu"]
            print(f"   {name:<9} R = {g[f'{name}_replicates']:<4} (pass + replay + variance) {total:7.2f} s ({total_cpu:5.2f} s CPU)   "
                  f"{dense / total:6.1f} x faster than dense (target >= 20)   {total / taylor:5.2f} x Taylor (target <= 2)")
    for name in ("jackknife", "bootstrap"):
        print(f"{name}: after the pass {g[f'{name}_after_pass']:.2f} s ({g[f'{name}_after_pass_cpu']:.2f} s CPU); "
              f"median SE / Taylor SE {g[f'{name}_se_ratio_median']:.3f}")
    for name, design in (("bootstrap", f"{STRATA} strata x {PSUS} PSUs"), ("fay", f"{STRATA * PSUS // 2} strata x 2 PSUs")):
        flop = g[f"{name}_totals_gflop"]
        print(f"{name} replicate totals alone, R = {g[f'{name}_totals_replicates']}, {design} ({flop:.1f} GFLOP of "
              f"multiply-adds; the two results differ by {g[f'{name}_totals_max_rel_diff']:.1e} relative):")
        for how, label in (("layout", "(PSU, class) layout product"), ("groups", "(R, G) group product      ")):
            wall, cpu = g[f"{name}_totals_{how}"], g[f"{name}_totals_{how}_cpu"]
            print(f"   {label} {wall:6.3f} s wall ({cpu:5.3f} s CPU)   {flop / wall:5.1f} GFLOP/s wall, "
                  f"{flop / cpu:5.1f} per CPU second")
    print(f"peak memory: grouped methods {g['peak_rss_mb']:,.0f} MB (after the group_totals pass "
          f"{g['peak_rss_mb_after_pass']:,.0f} MB; target < 4096 MB); dense subsample {d['dense_peak_rss_mb']:,.0f} MB")


if __name__ == "__main__":
    main()
