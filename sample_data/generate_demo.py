"""Generate wavebook's invented demo study: a grocery-chain brand tracker in the Republic of Ostrevia.

Run from the project root:

    python sample_data/generate_demo.py              # rewrite the files in sample_data/
    python sample_data/generate_demo.py --out DIR    # write them into DIR instead

Same seed, same files, byte for byte (the CSVs; the Parquet file holds the same frame). The seed
is `SEED = 20260302` below; every random stream (frame, people, area effects, each wave's
answers and each wave's sample) is spawned from it, so changing it changes every file together.
Everything here is invented: the country, its regions and areas, its people, the six grocery
chains and their figures. Nothing describes a real place, person or brand.

Scenario
--------
Ostrevia has about 600,000 adults in six regions (the strata), 285 areas (the first-stage units,
unequal sizes, each urban or rural) and a market of six invented grocery chains. The capital
region Harrowmere is young and urban; Oradel is young, industrial and less educated; Quillby
Coast (a retirement coast) is old and well educated; Veskar Vale (a college valley) is older and
well educated; Brannoch Uplands is old and rural. Answers depend on age, education, region,
urbanity and the area (an area effect makes answers cluster, so design effects are above 1):

- awareness of each chain (aided, multi-response set `aware_*`): Brimlet (discount, known to
  nearly everyone), Tarnwick Fresh (online grocer: young, urban, educated; its awareness GROWS
  from wave to wave), Oskavo (large national chain), Quendle & Co (premium: education-driven),
  Vellowby Market (regional: known mostly in Brannoch Uplands and Veskar Vale), Halvorn
  (convenience stores: urban and young);
- how often the respondent does the grocery shopping (`shop_freq`; code 5 = someone else does);
- satisfaction with the main store, 0-10, code 99 = don't know (more common among people who do
  not shop); satisfaction edges up over the year;
- likelihood to recommend the main store, 0-10 (follows satisfaction);
- monthly grocery spend in credits (`spend`, right-skewed; drifts up with prices). It is MISSING
  for people who do not do the shopping (code 5 of `shop_freq`: not asked) and for about 4% of
  shoppers who refuse (refusal at random, independent of the amount);
- preferred channel (`channel`); online delivery gains share from wave to wave.

The population's demographics stay fixed over the year; its attitudes are redrawn for each wave
(each person's lasting traits plus wave-specific noise and the trends above).

Sample design (every wave a fresh, independent sample)
------------------------------------------------------
Stratified two-stage cluster sample. Strata: the six regions. First stage: n_h areas
(`Region.areas_selected`) per region by systematic sampling with probability proportional to
size (adults in the area) from a randomly ordered list; no area is larger than the sampling
interval, so no area can be hit twice and the first-stage inclusion probability is exactly
n_h M_hi / M_h. Second stage: a simple random sample of m = `ISSUED_PER_AREA` adults in each
selected area. The overall selection probability is therefore n_h m / M_h, the same for
everyone in a region (self-weighting within strata; Kish, Survey Sampling (1965) section 7.5,
from memory). The small regions Quillby Coast and Veskar Vale get about twice their share of
the areas (a boost for regional reporting); Harrowmere, Fennick Lowlands and Oradel get fewer
than their share: see `REGIONS` and area_frame.csv.

`area` is the area number WITHIN its region (1..N_h): PSU ids restart WITHIN each stratum
(`psu_ids = "within-stratum"` in study.toml). `p_select` is the selection probability of the issued
adult. Design weights 1 / p_select of the issued sample add up to the region's adults exactly.

Nonresponse: an issued adult completes with a probability that rises with age and education and
is a little lower in urban areas (logistic model in `response_propensity`); about 47% respond,
giving about 1,500 completes a wave (48 areas x 64 issued). Only completes are written. Because
answers depend on age and education, unweighted estimates are biased. The boost pulls the
unweighted sample further towards older and more educated people (the boosted regions are
both), the same direction as nonresponse: design weights remove the boost's share of the
distortion but not the nonresponse bias; weighting to the population margins removes most of
the rest (nonresponse depends only on variables that have margins).

Files written
-------------
- waves/wave1.csv, waves/wave2.csv, waves/wave3.parquet: the completes of each wave.
- population_margins.csv: `variable,category,target`, population COUNTS of adults for
  `age_band x sex` (category "3 x 2" = age band 3, sex 2), `region`, `education`, `urban_rural`.
- population_truth.csv: `wave,measure,variable,category,value,base`: the population's true
  value of each main measure in each wave (measure "proportion" or "mean"; `base` names who it is
  computed over). Proportions of `aware` are per item (category = the item column).
- area_frame.csv: per region, its label, the areas and adults in the population, and the areas
  selected per wave (areas are drawn with probability proportional to adults: the spec's
  `first_stage = "pps"`).
- area_sizes.csv: every area of the frame: region, area, urban_rural, adults.
"""

