"""Larger Monte Carlo run of `tests/test_monte_carlo.py`: coverage and variance ratios per design.

For several designs (PSUs per stratum n_h, units per PSU m) it draws many stratified two-stage
samples from the same seeded synthetic population and prints, for Taylor, the stratified
jackknife and the Rao-Wu bootstrap: the coverage of 95% t-intervals (df = PSUs - strata) for
the mean of y and the share of q, and the mean variance estimate over the empirical variance of
the estimates, with their Monte Carlo standard errors. Asserts nothing.

    python bench/monte_carlo_large.py [--samples 20000] [--bootstrap 200]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from tests.test_monte_carlo import make_population, simulate, summarise  # noqa: E402

DESIGNS = ((2, 6), (4, 6), (8, 4))  # (PSUs per stratum, units per PSU)
BATCH = 4000  # samples simulated at once (bounds memory)


def main() -> None:
    """Print one line per design and method."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=int, default=20_000)
    parser.add_argument("--bootstrap", type=int, default=200)
    args = parser.parse_args()
    pop = make_population()
    truth = pop.truth
    print(f"population: mean of y {truth[0]:.4f}, share of q {truth[1]:.4f}; {args.samples:,} samples per design")
    for psus, units in DESIGNS:
        start = time.perf_counter()
        batches = [
            simulate(pop, samples=min(BATCH, args.samples - s), psus=psus, units=units, bootstrap=args.bootstrap, seed=100 + s)
            for s in range(0, args.samples, BATCH)
        ]
        seconds = time.perf_counter() - start
        print(f"-- {psus} PSUs per stratum, {units} units per PSU ({seconds:.1f} s)")
        for method in batches[0]:
            merged = {
                key: np.concatenate([b[method][key] for b in batches]) if key != "df" else batches[0][method]["df"]
                for key in batches[0][method]
            }
            coverage, ratio = summarise(merged, truth)
            n = len(merged["theta"])
            cov_se = np.sqrt(coverage * (1 - coverage) / n)
            print(
                f"   {method:<9} coverage mean {coverage[0]:.4f} share {coverage[1]:.4f} (MC SE {cov_se.max():.4f}); "
                f"variance ratio mean {ratio[0]:.3f} share {ratio[1]:.3f} (MC SE about {np.sqrt(2 / n):.3f})"
            )


if __name__ == "__main__":
    main()
