"""Size-proportional first stages: no equal-probability FPC; the (1 - pi) approximation with PSU inclusion probabilities."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

from conftest import TRACKER_SPEC
from pipeline.book.render import _design_lines
from pipeline.errors import SpecError
from pipeline.estimation import estimate
from pipeline.staging.spec import load_spec


def _pps_sample(seed: int = 7) -> pl.DataFrame:
    """Invented: 2 strata of 4 and 5 PSUs with inclusion probabilities pi_hj, 5-8 respondents each."""
    rng = np.random.default_rng(seed)
    rows = []
    for stratum, n_psu in (("A", 4), ("B", 5)):
        for j in range(n_psu):
            pi = float(rng.uniform(0.1, 0.6))
            effect = rng.normal(0, 1)
            for _ in range(int(rng.integers(5, 9))):
                rows.append({"h": stratum, "j": j, "pi": pi, "w": float(rng.uniform(30, 90)),
                             "y": float(effect + rng.normal(0, 2))})
    return pl.DataFrame(rows)


def _by_hand(frame: pl.DataFrame, u: np.ndarray) -> float:
    """sum_h n_h/(n_h-1) sum_j (1 - pi_hj)(z_hj - zbar_h)^2 + sum_hj pi_hj v2(z_hj) (design module docstring:
    Hajek 1964 simplified form, from memory; within-PSU term as in Cochran 1977 section 11.9 with pi_hj for f_h)."""
    h, j, pi = frame["h"].to_numpy(), frame["j"].to_numpy(), frame["pi"].to_numpy()
    v = 0.0
    for s in np.unique(h):
        ids = np.unique(j[h == s])
        z = np.array([u[(h == s) & (j == p)].sum() for p in ids])
        p_j = np.array([pi[(h == s) & (j == p)][0] for p in ids])
        v += len(ids) / (len(ids) - 1) * ((1 - p_j) * (z - z.mean()) ** 2).sum()
        for p, pij in zip(ids, p_j, strict=True):
            uj = u[(h == s) & (j == p)]
            v += pij * len(uj) / (len(uj) - 1) * ((uj - uj.mean()) ** 2).sum()
    return v


def test_pps_first_stage_without_inclusion_probabilities_is_with_replacement() -> None:
    frame = _pps_sample()
    pps = estimate(frame, weight="w", strata="h", psu="j", mean="y", total="y", first_stage="pps")
    plain = estimate(frame, weight="w", strata="h", psu="j", mean="y", total="y")
    assert pps["se"].to_list() == plain["se"].to_list()  # identity: no FPC is the with-replacement formula
    with pytest.raises(SpecError):
        estimate(frame, weight="w", strata="h", psu="j", mean="y", first_stage="pps", population_size={"A": 10, "B": 12})


def test_pps_inclusion_probabilities_give_the_one_minus_pi_approximation() -> None:
    frame = _pps_sample()
    out = estimate(frame, weight="w", strata="h", psu="j", total="y", mean="y", first_stage="pps", psu_inclusion="pi")
    w, y = frame["w"].to_numpy(), frame["y"].to_numpy()
    total = out.filter(pl.col("statistic") == "total").row(0, named=True)
    assert total["se"] ** 2 == pytest.approx(_by_hand(frame, w * y), rel=1e-10)
    mean = out.filter(pl.col("statistic") == "mean").row(0, named=True)
    ybar = (w * y).sum() / w.sum()
    assert mean["se"] ** 2 == pytest.approx(_by_hand(frame, w * (y - ybar) / w.sum()), rel=1e-10)


def test_equal_inclusion_probabilities_equal_the_fpc_path() -> None:
    frame = _pps_sample().with_columns(pi=pl.when(pl.col("h") == "A").then(4 / 10).otherwise(5 / 12))
    pps = estimate(frame, weight="w", strata="h", psu="j", total="y", first_stage="pps", psu_inclusion="pi")
    fpc = estimate(frame, weight="w", strata="h", psu="j", total="y", population_size={"A": 10, "B": 12})
    # identity: pi_hj = n_h / N_h for every PSU of a stratum is the equal-probability first stage
    assert pps["se"][0] == pytest.approx(fpc["se"][0], rel=1e-12)


def test_inclusion_probabilities_are_checked_and_taylor_only() -> None:
    frame = _pps_sample()
    varying = frame.with_columns(pi=pl.col("pi") + pl.col("y").abs() * 1e-3)
    with pytest.raises(Exception, match="inclusion probabilities are invalid"):
        estimate(varying, weight="w", strata="h", psu="j", total="y", first_stage="pps", psu_inclusion="pi")
    with pytest.raises(SpecError):
        estimate(frame, weight="w", strata="h", psu="j", total="y", first_stage="pps", psu_inclusion="pi",
                 variance="stratified-jackknife")
    with pytest.raises(SpecError):
        estimate(frame, weight="w", strata="h", psu="j", total="y", psu_inclusion="pi")  # needs pps


def test_spec_first_stage_pps(tmp_path: Path) -> None:
    path = tmp_path / "study.toml"
    path.write_text(TRACKER_SPEC.replace("population = { 1 = 220, 2 = 180 }", 'first_stage = "pps"'), encoding="utf-8")
    design = load_spec(path).design
    assert design.first_stage == "pps" and not design.population
    assert any("probability proportional to size" in line and "with-replacement" in line
               for line in _design_lines(design))
    path.write_text(TRACKER_SPEC.replace("population = { 1 = 220, 2 = 180 }",
                                         'population = { 1 = 220, 2 = 180 }\nfirst_stage = "pps"'), encoding="utf-8")
    with pytest.raises(SpecError, match="invalid|spec") as info:
        load_spec(path)
    assert any("size-proportional" in p.message for p in info.value.problems)