from __future__ import annotations

import argparse
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl

SEED = 20260302

WAVES = ("W1", "W2", "W3")
WAVE_FILES = {"W1": "waves/wave1.csv", "W2": "waves/wave2.csv", "W3": "waves/wave3.parquet"}
ISSUED_PER_AREA = 64


@dataclass(frozen=True)
class Region:
    """An invented region: its size, urbanity, how old and how educated its adults are, and its sample."""

    code: int
    name: str
    adults: int  # approximate; the exact count is the sum of its area sizes
    areas: int
    urban_share: float
    age_tilt: float  # > 0: older than the national profile
    education_tilt: float  # > 0: more educated
    areas_selected: int  # first-stage sample size per wave


REGIONS = (
    Region(1, "Harrowmere", 190_000, 72, 0.92, -0.45, 0.1, 12),
    Region(2, "Fennick Lowlands", 118_000, 55, 0.55, 0.0, -0.1, 7),
    Region(3, "Oradel", 112_000, 48, 0.78, -0.3, -0.6, 5),
    Region(4, "Quillby Coast", 62_000, 34, 0.45, 0.75, 1.1, 10),
    Region(5, "Brannoch Uplands", 64_000, 40, 0.2, 0.55, 0.0, 6),
    Region(6, "Veskar Vale", 54_000, 36, 0.3, 0.3, 0.7, 8),
)

AGE_BANDS = {1: "18-24", 2: "25-34", 3: "35-44", 4: "45-54", 5: "55-64", 6: "65+"}
SEXES = {1: "Man", 2: "Woman"}
EDUCATION = {
    1: "No formal qualification or primary only",
    2: "Secondary school",
    3: "Vocational or technical college",
    4: "University degree",
}
URBAN_RURAL = {1: "Urban", 2: "Rural"}
BRANDS = {
    "aware_brimlet": "Brimlet",
    "aware_tarnwick": "Tarnwick Fresh",
    "aware_oskavo": "Oskavo",
    "aware_quendle": "Quendle & Co",
    "aware_vellowby": "Vellowby Market",
    "aware_halvorn": "Halvorn",
}
SHOP_FREQ = {
    1: "Several times a week",
    2: "About once a week",
    3: "Every two weeks",
    4: "Once a month or less",
    5: "Never, someone else does it",
}
CHANNELS = {
    1: "Large supermarket, in store",
    2: "Small local or convenience store",
    3: "Online, home delivery",
    4: "Online, collect in store",
    5: "Markets and farm shops",
}
DONT_KNOW = 99
NOT_SHOPPING = 5
SATISFACTION_NETS = {
    "Top two box (9-10)": [9, 10],
    "Top three box (8-10)": [8, 9, 10],
    "Low (0-6)": [0, 1, 2, 3, 4, 5, 6],
}
RECOMMEND_NETS = {
    "High (9-10)": [9, 10],
    "Middle (7-8)": [7, 8],
    "Low (0-6)": [0, 1, 2, 3, 4, 5, 6],
}

# national age profile of adults (shares of bands 1..6) before the regional tilt
AGE_PROFILE = np.array([0.11, 0.17, 0.17, 0.17, 0.16, 0.22])
AGE_CENTRED = np.array([-1.0, -0.6, -0.2, 0.2, 0.6, 1.0])


def draw_categorical(rng: np.random.Generator, probs: np.ndarray) -> np.ndarray:
    """One category index (0-based) per row of `probs` (n x k, rows summing to 1), by inverting the CDF."""
    cum = np.cumsum(probs, axis=1)
    cum[:, -1] = 1.0
    u = rng.random(probs.shape[0])
    return (u[:, None] > cum).sum(axis=1)


