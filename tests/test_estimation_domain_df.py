"""Per-domain degrees of freedom, Korn-Graubard edges, and estimates whose variance cannot be estimated."""

from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from scipy import stats

from pipeline.cli import main
from pipeline.estimation import estimate
from pipeline.estimation.intervals import effective_base, korn_graubard_interval

ROOT = Path(__file__).resolve().parents[1]
LOHR = ROOT.parent / "shared" / "reference" / "lohr_sda3"


def _agstrat() -> pl.DataFrame:
    path = LOHR / "agstrat.csv"
    if not path.exists():
        pytest.skip(f"reference data folder {LOHR} is absent")
    frame = pl.read_csv(path, infer_schema_length=None)
    return frame.with_columns(large=(pl.col("acres92") > 600_000).cast(pl.Int64))


def test_domain_df_by_hand_on_lohr_agstrat_stratified_sample() -> None:
    # Lohr, Sampling: Design and Analysis, 3rd ed., Example 3.2 (agstrat.csv): a stratified SRS of
    # 300 counties in 4 regions, n_h = NC 103, NE 21, S 135, W 41; each county is its own PSU.
    frame = _agstrat()
    out = estimate(frame, weight="strwt", strata="region", mean="acres92", by="large")
    whole = out.filter(pl.col("domain") == "").row(0, named=True)
    assert whole["df"] == 300 - 4  # PSUs minus strata (Korn & Graubard 1999, section 5.2, from memory)
    large = out.filter(pl.col("domain") == "large=1").row(0, named=True)
    # by hand from the file: 28 counties with more than 600,000 acres in 1992, W 15 + NC 7 + S 6, in
    # 3 regions (none in NE), so df = 28 - 3 = 25 (Korn & Graubard 1999, degrees of freedom for
    # subpopulations: PSUs with members minus strata with members, from memory)
    with (LOHR / "agstrat.csv").open() as handle:
        rows = [r for r in csv.DictReader(handle) if float(r["acres92"]) > 600_000]
    assert (len(rows), len({r["region"] for r in rows})) == (28, 3)
    assert large["df"] == 28 - 3
    # the t interval uses that df: half-width t_{25, 0.975} * se (scipy's t quantile)
    half = (large["ci_high"] - large["ci_low"]) / 2
    assert half == pytest.approx(stats.t.ppf(0.975, 25) * large["se"], rel=1e-12)
    by_region = estimate(frame, weight="strwt", strata="region", mean="acres92", by="region")
    df = dict(by_region.filter(pl.col("domain") != "").select("domain", "df").iter_rows())
    # a domain that is one stratum: n_h - 1 (Example 3.2's sample sizes)
    assert df == {"region=NC": 102.0, "region=NE": 20.0, "region=S": 134.0, "region=W": 40.0}


def _one_stratum_domains(rng: np.random.Generator, n_strata: int) -> pl.DataFrame:
    """n_strata strata of 5 PSUs x 4 respondents, y = 10 + PSU effect + noise (all N(0, 1))."""
    h = np.repeat(np.arange(n_strata), 20)
    j = np.tile(np.repeat(np.arange(5), 4), n_strata)
    y = 10 + rng.normal(0, 1, (n_strata, 5))[h, j] + rng.normal(0, 1, len(h))
    return pl.DataFrame({"h": h, "j": j, "w": np.full(len(h), 2.0), "y": y, "dom": h})


def test_monte_carlo_coverage_of_a_domain_in_one_stratum_with_five_psus() -> None:
    # 2,000 domains, each confined to one stratum of 5 PSUs (stacked 100 at a time: domain k is
    # stratum k, so its variance uses its own 5 PSU totals, as in a single sample). With equal PSU
    # sizes and normal PSU effects the domain mean's studentized error is exactly t(4), so the
    # 95% interval with the domain df 4 covers 95% (a mathematical identity); with the design-wide
    # df it covers about 88-89%.
    rng = np.random.default_rng(20261202)
    hits_domain, hits_design, hits_demo = [], [], []
    for _ in range(20):
        frame = _one_stratum_domains(rng, 100)
        out = estimate(frame, weight="w", strata="h", psu="j", mean="y", by="dom").filter(pl.col("domain") != "")
        assert (out["df"] == 4).all()
        est, se = out["estimate"].to_numpy(), out["se"].to_numpy()
        hits_domain.append((out["ci_low"].to_numpy() <= 10) & (10 <= out["ci_high"].to_numpy()))
        design_df = 100 * 5 - 100  # PSUs minus strata of the whole design
        hits_design.append(np.abs(est - 10) <= stats.t.ppf(0.975, design_df) * se)
        hits_demo.append(np.abs(est - 10) <= stats.t.ppf(0.975, 42) * se)  # the demo's design df
    coverage = float(np.concatenate(hits_domain).mean())
    assert 0.935 <= coverage <= 0.965, coverage
    wrong = float(np.concatenate(hits_design).mean())
    assert wrong < 0.92, wrong  # the design-wide df under-covers: t(400) instead of t(4)
    # and the demo's case, t(42) for a domain of 5 PSUs, under-covers the same way
    assert float(np.concatenate(hits_demo).mean()) < 0.92


