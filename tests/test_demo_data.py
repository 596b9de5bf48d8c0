"""The invented demo study in sample_data/: generator determinism, files versus spec, and the built-in bias.

These checks read the committed files with plain polars and tomllib (no staging code), so they
hold whatever the later stages do. Expected values come from the generator's documented design
(module docstring of sample_data/generate_demo.py) or from identities named beside each assertion.
"""

from __future__ import annotations

import importlib.util
import subprocess
import sys
import tomllib
from pathlib import Path
from types import ModuleType

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from polars.testing import assert_frame_equal

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "sample_data"
CSV_FILES = (
    "area_frame.csv",
    "area_sizes.csv",
    "population_margins.csv",
    "population_truth.csv",
    "waves/wave1.csv",
    "waves/wave2.csv",
)


def _load_generator() -> ModuleType:
    spec = importlib.util.spec_from_file_location("wavebook_demo_generator", DEMO / "generate_demo.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


GEN = _load_generator()
SPEC = tomllib.loads((DEMO / "study.toml").read_text(encoding="utf-8"))


def _read_wave(wave_id: str) -> pl.DataFrame:
    path = DEMO / SPEC["waves"][wave_id]["file"]
    return pl.read_parquet(path) if path.suffix == ".parquet" else pl.read_csv(path)


WAVES = {wave_id: _read_wave(wave_id) for wave_id in SPEC["waves"]}
MARGINS = pl.read_csv(DEMO / "population_margins.csv", schema_overrides={"category": pl.String})
FRAME = pl.read_csv(DEMO / "area_frame.csv")


def _population_shares(variable: str) -> dict[int, float]:
    """Population share of each code of `age_band` (summed over sex) or of a single margin."""
    if variable == "age_band":
        rows = MARGINS.filter(pl.col("variable") == "age_band x sex").with_columns(
            pl.col("category").str.split(" x ").list.get(0).alias("category")
        )
    else:
        rows = MARGINS.filter(pl.col("variable") == variable)
    counts = rows.group_by("category").agg(pl.col("target").sum())
    total = counts["target"].sum()
    return {int(c): t / total for c, t in counts.iter_rows()}


def _sample_shares(frame: pl.DataFrame, variable: str, *, weighted: bool) -> dict[int, float]:
    weight = 1.0 / frame["p_select"].to_numpy() if weighted else np.ones(frame.height)
    codes = frame[variable].to_numpy()
    return {int(c): float(weight[codes == c].sum() / weight.sum()) for c in np.unique(codes)}


def _distance(shares: dict[int, float], truth: dict[int, float]) -> float:
    """Total variation distance: half the sum of absolute differences of shares (a standard definition)."""
    return 0.5 * sum(abs(shares.get(c, 0.0) - p) for c, p in truth.items())


# ---------------------------------------------------------------- generator


def test_generator_rewrites_identical_files(tmp_path: Path) -> None:
    """Same seed, same files: the CSVs byte for byte, the Parquet wave as an equal frame."""
    subprocess.run(
        [sys.executable, str(DEMO / "generate_demo.py"), "--out", str(tmp_path)], check=True, cwd=ROOT
    )
    for name in CSV_FILES:
        assert (tmp_path / name).read_bytes() == (DEMO / name).read_bytes(), name
    assert_frame_equal(pl.read_parquet(tmp_path / "waves/wave3.parquet"), WAVES["W3"])


def test_systematic_pps_gives_inclusion_proportional_to_size() -> None:
    """Empirical inclusion frequency of each area matches n M_i / M (the design's stated probability).

    Expected value: first-stage inclusion probability of systematic PPS when every M_i < M / n
    (Lohr, Sampling: Design and Analysis, 3rd ed., section 6.2, from memory). Tolerance: 5 binomial
    standard errors of a frequency over 4,000 seeded draws.
    """
    sizes = np.array([50, 120, 300, 80, 200, 150, 90, 260, 40, 110])
    n_select, draws = 3, 4000
    rng = np.random.default_rng(7)
    hits = np.zeros(sizes.size)
    for _ in range(draws):
        hits[GEN.select_areas(rng, sizes, n_select)] += 1
    expected = n_select * sizes / sizes.sum()
    se = np.sqrt(expected * (1 - expected) / draws)
    np.testing.assert_array_less(np.abs(hits / draws - expected), 5 * se)


@settings(max_examples=50, deadline=None)
@given(
    sizes=st.lists(st.integers(min_value=1, max_value=1000), min_size=2, max_size=40),
    fraction=st.floats(min_value=0.05, max_value=1.0),
    seed=st.integers(min_value=0, max_value=2**32 - 1),
)
def test_systematic_pps_draws_distinct_areas(sizes: list[int], fraction: float, seed: int) -> None:
    """Whenever no area reaches the interval M / n, exactly n distinct areas come back, sorted."""
    arr = np.array(sizes)
    n_select = max(1, min(int(fraction * arr.size), int(arr.sum() // (arr.max() + 1))))
    chosen = GEN.select_areas(np.random.default_rng(seed), arr, n_select)
    assert chosen.size == n_select
    assert np.all(np.diff(chosen) > 0)


# ---------------------------------------------------------------- files versus spec


def test_spec_loads_with_the_project_loader() -> None:
    """The demo spec passes the project's own spec validation."""
    from pipeline.staging.spec import load_spec

    study = load_spec(DEMO / "study.toml")
    assert [w.id for w in study.waves] == ["W1", "W2", "W3"]
    assert study.design.psu_ids == "within-stratum"


def _declared_columns() -> list[str]:
    design = SPEC["design"]
    columns = [SPEC["respondent_id"], design["strata"], design["psu"], design["selection_probability"]]
    for name, var in SPEC["variables"].items():
        columns += list(var["items"]) if var["type"] == "multi" else [name]
    return columns


@pytest.mark.parametrize("wave_id", ["W1", "W2", "W3"])
def test_wave_has_every_declared_column_and_unique_ids(wave_id: str) -> None:
    frame = WAVES[wave_id]
    missing = [c for c in _declared_columns() if c not in frame.columns]
    assert missing == []
    assert frame["resp_id"].n_unique() == frame.height
    assert 1350 <= frame.height <= 1700  # "about 1,500 completes" (generator docstring)


def test_ids_are_unique_across_waves() -> None:
    ids = pl.concat([f.select("resp_id") for f in WAVES.values()])
    assert ids["resp_id"].n_unique() == ids.height


def _allowed_codes(var: dict) -> set[int]:
    codes = {int(k) for k in var["values"]}
    if var["type"] == "rating":
        excluded = set(var.get("exclude_from_statistics", []))
        valid = codes - excluded
        codes = set(range(min(valid), max(valid) + 1)) | excluded
    return codes


@pytest.mark.parametrize("wave_id", ["W1", "W2", "W3"])
def test_codes_are_within_the_codebook(wave_id: str) -> None:
    """Every code is declared, multi items are 0/1, numerics within bounds; only spend may be blank."""
    frame = WAVES[wave_id]
    for name, var in SPEC["variables"].items():
        if var["type"] in ("single", "rating"):
            assert frame[name].null_count() == 0, name
            outside = set(frame[name].unique().to_list()) - _allowed_codes(var)
            assert outside == set(), (name, outside)
        elif var["type"] == "multi":
            for item in var["items"]:
                assert set(frame[item].unique().to_list()) <= {0, 1}, item
        else:
            values = frame[name].drop_nulls()
            assert values.min() >= var["minimum"] and values.max() <= var["maximum"], name
    for code in _allowed_codes(SPEC["variables"]["satisfaction"]):  # every scale point is used somewhere
        if code not in (0, 1):
            assert (frame["satisfaction"] == code).any(), code


@pytest.mark.parametrize("wave_id", ["W1", "W2", "W3"])
def test_spend_is_blank_for_non_shoppers_and_a_few_refusals(wave_id: str) -> None:
    """Not asked of shop_freq 5; about 4% of shoppers refuse (generator docstring)."""
    frame = WAVES[wave_id]
    non_shoppers = frame.filter(pl.col("shop_freq") == 5)
    shoppers = frame.filter(pl.col("shop_freq") != 5)
    assert non_shoppers.height > 0
    assert non_shoppers["spend"].null_count() == non_shoppers.height
    refusal = shoppers["spend"].null_count() / shoppers.height
    # 4% of ~1,300 shoppers: binomial SE about 0.55 points, so 1.5%-7% is beyond +/- 4 SE
    assert 0.015 < refusal < 0.07


@pytest.mark.parametrize("wave_id", ["W1", "W2", "W3"])
def test_design_columns_follow_the_documented_design(wave_id: str) -> None:
    """p_select = n_h m / M_h in every region, areas are numbered 1..N_h within each region, n_h areas per region.

    Identity: PPS first stage n_h M_hi / M_h times m / M_hi at the second stage (generator docstring).
    """
    frame = WAVES[wave_id].join(FRAME, on="region", how="left")
    expected = frame["areas_selected_per_wave"] * GEN.ISSUED_PER_AREA / frame["adults"]
    np.testing.assert_allclose(frame["p_select"].to_numpy(), expected.to_numpy(), rtol=1e-12)
    assert (frame["area"] >= 1).all() and (frame["area"] <= frame["areas"]).all()
    per_region = frame.group_by("region").agg(
        pl.col("area").n_unique().alias("hit"), pl.col("areas_selected_per_wave").first()
    )
    assert (per_region["hit"] == per_region["areas_selected_per_wave"]).all()


def test_spec_codebook_matches_the_generator() -> None:
    """The labels, items and nets in study.toml are the ones the generator's answers use."""
    variables = SPEC["variables"]

    def values(name: str) -> dict[int, str]:
        return {int(k): v for k, v in variables[name]["values"].items()}

    assert values("region") == {r.code: r.name for r in GEN.REGIONS}
    assert values("age_band") == GEN.AGE_BANDS
    assert values("sex") == GEN.SEXES
    assert values("education") == GEN.EDUCATION
    assert values("urban_rural") == GEN.URBAN_RURAL
    assert values("shop_freq") == GEN.SHOP_FREQ
    assert values("channel") == GEN.CHANNELS
    assert variables["aware"]["items"] == GEN.BRANDS
    assert variables["satisfaction"]["exclude_from_statistics"] == [GEN.DONT_KNOW]
    assert variables["satisfaction"]["nets"] == GEN.SATISFACTION_NETS
    assert variables["recommend"]["nets"] == GEN.RECOMMEND_NETS


def test_spec_design_and_labels_match_the_area_frame() -> None:
    # the generator draws areas with probability proportional to size: no equal-probability FPC
    assert SPEC["design"]["first_stage"] == "pps" and "population" not in SPEC["design"]
    labels = {int(k): v for k, v in SPEC["variables"]["region"]["values"].items()}
    assert labels == dict(zip(FRAME["region"], FRAME["region_label"]))
    sizes = pl.read_csv(DEMO / "area_sizes.csv")
    counted = sizes.group_by("region").agg(pl.len().alias("areas"), pl.col("adults").sum()).sort("region")
    assert counted["areas"].to_list() == FRAME["areas"].to_list()
    assert counted["adults"].to_list() == FRAME["adults"].to_list()


# ---------------------------------------------------------------- margins and truth


def test_margins_sum_to_the_population() -> None:
    """Each margin counts every adult once: all four add up to the frame's adults."""
    totals = MARGINS.group_by("variable").agg(pl.col("target").sum())
    population = FRAME["adults"].sum()
    assert 400_000 <= population <= 1_000_000
    margins = ("age_band x sex", "region", "education", "urban_rural")
    assert dict(totals.iter_rows()) == dict.fromkeys(margins, population)
    region = MARGINS.filter(pl.col("variable") == "region")
    by_region = dict(zip(region["category"].cast(pl.Int64), region["target"]))
    assert by_region == dict(zip(FRAME["region"], FRAME["adults"]))
    crossed = MARGINS.filter(pl.col("variable") == "age_band x sex")["category"].to_list()
    assert crossed == [f"{a} x {s}" for a in range(1, 7) for s in (1, 2)]


def test_truth_is_complete_and_coherent() -> None:
    """Distributions sum to 1 and nets equal the sum of their codes (identities); the scenario's trend."""
    truth = pl.read_csv(DEMO / "population_truth.csv", schema_overrides={"category": pl.String})
    assert set(truth["wave"]) == set(SPEC["waves"])
    assert set(truth["measure"]) == {"proportion", "mean"}
    for wave_id in SPEC["waves"]:
        t = truth.filter(pl.col("wave") == wave_id)
        for name in ("shop_freq", "satisfaction", "recommend", "channel"):
            codes = {str(c) for c in _allowed_codes(SPEC["variables"][name])}
            dist = t.filter((pl.col("variable") == name) & pl.col("category").is_in(list(codes)))
            assert dist.height == len(codes), name
            assert dist["value"].sum() == pytest.approx(1.0, abs=1e-12), name
        for name in ("satisfaction", "recommend"):
            props = dict(
                t.filter((pl.col("variable") == name) & (pl.col("measure") == "proportion"))
                .select("category", "value")
                .iter_rows()
            )
            for label, codes in SPEC["variables"][name]["nets"].items():
                assert props[label] == pytest.approx(sum(props[str(c)] for c in codes), abs=1e-12), label
        aware = t.filter(pl.col("variable") == "aware")
        assert set(aware["category"]) == set(SPEC["variables"]["aware"]["items"])
        means = dict(t.filter(pl.col("measure") == "mean").select("variable", "value").iter_rows())
        assert set(means) == {"satisfaction", "recommend", "spend"}
        assert 0 < means["satisfaction"] < 10 and 0 < means["recommend"] < 10
    tarnwick = truth.filter(pl.col("category") == "aware_tarnwick").sort("wave")["value"].to_list()
    assert tarnwick[0] < tarnwick[1] < tarnwick[2]  # the scenario's growing online grocer


# ---------------------------------------------------------------- the built-in bias


@pytest.mark.parametrize("wave_id", ["W1", "W2", "W3"])
def test_unweighted_sample_over_represents_older_and_more_educated(wave_id: str) -> None:
    """Nonresponse rises with age and education, so completes are older and more educated than adults."""
    frame = WAVES[wave_id]
    age_pop, edu_pop = _population_shares("age_band"), _population_shares("education")
    age = _sample_shares(frame, "age_band", weighted=False)
    edu = _sample_shares(frame, "education", weighted=False)
    assert age[5] + age[6] > age_pop[5] + age_pop[6] + 0.08
    assert age[1] < age_pop[1] - 0.04
    assert edu[4] > edu_pop[4] + 0.03
    assert edu[1] < edu_pop[1] - 0.02


@pytest.mark.parametrize("wave_id", ["W1", "W2", "W3"])
def test_design_weights_reduce_but_do_not_remove_the_distortion(wave_id: str) -> None:
    """1 / p_select undoes the regional boost but not nonresponse.

    Found in the committed files (total variation distance from the margins, unweighted -> design
    weighted): age 0.157 -> 0.114, 0.162 -> 0.102, 0.177 -> 0.122; education 0.125 -> 0.093,
    0.112 -> 0.104, 0.099 -> 0.058 in W1, W2, W3. With no bias at all the expected distance is
    about 0.5 * sum_k sqrt(p_k (1 - p_k) / n_eff) * sqrt(2 / pi) (E|Z| = sigma sqrt(2/pi) for a
    normal Z, identity): about 0.03 for age and 0.025 for education at n_eff = 750 (n = 1,500,
    design effect 2, assumed). The expected distances under the generator's response model are
    0.10 (age) and 0.09 (education) after design weighting, so the 0.05 floor tests that the
    nonresponse bias is still there.
    """
    frame = WAVES[wave_id]
    for variable in ("age_band", "education"):
        pop = _population_shares(variable)
        unweighted = _distance(_sample_shares(frame, variable, weighted=False), pop)
        weighted = _distance(_sample_shares(frame, variable, weighted=True), pop)
        assert weighted < unweighted, variable
        assert weighted > 0.05, variable
    region_pop = _population_shares("region")
    assert _distance(_sample_shares(frame, "region", weighted=True), region_pop) < _distance(
        _sample_shares(frame, "region", weighted=False), region_pop
    ) - 0.15