def softmax_rows(logits: np.ndarray) -> np.ndarray:
    """Row-wise softmax: p_ik = exp(l_ik) / sum_j exp(l_ij)."""
    z = np.exp(logits - logits.max(axis=1, keepdims=True))
    return z / z.sum(axis=1, keepdims=True)


def expit(x: np.ndarray) -> np.ndarray:
    """The logistic function 1 / (1 + exp(-x))."""
    return 1.0 / (1.0 + np.exp(-x))


# ---------------------------------------------------------------- population


def build_frame(rng: np.random.Generator) -> pl.DataFrame:
    """The area frame: one row per area with region, area (1..N_h within region), urban_rural, adults.

    Sizes are lognormal (sigma 0.5), urban areas about 1.6 times larger, rescaled to the region's
    adults and capped below half the region's systematic-sampling interval so no area can be
    selected twice.
    """
    rows = []
    for region in REGIONS:
        urban = rng.random(region.areas) < region.urban_share
        raw = rng.lognormal(0.0, 0.5, region.areas) * np.where(urban, 1.6, 1.0)
        interval = region.adults / region.areas_selected
        sizes = raw / raw.sum() * region.adults
        sizes = np.clip(sizes, 400, 0.5 * interval)
        sizes = np.round(sizes / sizes.sum() * region.adults).astype(np.int64)
        rows.append(
            pl.DataFrame(
                {
                    "region": np.full(region.areas, region.code, dtype=np.int64),
                    "area": np.arange(1, region.areas + 1, dtype=np.int64),
                    "urban_rural": np.where(urban, 1, 2).astype(np.int64),
                    "adults": sizes,
                }
            )
        )
    return pl.concat(rows)


def build_population(rng: np.random.Generator, frame: pl.DataFrame) -> dict[str, np.ndarray]:
    """Every adult of Ostrevia: region, area index into `frame`, urban, age band, sex, education, traits."""
    sizes = frame["adults"].to_numpy()
    area_index = np.repeat(np.arange(frame.height), sizes)
    region = frame["region"].to_numpy()[area_index]
    urban = frame["urban_rural"].to_numpy()[area_index] == 1
    n = area_index.size

    tilt = np.array([r.age_tilt for r in REGIONS])[region - 1] - 0.15 * urban
    age_logits = np.log(AGE_PROFILE)[None, :] + tilt[:, None] * AGE_CENTRED[None, :] * 1.2
    age = draw_categorical(rng, softmax_rows(age_logits)) + 1

    woman_share = np.array([0.49, 0.495, 0.5, 0.505, 0.515, 0.56])[age - 1]
    sex = np.where(rng.random(n) < woman_share, 2, 1)

    education_score = (
        np.array([r.education_tilt for r in REGIONS])[region - 1]
        + 0.35 * urban
        + np.array([0.15, 0.55, 0.4, 0.05, -0.35, -0.8])[age - 1]
        + rng.logistic(0.0, 1.0, n)
    )
    education = 1 + (education_score[:, None] > np.array([-1.7, 0.35, 1.15])[None, :]).sum(axis=1)

    return {
        "area_index": area_index,
        "region": region,
        "urban": urban,
        "age": age,
        "sex": sex,
        "education": education,
        "engagement": rng.normal(0.0, 1.0, n),  # lasting interest in groceries and shops
        "warmth": rng.normal(0.0, 1.0, n),  # lasting tendency to rate the main store well
        "thrift": rng.normal(0.0, 1.0, n),  # lasting spending level
    }


@dataclass(frozen=True)
class AreaEffects:
    """Area-level random effects that make answers cluster within areas."""

    awareness: np.ndarray  # areas x brands, on the logit scale
    satisfaction: np.ndarray  # areas, scale points
    spend: np.ndarray  # areas, log scale
    online: np.ndarray  # areas, logit of online channels


