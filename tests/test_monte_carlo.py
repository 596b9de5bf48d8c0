"""Monte Carlo truth: interval coverage and variance bias of Taylor, stratified jackknife and bootstrap.

A synthetic finite population (seeded) of H strata, each with N_h PSUs of M_i units, has a known
mean of y and share of q. Many stratified two-stage samples are drawn (n_h PSUs without
replacement per stratum, m units without replacement per PSU); in every sample the ratio
estimators of the mean and the share get a Taylor, a stratified-jackknife and a Rao-Wu bootstrap
variance. Truth: 95% t-intervals (df = PSUs - strata) cover the population value about 95% of the
time, and the average variance estimate is close to the empirical variance of the estimates
(the with-replacement PSU variance is nearly unbiased when n_h / N_h is small; Wolter 2007
section 1.4 / Rust & Rao 1996, from memory).

Everything is vectorised across samples: PSU totals are an (S, P, 2) array, jackknife replicate
totals one einsum with the (P, P) factors, bootstrap factors one (S * B, P) draw.
`bench/monte_carlo_large.py` runs the same simulation larger.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
import pytest

from pipeline.estimation.design import PsuLayout
from pipeline.estimation.estimands import Ratios
from pipeline.estimation.intervals import t_interval
from pipeline.estimation.replicate_variance import replicate_df, replicate_variance
from pipeline.estimation.replicates import make_replicates


@dataclass(frozen=True)
class Population:
    """Units in a padded (PSUs, M_max) layout: y and q values, NaN beyond each PSU's size."""

    stratum: np.ndarray  # (N_psu,) stratum of each population PSU
    size: np.ndarray  # (N_psu,) M_i
    y: np.ndarray  # (N_psu, M_max)
    q: np.ndarray  # (N_psu, M_max)

    @property
    def truth(self) -> np.ndarray:
        """Population mean of y and share of q."""
        return np.array([np.nanmean(self.y), np.nanmean(self.q)])


def make_population(*, strata: int = 10, psus_per_stratum: int = 300, seed: int = 2026) -> Population:
    """Strata differ in level, PSUs in a random effect (intra-cluster correlation), sizes 20-60."""
    rng = np.random.default_rng(seed)
    n_psu = strata * psus_per_stratum
    stratum = np.repeat(np.arange(strata), psus_per_stratum)
    size = rng.integers(20, 61, n_psu)
    m_max = int(size.max())
    level = rng.normal(50.0, 8.0, strata)[stratum] + rng.normal(0.0, 4.0, n_psu) + 0.1 * size
    y = level[:, None] + rng.gamma(2.0, 3.0, (n_psu, m_max))
    share = 1.0 / (1.0 + np.exp(-(rng.normal(-0.5, 0.6, strata)[stratum] + rng.normal(0.0, 0.5, n_psu))))
    q = (rng.random((n_psu, m_max)) < share[:, None]).astype(np.float64)
    beyond = np.arange(m_max)[None, :] >= size[:, None]
    y[beyond] = np.nan
    q[beyond] = np.nan
    return Population(stratum=stratum, size=size, y=y, q=q)


def draw_psu_totals(pop: Population, *, samples: int, psus: int, units: int, seed: int) -> np.ndarray:
    """(S, P, 4) weighted PSU totals [y, 1, q, 1] of S stratified two-stage samples.

    Weight of a unit: (N_h / n_h) * (M_i / m). Sampled PSUs are ordered by stratum (n_h per stratum).
    """
    rng = np.random.default_rng(seed)
    strata = int(pop.stratum.max()) + 1
    per_stratum = len(pop.stratum) // strata
    first = rng.random((samples, strata, per_stratum)).argsort(axis=2)[:, :, :psus]
    chosen = (first + (np.arange(strata) * per_stratum)[None, :, None]).reshape(samples, strata * psus)
    size = pop.size[chosen]  # (S, P)
    keys = rng.random((samples, strata * psus, pop.y.shape[1]))
    keys[np.arange(pop.y.shape[1])[None, None, :] >= size[..., None]] = np.inf
    pick = np.argpartition(keys, units - 1, axis=2)[..., :units]  # (S, P, m) distinct units
    ys = pop.y[chosen[..., None], pick].sum(axis=2)
    qs = pop.q[chosen[..., None], pick].sum(axis=2)
    expand = (per_stratum / psus) * size / units  # weight of every sampled unit of the PSU
    count = expand * units
    return np.stack([expand * ys, count, expand * qs, count], axis=2)