def test_korn_graubard_at_zero_and_one_is_the_beta_quantile_of_the_base() -> None:
    n, df = np.array([50.0, 50.0]), 20.0
    low, high = korn_graubard_interval(np.array([0.0, 1.0]), np.array([0.0, 1e-17]), n, df)
    # n* = n at p = 0 and 1; n*_df = n (t_{49}/t_{20})^2 (Korn & Graubard 1998, Survey Methodology
    # 24:193-201, eq. for the df-adjusted effective size); limits from scipy's beta quantiles
    n_df = 50 * (stats.t.ppf(0.975, 49) / stats.t.ppf(0.975, 20)) ** 2
    assert low[0] == 0.0 and high[1] == 1.0
    assert high[0] == pytest.approx(stats.beta.ppf(0.975, 1, n_df), rel=1e-12)
    assert low[1] == pytest.approx(stats.beta.ppf(0.025, n_df, 1), rel=1e-12)
    # Beta(1, b) has the closed-form quantile 1 - (1 - q)^(1/b) (a mathematical identity)
    assert high[0] == pytest.approx(1 - 0.025 ** (1 / n_df), rel=1e-12)


def test_korn_graubard_at_a_quarter_percent_matches_scipy_beta() -> None:
    p, se, n, df = 0.0025, 0.0018, 400.0, 30.0
    low, high = korn_graubard_interval(np.array([p]), np.array([se]), np.array([n]), df)
    n_star = p * (1 - p) / se**2  # 769.9... > n = 400: deff < 1, so n* is capped at n
    assert n_star > n
    n_df = n * (stats.t.ppf(0.975, n - 1) / stats.t.ppf(0.975, df)) ** 2
    x = p * n_df
    # Clopper-Pearson limits on (x*, n*_df) from scipy's beta quantiles (Korn & Graubard 1998)
    assert low[0] == pytest.approx(stats.beta.ppf(0.025, x, n_df - x + 1), rel=1e-12)
    assert high[0] == pytest.approx(stats.beta.ppf(0.975, x + 1, n_df - x), rel=1e-12)
    assert low[0] > 0


def test_effective_base_rule_cap_at_n_and_rounding_noise() -> None:
    p = np.array([0.3, 0.3, 0.3, 0.0, 1.0])
    var = np.array([0.3 * 0.7 / 50, 0.3 * 0.7 / 500, 1e-18, 0.0, 1e-20])
    got = effective_base(p, var, np.full(5, 100.0))
    # deff 2: n* = p(1-p)/v = 50; deff 0.2: capped at n = 100 (Parker et al. 2017, Vital Health Stat
    # 2(175), NCHS data presentation standards for proportions -- from memory, not confirmed);
    # a variance of rounding noise and p = 0 or 1: n* = n
    assert got.tolist() == pytest.approx([50.0, 100.0, 100.0, 100.0, 100.0], rel=1e-12)


def test_proportion_of_100_percent_has_a_korn_graubard_interval() -> None:
    frame = pl.DataFrame({"w": np.linspace(1, 2, 40), "h": np.repeat([0, 1], 20), "j": np.tile(np.arange(4), 10),
                          "q": np.ones(40, dtype=np.int64)})
    row = estimate(frame, weight="w", strata="h", psu="j", proportion="q").row(0, named=True)
    assert row["estimate"] == 1.0 and row["ci_high"] == 1.0
    n_df = 40 * (stats.t.ppf(0.975, 39) / stats.t.ppf(0.975, 6)) ** 2  # df = 8 PSUs - 2 strata
    assert row["ci_low"] == pytest.approx(stats.beta.ppf(0.025, n_df, 1), rel=1e-10)  # scipy beta quantile