def draw_area_effects(rng: np.random.Generator, n_areas: int) -> AreaEffects:
    """Independent normal area effects (the sizes set the intra-area correlations)."""
    return AreaEffects(
        awareness=rng.normal(0.0, 0.4, (n_areas, len(BRANDS))),
        satisfaction=rng.normal(0.0, 0.45, n_areas),
        spend=rng.normal(0.0, 0.12, n_areas),
        online=rng.normal(0.0, 0.35, n_areas),
    )


# brand -> (intercept, age slope, per-education effect, urban effect, per-region effect), logit scale
BRAND_MODEL = {
    "aware_brimlet": (2.6, 0.3, (0.4, 0.2, 0.0, -0.35), 0.0, (0.2, 0.0, 0.3, -0.2, 0.0, 0.0)),
    "aware_tarnwick": (-0.75, -1.3, (-0.8, -0.3, 0.0, 0.6), 0.6, (0.5, 0.0, -0.1, -0.3, -0.5, -0.4)),
    "aware_oskavo": (1.7, 0.2, (-0.1, 0.0, 0.1, 0.1), 0.2, (0.1, 0.3, 0.2, -0.3, -0.2, 0.0)),
    "aware_quendle": (-0.5, 0.45, (-1.0, -0.35, 0.1, 0.9), 0.3, (0.45, 0.0, -0.4, 0.5, -0.4, -0.2)),
    "aware_vellowby": (-1.3, 0.35, (0.0, 0.1, 0.1, 0.0), -0.3, (-0.8, -0.3, -0.6, 0.2, 3.2, 2.8)),
    "aware_halvorn": (0.5, -0.7, (-0.2, 0.0, 0.1, 0.1), 0.9, (0.4, 0.0, 0.2, -0.2, -0.4, -0.3)),
}
# wave -> awareness shift per brand (logit); Tarnwick Fresh grows, most among the young (see below)
BRAND_TREND = {
    "W1": (0.0, 0.0, 0.0, 0.0, 0.0, 0.0),
    "W2": (0.0, 0.35, 0.0, 0.05, 0.0, -0.05),
    "W3": (-0.05, 0.75, 0.0, 0.1, 0.0, -0.05),
}
WAVE_INDEX = {"W1": 0, "W2": 1, "W3": 2}


