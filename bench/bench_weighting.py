"""Time the weighting engine on 1,000,000 invented respondents against its targets.

1. Rake on 5 margins (age_band x sex 12, region 14, education 6, household 5, urban_rural 2:
   39 categories) starting from unequal design weights, then trim at 3.5 x mean and re-rake:
   target < 2 s (class building, raking on class totals, trimming, final replay).
2. 500 replays of the fitted recipe on perturbed class totals (bootstrap-like replicate totals):
   target < 1 s.
Prints wall and CPU times (CPU time is the fairer figure on a shared machine), their ratio to
the targets and peak memory; asserts nothing.

    python bench/bench_weighting.py [--n 1000000] [--replicates 500]
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
import tracemalloc
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SEED = 20261201
RAKE_TARGET_S = 2.0
REPLAY_TARGET_S = 1.0


def invented_sample(n: int, seed: int):  # noqa: ANN201
    """An invented sample: five weighting variables with unequal shares and unequal design weights."""
    import numpy as np
    import polars as pl

    rng = np.random.default_rng(seed)
    age = rng.choice(6, n, p=[0.08, 0.14, 0.17, 0.19, 0.2, 0.22]) + 1
    sex = rng.integers(1, 3, n)
    region = rng.integers(1, 15, n)
    education = np.clip(rng.poisson(1.5 + 0.3 * (age < 4), n), 0, 5) + 1
    household = rng.choice(5, n, p=[0.25, 0.35, 0.2, 0.15, 0.05]) + 1
    urban = np.where(rng.random(n) < 0.65, 1, 2)
    data = pl.DataFrame({
        "respondent_id": pl.int_range(0, n, eager=True).cast(pl.String),
        "age_band": age, "sex": sex, "region": region, "education": education, "household": household,
        "urban_rural": urban,
    })
    base = rng.uniform(50, 400, n) * np.where(region <= 3, 2.0, 1.0)
    return data, base


def targets(data):  # noqa: ANN001, ANN201
    """Invented population shares: each margin's sample shares tilted at random (up to about +-35%)."""
    import numpy as np
    import polars as pl

    from pipeline.weighting.targets import TargetTable

    rng = np.random.default_rng(SEED + 1)
    table = {}
    for margin in (("age_band", "sex"), ("region",), ("education",), ("household",), ("urban_rural",)):
        counts = data.group_by(list(margin)).len().sort(list(margin))
        p = counts["len"].to_numpy() * np.exp(rng.normal(0.0, 0.15, counts.height))
        keys = counts.select(pl.concat_list([pl.col(v).cast(pl.String) for v in margin])).to_series().to_list()
        table[" x ".join(margin)] = {tuple(k): float(v) for k, v in zip(keys, p / p.sum())}
    return TargetTable(table, source="bench")


def main() -> None:
    """Run both timings and print them."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=1_000_000)
    parser.add_argument("--replicates", type=int, default=500)
    args = parser.parse_args()
    sys.path.insert(0, str(ROOT))
    import numpy as np

    from pipeline.weighting.diagnostics import WeightSummary
    from pipeline.weighting.recipe import fit_recipe
    from pipeline.weighting.steps import RakeStep, TrimStep

    data, base = invented_sample(args.n, SEED)
    margins = (("age_band", "sex"), ("region",), ("education",), ("household",), ("urban_rural",))
    steps = [RakeStep(0, margins, targets(data), total=5_000_000.0, tolerance=1e-6),
             TrimStep(1, upper=3.5, lower=0.3, relative_to="mean")]
    fit_recipe(data.head(20_000), steps, base_weights=base[:20_000])  # warm imports and caches
    tracemalloc.start()
    start, cpu = time.perf_counter(), time.process_time()
    recipe = fit_recipe(data, steps, base_weights=base)
    rake_s, rake_cpu = time.perf_counter() - start, time.process_time() - cpu
    _, rake_peak = tracemalloc.get_traced_memory()
    tracemalloc.reset_peak()
    c = len(recipe.class_labels)
    rng = np.random.default_rng(SEED + 2)
    full = recipe.class_totals()
    totals = full[None, :] * rng.gamma(20.0, 1 / 20.0, size=(args.replicates, c))
    start, cpu = time.perf_counter(), time.process_time()
    factors = recipe.replay(totals)
    replay_s, replay_cpu = time.perf_counter() - start, time.process_time() - cpu
    _, replay_peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    s = WeightSummary.of(recipe.weights)
    rake_report, trim_report = recipe.reports
    print(f"respondents {args.n:,}; classes {c:,}; margins 5 (39 categories)")
    print(f"rake: {rake_report.iterations} cycles; trim: {trim_report.trimmed:,} weights at a bound, "
          f"{trim_report.iterations} refit round(s); final deff {s.deff:.3f}, efficiency {s.efficiency_pct:.1f}%")
    print(f"fit (classes + rake + trim + replay): {rake_s:.3f} s = {rake_s / RAKE_TARGET_S:.2f} x target "
          f"{RAKE_TARGET_S:.1f} s (CPU {rake_cpu:.3f} s); peak traced memory {rake_peak / 2**20:.0f} MiB")
    print(f"{args.replicates} replays on ({args.replicates}, {c}) class totals: {replay_s:.3f} s = "
          f"{replay_s / REPLAY_TARGET_S:.2f} x target {REPLAY_TARGET_S:.1f} s (CPU {replay_cpu:.3f} s); peak traced memory "
          f"{replay_peak / 2**20:.0f} MiB; factors finite: {bool(np.isfinite(factors).all())}")
    print(f"process peak resident memory {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MiB")


if __name__ == "__main__":
    main()