def test_one_respondent_and_one_psu_domains_have_no_standard_error() -> None:
    rng = np.random.default_rng(3)
    h = np.repeat([0, 1], 40)
    j = np.tile(np.repeat(np.arange(4), 10), 2)
    group = np.where((h == 0) & (j == 1), "one-psu", "rest")
    group[0] = "single"
    frame = pl.DataFrame({"h": h, "j": j, "w": rng.uniform(1, 2, 80), "y": rng.normal(5, 1, 80), "g": group,
                          "q": rng.integers(0, 2, 80)})
    out = estimate(frame, weight="w", strata="h", psu="j", mean="y", proportion="q", total="y", by="g")
    for dom, reason in (("g=single", "one respondent"), ("g=one-psu", "one PSU")):
        for row in out.filter((pl.col("domain") == dom) & (pl.col("statistic") != "total")).iter_rows(named=True):
            assert row["estimate"] is not None
            assert row["se"] is None and row["ci_low"] is None and row["deff"] is None, row
            assert reason in row["reason"]
        total = out.filter((pl.col("domain") == dom) & (pl.col("statistic") == "total")).row(0, named=True)
        assert total["se"] > 0  # a domain total varies between PSUs: its variance is estimable
    rest = out.filter((pl.col("domain") == "g=rest") & (pl.col("statistic") == "mean")).row(0, named=True)
    assert rest["se"] > 0 and rest["reason"] == ""


def test_median_tied_on_a_scale_point_has_no_interval_and_quantiles_no_deff() -> None:
    frame = pl.DataFrame({"h": np.repeat([0, 1], 30), "j": np.tile(np.arange(3), 20), "w": np.ones(60),
                          "r": np.r_[np.full(50, 7), np.arange(10)].astype(np.int64)})
    row = estimate(frame, weight="w", strata="h", psu="j", quantile=("r", 0.5)).row(0, named=True)
    assert row["estimate"] == 7.0 and row["se"] is None and row["ci_low"] is None
    assert "collapses to a point (a tied value" in row["reason"] and row["deff"] is None


def test_interpolated_median_of_a_rating_scale() -> None:
    values = np.random.default_rng(5).permutation(np.array([1, 2, 2, 3, 3, 3, 3, 4, 4, 5] * 6, dtype=np.int64))
    frame = pl.DataFrame({"h": np.repeat([0, 1], 30), "j": np.tile(np.arange(3), 20), "w": np.ones(60), "r": values})
    row = estimate(frame, weight="w", strata="h", psu="j", quantile=("r", 0.5), interpolate_quantiles="r").row(
        0, named=True)
    # grouped-data median by hand: 30% of the weight lies below 3 (answers 1 and 2) and 40% at 3, so
    # the median is 2.5 + (0.5 - 0.3) / 0.4 = 3.0 on the scale spread over [k - 1/2, k + 1/2]
    assert row["estimate"] == pytest.approx(3.0, rel=1e-12)
    assert row["ci_low"] < 3.0 < row["ci_high"] and row["se"] > 0 and row["deff"] is None


def test_estimate_command_proportions_default_to_korn_graubard(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    n = 400
    frame = pl.DataFrame({"wt": np.linspace(1, 3, n), "q": np.r_[1, np.zeros(n - 1)].astype(np.int64)})
    path = tmp_path / "small.csv"
    frame.write_csv(path)
    rows = {}
    for kind in ("korn-graubard", "t"):
        args = ["estimate", str(path), "--weight", "wt", "--proportion", "q"] + ([] if kind == "korn-graubard" else
                                                                                ["--interval", "t"])
        assert main(args) == 0
        rows[kind] = next(r for r in csv.DictReader(io.StringIO(capsys.readouterr().out)) if r["category"] == "1")
    p = float(rows["t"]["estimate"])
    assert float(rows["t"]["ci_low"]) < 0  # the symmetric t interval leaves [0, 1]
    low, high = korn_graubard_interval(np.array([p]), np.array([float(rows["t"]["se"])]), np.array([n]), n - 1)
    assert float(rows["korn-graubard"]["ci_low"]) == pytest.approx(low[0], rel=1e-9) and low[0] > 0
    assert float(rows["korn-graubard"]["ci_high"]) == pytest.approx(high[0], rel=1e-9)