def wave_answers(
    rng: np.random.Generator, pop: dict[str, np.ndarray], effects: AreaEffects, wave: str
) -> dict[str, np.ndarray]:
    """Every adult's answers at `wave` (the population's values that a complete interview would record)."""
    n = pop["age"].size
    t = WAVE_INDEX[wave]
    age0 = pop["age"] - 1
    edu0 = pop["education"] - 1
    reg0 = pop["region"] - 1
    area = pop["area_index"]
    urban = pop["urban"].astype(float)
    age_c = AGE_CENTRED[age0]
    answers: dict[str, np.ndarray] = {}

    for b, (column, (a, age_slope, edu_eff, urban_eff, reg_eff)) in enumerate(BRAND_MODEL.items()):
        logit = (
            a
            + age_slope * age_c
            + np.asarray(edu_eff)[edu0]
            + urban_eff * urban
            + np.asarray(reg_eff)[reg0]
            + effects.awareness[area, b]
            + 0.5 * pop["engagement"]
            + BRAND_TREND[wave][b] * (1.0 - 0.4 * age_c if column == "aware_tarnwick" else 1.0)
        )
        answers[column] = (rng.random(n) < expit(logit)).astype(np.int64)

    freq_logits = np.log(np.array([0.27, 0.41, 0.15, 0.07, 0.10]))[None, :] + np.zeros((n, 1))
    freq_logits[:, 4] += np.array([1.3, 0.2, -0.2, -0.3, -0.3, -0.1])[age0] + 0.55 * (pop["sex"] == 1)
    freq_logits[:, 0] += 0.35 * urban + 0.25 * age_c
    freq_logits[:, 3] += 0.4 * (1.0 - urban)
    freq_logits += 0.3 * pop["engagement"][:, None] * np.array([0.5, 0.2, 0.0, -0.3, -0.8])[None, :]
    shop_freq = draw_categorical(rng, softmax_rows(freq_logits)) + 1
    answers["shop_freq"] = shop_freq
    shops = shop_freq != NOT_SHOPPING

    satisfaction_latent = (
        6.9
        + 0.55 * age_c
        + np.array([0.25, 0.1, 0.0, -0.35])[edu0]
        + np.array([-0.2, 0.1, -0.35, 0.3, 0.25, 0.15])[reg0]
        + effects.satisfaction[area]
        + 1.3 * pop["warmth"]
        + (0.0, 0.08, 0.18)[t]
        + rng.normal(0.0, 0.9, n)
    )
    satisfaction = np.clip(np.rint(satisfaction_latent), 0, 10).astype(np.int64)
    dont_know = rng.random(n) < np.where(shops, 0.025, 0.2)
    answers["satisfaction"] = np.where(dont_know, DONT_KNOW, satisfaction)
    recommend_latent = satisfaction_latent - 0.4 + 0.25 * pop["engagement"] + rng.normal(0.0, 1.1, n)
    answers["recommend"] = np.clip(np.rint(recommend_latent), 0, 10).astype(np.int64)

    log_spend = (
        np.log(360.0)
        + np.array([-0.25, -0.05, 0.05, 0.18])[edu0]
        + np.array([-0.35, 0.05, 0.15, 0.12, 0.0, -0.2])[age0]
        + 0.08 * urban
        + np.array([0.12, 0.0, -0.08, 0.06, -0.1, -0.06])[reg0]
        + effects.spend[area]
        + 0.45 * pop["thrift"]
        + (0.0, 0.02, 0.035)[t]
        + rng.normal(0.0, 0.3, n)
    )
    spend = np.clip(np.rint(np.exp(log_spend)), 20, 5000)
    answers["spend_true"] = np.where(shops, spend, np.nan)

    online = -0.8 * age_c + 0.4 * (edu0 == 3) + effects.online[area] + 0.25 * t
    channel_logits = np.column_stack(
        [
            np.full(n, 1.2) + 0.3 * (1.0 - urban),
            0.1 + 0.5 * urban - 0.2 * age_c,
            -1.3 + online,
            -1.8 + online + 0.3 * (1.0 - urban),
            -1.9 + 0.9 * (1.0 - urban) + 0.4 * age_c,
        ]
    )
    answers["channel"] = draw_categorical(rng, softmax_rows(channel_logits)) + 1
    return answers


def response_propensity(pop: dict[str, np.ndarray], rows: np.ndarray) -> np.ndarray:
    """Probability that an issued adult completes the interview: logistic in age, education and urbanity.

    logit = -0.05 + a[age band] + e[education] - 0.2 * urban; overall about 47%.
    """
    logit = (
        -0.05
        + np.array([-0.85, -0.55, -0.1, 0.2, 0.55, 0.75])[pop["age"][rows] - 1]
        + np.array([-0.95, -0.25, 0.1, 0.7])[pop["education"][rows] - 1]
        - 0.2 * pop["urban"][rows]
    )
    return expit(logit)


# ---------------------------------------------------------------- sample


def select_areas(rng: np.random.Generator, sizes: np.ndarray, n_select: int) -> np.ndarray:
    """Systematic PPS: positions (into `sizes`) of `n_select` areas from a randomly ordered list.

    Interval I = M / n; points u, u + I, ..., u + (n - 1) I with u ~ U(0, I) on the cumulated sizes of
    the shuffled list. With every M_i < I each area is hit at most once and its inclusion probability
    is n M_i / M (Lohr, Sampling: Design and Analysis, 3rd ed., section 6.2, from memory).
    """
    order = rng.permutation(sizes.size)
    total = sizes.sum()
    interval = total / n_select
    if sizes.max() >= interval:
        raise ValueError("an area is larger than the sampling interval; it could be selected twice")
    cum = np.cumsum(sizes[order])
    points = rng.uniform(0.0, interval) + interval * np.arange(n_select)
    return np.sort(order[np.searchsorted(cum, points, side="right")])