def simulate(
    pop: Population, *, samples: int, psus: int, units: int, bootstrap: int, seed: int
) -> dict[str, dict[str, np.ndarray]]:
    """Per method: estimates (S, 2), variances (S, 2) and df, for the mean of y and the share of q."""
    totals = draw_psu_totals(pop, samples=samples, psus=psus, units=units, seed=seed)  # (S, P, K)
    strata = int(pop.stratum.max()) + 1
    psu_stratum = np.repeat(np.arange(strata), psus)
    ratios = Ratios([0, 2], [1, 3])
    theta = ratios.value(totals.sum(axis=1))  # (S, 2)

    # Taylor: linearized PSU totals z = (y - theta x) / X (Woodruff 1971), variance by the design's
    # with-replacement PSU formula, samples in the columns
    x_total = totals[..., [1, 3]].sum(axis=1)  # (S, 2)
    z = (totals[..., [0, 2]] - theta[:, None, :] * totals[..., [1, 3]]) / x_total[:, None, :]  # (S, P, 2)
    layout = PsuLayout(
        psu_stratum=psu_stratum, stratum_labels=tuple(map(str, range(strata))), fraction=np.zeros(strata), single_psu="error"
    )
    v_taylor = layout.variance(z.transpose(1, 0, 2).reshape(len(psu_stratum), -1)).reshape(samples, 2)

    jk = make_replicates("stratified-jackknife", psu_stratum)
    theta_jk = ratios.value(np.einsum("rp,spk->rsk", jk.factors, totals))  # (R, S, 2)
    v_jk = replicate_variance(theta, theta_jk, jk)

    draws = make_replicates("bootstrap", psu_stratum, replicates=samples * bootstrap, seed=seed + 1)
    boot = dataclasses.replace(draws, factors=draws.factors[:bootstrap], multiplier=1.0 / bootstrap, multipliers=np.ones(bootstrap))
    factors = draws.factors.reshape(samples, bootstrap, len(psu_stratum))
    theta_bs = ratios.value(np.einsum("sbp,spk->bsk", factors, totals))  # (B, S, 2)
    v_bs = replicate_variance(theta, theta_bs, boot)

    df = len(psu_stratum) - strata
    return {
        "taylor": {"theta": theta, "v": v_taylor, "df": np.array(df)},
        "jackknife": {"theta": theta, "v": v_jk, "df": np.array(replicate_df(jk))},
        "bootstrap": {"theta": theta, "v": v_bs, "df": np.array(replicate_df(boot))},
    }


def summarise(result: dict[str, np.ndarray], truth: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(coverage of 95% t-intervals, mean variance estimate / empirical variance), per estimate."""
    low, high = t_interval(result["theta"], np.sqrt(result["v"]), float(result["df"]), level=0.95)
    coverage = ((low <= truth) & (truth <= high)).mean(axis=0)
    ratio = result["v"].mean(axis=0) / result["theta"].var(axis=0, ddof=1)
    return coverage, ratio


@pytest.fixture(scope="module")
def simulation():
    pop = make_population()
    return pop.truth, simulate(pop, samples=4000, psus=4, units=6, bootstrap=100, seed=7)


@pytest.mark.slow
@pytest.mark.parametrize("method", ["taylor", "jackknife", "bootstrap"])
def test_interval_coverage_and_variance_bias(simulation, method):
    truth, results = simulation
    coverage, ratio = summarise(results[method], truth)
    # Monte Carlo truth (own simulation, 4,000 samples): coverage SE about 0.35 points, so the
    # 93.5-96.5% band is over 4 SE; the variance ratio's SE is about sqrt(2/4000) = 2.2%, so 10% is 4.5 SE
    assert np.all((coverage >= 0.935) & (coverage <= 0.965)), coverage
    assert np.all(np.abs(ratio - 1.0) <= 0.10), ratio


@pytest.mark.slow
def test_jackknife_and_taylor_agree_sample_by_sample(simulation):
    _, results = simulation
    # cross-method consistency: for a ratio with 40 PSUs the two variances differ by second-order terms only
    rel = results["jackknife"]["v"] / results["taylor"]["v"]
    assert np.median(np.abs(rel - 1.0)) < 0.05