def draw_wave(
    rng: np.random.Generator,
    frame: pl.DataFrame,
    pop: dict[str, np.ndarray],
    answers: dict[str, np.ndarray],
    wave: str,
) -> pl.DataFrame:
    """The completes of one wave: two-stage selection, then nonresponse, then the answers."""
    members_start = np.concatenate([[0], np.cumsum(frame["adults"].to_numpy())])
    sizes = frame["adults"].to_numpy()
    regions = frame["region"].to_numpy()
    issued: list[np.ndarray] = []
    probability: list[np.ndarray] = []
    for region in REGIONS:
        in_region = np.flatnonzero(regions == region.code)
        chosen = in_region[select_areas(rng, sizes[in_region], region.areas_selected)]
        p = region.areas_selected * ISSUED_PER_AREA / sizes[in_region].sum()
        for a in chosen:
            issued.append(members_start[a] + rng.choice(sizes[a], ISSUED_PER_AREA, replace=False))
            probability.append(np.full(ISSUED_PER_AREA, p))
    rows = np.concatenate(issued)
    p_select = np.concatenate(probability)
    responded = rng.random(rows.size) < response_propensity(pop, rows)
    rows, p_select = rows[responded], p_select[responded]

    spend = answers["spend_true"][rows]
    refused = rng.random(rows.size) < 0.04
    spend = np.where(refused, np.nan, spend)
    area_index = pop["area_index"][rows]
    ids = pl.Series("resp_id", np.arange(1, rows.size + 1)).cast(pl.String).str.zfill(5)
    return pl.DataFrame(
        {
            "resp_id": f"{wave}-" + ids,
            "region": pop["region"][rows].astype(np.int64),
            "area": frame["area"].to_numpy()[area_index],
            "p_select": p_select,
            "urban_rural": np.where(pop["urban"][rows], 1, 2).astype(np.int64),
            "age_band": pop["age"][rows].astype(np.int64),
            "sex": pop["sex"][rows].astype(np.int64),
            "education": pop["education"][rows].astype(np.int64),
            **{column: answers[column][rows] for column in BRANDS},
            "shop_freq": answers["shop_freq"][rows],
            "satisfaction": answers["satisfaction"][rows],
            "recommend": answers["recommend"][rows],
            "spend": pl.Series("spend", spend, nan_to_null=True).cast(pl.Int64),
            "channel": answers["channel"][rows],
        }
    )


# ---------------------------------------------------------------- outputs


def margins_table(pop: dict[str, np.ndarray]) -> pl.DataFrame:
    """Population counts of adults for the raking margins age_band x sex, region, education, urban_rural."""
    people = pl.DataFrame(
        {
            "age_band": pop["age"],
            "sex": pop["sex"],
            "region": pop["region"],
            "education": pop["education"],
            "urban_rural": np.where(pop["urban"], 1, 2),
        }
    )
    crossed = (
        people.group_by("age_band", "sex")
        .len()
        .sort("age_band", "sex")
        .select(
            pl.lit("age_band x sex").alias("variable"),
            pl.format("{} x {}", "age_band", "sex").alias("category"),
            pl.col("len").cast(pl.Int64).alias("target"),
        )
    )
    singles = [
        people.group_by(name)
        .len()
        .sort(name)
        .select(
            pl.lit(name).alias("variable"),
            pl.col(name).cast(pl.String).alias("category"),
            pl.col("len").cast(pl.Int64).alias("target"),
        )
        for name in ("region", "education", "urban_rural")
    ]
    return pl.concat([crossed, *singles])


def _shares(values: np.ndarray, codes: list[int]) -> list[float]:
    return [float(np.mean(values == c)) for c in codes]


def truth_rows(wave: str, answers: dict[str, np.ndarray]) -> list[dict[str, object]]:
    """The population's true values at `wave` of the measures the demo book reports."""
    everyone = "all adults"
    rows: list[dict[str, object]] = []

    def add(measure: str, variable: str, category: str, value: float, base: str) -> None:
        rows.append(
            {
                "wave": wave,
                "measure": measure,
                "variable": variable,
                "category": category,
                "value": value,
                "base": base,
            }
        )

    for column in BRANDS:
        add("proportion", "aware", column, float(answers[column].mean()), everyone)
    for code, share in zip(SHOP_FREQ, _shares(answers["shop_freq"], list(SHOP_FREQ))):
        add("proportion", "shop_freq", str(code), share, everyone)

    sat = answers["satisfaction"]
    sat_codes = [*range(11), DONT_KNOW]
    for code, share in zip(sat_codes, _shares(sat, sat_codes)):
        add("proportion", "satisfaction", str(code), share, everyone)
    for label, codes in SATISFACTION_NETS.items():
        add("proportion", "satisfaction", label, float(np.isin(sat, codes).mean()), everyone)
    add("mean", "satisfaction", "", float(sat[sat != DONT_KNOW].mean()), "all adults excluding don't know")

    rec = answers["recommend"]
    for code, share in zip(range(11), _shares(rec, list(range(11)))):
        add("proportion", "recommend", str(code), share, everyone)
    for label, codes in RECOMMEND_NETS.items():
        add("proportion", "recommend", label, float(np.isin(rec, codes).mean()), everyone)
    add("mean", "recommend", "", float(rec.mean()), everyone)

    spend = answers["spend_true"]
    add("mean", "spend", "", float(np.nanmean(spend)), "adults who do grocery shopping (shop_freq 1-4)")

    for code, share in zip(CHANNELS, _shares(answers["channel"], list(CHANNELS))):
        add("proportion", "channel", str(code), share, everyone)
    return rows



def area_frame_table(frame: pl.DataFrame) -> pl.DataFrame:
    """Per region: label, areas and adults in the population, areas selected per wave."""
    summary = frame.group_by("region").agg(
        pl.len().cast(pl.Int64).alias("areas"), pl.col("adults").sum().alias("adults")
    )
    plan = pl.DataFrame(
        {
            "region": [r.code for r in REGIONS],
            "region_label": [r.name for r in REGIONS],
            "areas_selected_per_wave": [r.areas_selected for r in REGIONS],
        }
    )
    return (
        plan.join(summary, on="region")
        .select("region", "region_label", "areas", "adults", "areas_selected_per_wave")
        .sort("region")
    )


def write_csv_atomic(frame: pl.DataFrame, path: Path) -> None:
    """Write `frame` as CSV to a temporary sibling, then rename it over `path`."""
    tmp = path.with_name(path.name + ".tmp")
    frame.write_csv(tmp)
    tmp.replace(path)


def write_parquet_atomic(frame: pl.DataFrame, path: Path) -> None:
    """Write `frame` as Parquet to a temporary sibling, then rename it over `path`."""
    tmp = path.with_name(path.name + ".tmp")
    frame.write_parquet(tmp)
    tmp.replace(path)


def generate(out: Path) -> None:
    """Build the population, draw the three waves and write every demo file under `out`."""
    streams = np.random.SeedSequence(SEED).spawn(3 + 2 * len(WAVES))
    frame_rng, people_rng, effects_rng = (np.random.default_rng(s) for s in streams[:3])
    frame = build_frame(frame_rng)
    pop = build_population(people_rng, frame)
    effects = draw_area_effects(effects_rng, frame.height)

    (out / "waves").mkdir(parents=True, exist_ok=True)
    truth: list[dict[str, object]] = []
    for k, wave in enumerate(WAVES):
        answers_rng = np.random.default_rng(streams[3 + 2 * k])
        sample_rng = np.random.default_rng(streams[4 + 2 * k])
        answers = wave_answers(answers_rng, pop, effects, wave)
        truth += truth_rows(wave, answers)
        completes = draw_wave(sample_rng, frame, pop, answers, wave)
        target = out / WAVE_FILES[wave]
        if target.suffix == ".parquet":
            write_parquet_atomic(completes, target)
        else:
            write_csv_atomic(completes, target)

    write_csv_atomic(margins_table(pop), out / "population_margins.csv")
    write_csv_atomic(pl.DataFrame(truth), out / "population_truth.csv")
    write_csv_atomic(area_frame_table(frame), out / "area_frame.csv")
    write_csv_atomic(frame, out / "area_sizes.csv")


def main(argv: list[str] | None = None) -> int:
    """Command line: `python sample_data/generate_demo.py [--out DIR]`."""
    parser = argparse.ArgumentParser(description="Regenerate wavebook's invented demo study.")
    parser.add_argument(
        "--out",
        type=Path,
        default=Path(__file__).resolve().parent,
        help="folder to write into (default: the sample_data folder beside this script)",
    )
    args = parser.parse_args(argv)
    generate(args.out)
    return 0


if __name__ == "__main__":
    sys.exit(main())
