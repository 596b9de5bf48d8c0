"""Single-PSU policies, FPC handling and bad input: clear errors or explicit missing estimates with reasons."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline.errors import DataError, SpecError
from pipeline.estimation import estimate


def lone_psu_sample() -> pl.DataFrame:
    """Invented: strata A and B have 2 PSUs each, stratum C one PSU."""
    return pl.DataFrame(
        {
            "h": ["A"] * 4 + ["B"] * 4 + ["C"] * 2,
            "j": [1, 1, 2, 2, 1, 1, 2, 2, 1, 1],
            "w": [2.0] * 10,
            "y": [1.0, 2.0, 4.0, 3.0, 5.0, 7.0, 6.0, 9.0, 11.0, 10.0],
        }
    )


def psu_totals(frame: pl.DataFrame) -> pl.DataFrame:
    return frame.group_by("h", "j").agg((pl.col("w") * pl.col("y")).sum().alias("z")).sort("h", "j")


def stratum_part(z: np.ndarray) -> float:
    return len(z) / (len(z) - 1) * ((z - z.mean()) ** 2).sum()


def test_single_psu_error_names_the_strata() -> None:
    with pytest.raises(DataError) as info:
        estimate(lone_psu_sample(), weight="w", strata="h", psu="j", total="y")
    text = info.value.render()
    assert "single-psu" in text and "e.g. ids C" in text and "certainty" in text


def test_single_psu_certainty_contributes_zero() -> None:
    frame = lone_psu_sample()
    row = estimate(frame, weight="w", strata="h", psu="j", total="y", single_psu="certainty").row(0, named=True)
    z = psu_totals(frame)
    expected = sum(stratum_part(z.filter(pl.col("h") == s)["z"].to_numpy()) for s in ("A", "B"))
    assert row["se"] ** 2 == pytest.approx(expected, rel=1e-12)  # with-replacement formula by hand, C adds 0
    assert row["estimate"] == pytest.approx((frame["w"] * frame["y"]).sum())


def test_single_psu_grand_mean_uses_the_grand_mean_of_psu_totals() -> None:
    frame = lone_psu_sample()
    row = estimate(frame, weight="w", strata="h", psu="j", total="y", single_psu="grand-mean").row(0, named=True)
    z = psu_totals(frame)
    grand = z["z"].mean()
    lone = z.filter(pl.col("h") == "C")["z"][0]
    expected = sum(stratum_part(z.filter(pl.col("h") == s)["z"].to_numpy()) for s in ("A", "B")) + (lone - grand) ** 2
    assert row["se"] ** 2 == pytest.approx(expected, rel=1e-12)  # the definition in design.py, by hand


def test_single_psu_collapse_merges_with_the_partner() -> None:
    frame = lone_psu_sample()
    row = estimate(frame, weight="w", strata="h", psu="j", total="y", single_psu="collapse", collapse_with={"C": "B"}).row(0, named=True)
    merged = frame.with_columns(h=pl.when(pl.col("h") == "C").then(pl.lit("B")).otherwise(pl.col("h")), j=pl.when(pl.col("h") == "C").then(3).otherwise(pl.col("j")))
    by_hand = estimate(merged, weight="w", strata="h", psu="j", total="y").row(0, named=True)
    assert row["se"] == pytest.approx(by_hand["se"], rel=1e-12)  # same as relabelling the stratum by hand
    assert row["df"] == 5 - 2


def test_population_size_column_must_be_constant_within_stratum_and_not_below_sample() -> None:
    frame = lone_psu_sample().filter(pl.col("h") != "C").with_columns(N=pl.Series([10.0, 10, 10, 12, 1, 1, 1, 1]))
    with pytest.raises(DataError) as info:
        estimate(frame, weight="w", strata="h", psu="j", total="y", population_size="N")
    assert "fpc-not-constant" in info.value.render() and "ids A" in info.value.render()
    small = frame.with_columns(N=pl.when(pl.col("h") == "A").then(1.5).otherwise(10.0))
    with pytest.raises(DataError, match="fpc-too-small"):
        estimate(small, weight="w", strata="h", psu="j", total="y", population_size="N")


def test_missing_design_values_and_bad_weights_reported_together() -> None:
    frame = pl.DataFrame(
        {"h": ["A", None, "B", "B"], "j": [1, 1, None, 2], "w": [1.0, -2.0, float("nan"), None], "y": [1.0, 2.0, 3.0, 4.0]}
    )
    with pytest.raises(DataError) as info:
        estimate(frame, weight="w", strata="h", psu="j", mean="y")
    text = info.value.render()
    for expected in ("missing stratum values (column 'h'); 1 row", "missing PSU values (column 'j'); 1 row",
                     "missing weights", "negative weights", "not finite"):
        assert expected in text


def test_unique_psu_ids_repeating_across_strata_suggest_within_stratum() -> None:
    frame = lone_psu_sample().filter(pl.col("h") != "C")
    with pytest.raises(DataError) as info:
        estimate(frame, weight="w", strata="h", psu="j", psu_ids="unique", total="y")
    text = info.value.render()
    assert "psu-in-several-strata" in text and 'psu_ids = "within-stratum"' in text and "2 rows" in text
    within = estimate(frame, weight="w", strata="h", psu="j", total="y")
    assert within["df"][0] == 4 - 2


def test_unknown_columns_and_options_listed_at_once() -> None:
    frame = lone_psu_sample()
    with pytest.raises(SpecError) as info:
        estimate(frame, weight="wt", strata="stratum", mean="nope", variance="magic", source="x.csv")
    text = info.value.render()
    for col in ("'wt'", "'stratum'", "'nope'"):
        assert col in text
    assert "variance must be one of" in text


def test_zero_weights_are_allowed_but_not_in_bases() -> None:
    frame = lone_psu_sample().filter(pl.col("h") != "C").with_columns(w=pl.Series([0.0, 2, 2, 2, 2, 2, 2, 0]))
    row = estimate(frame, weight="w", strata="h", psu="j", mean="y").row(0, named=True)
    assert row["n"] == 6
    assert row["estimate"] == pytest.approx(frame.filter(pl.col("w") > 0)["y"].mean())


def test_empty_domain_and_zero_denominator_give_missing_rows_with_reasons() -> None:
    frame = pl.DataFrame(
        {
            "j": [1, 1, 2, 2, 3, 3],
            "w": [1.0, 2.0, 1.0, 2.0, 1.0, 1.0],
            "y": [1.0, 2.0, None, None, 3.0, 4.0],
            "x": [0.0, 0.0, 0.0, 0.0, 0.0, 0.0],
            "g": ["a", "a", "b", "b", "a", "a"],
        }
    )
    out = estimate(frame, weight="w", psu="j", mean="y", ratio=("y", "x"), by="g")
    empty = out.filter((pl.col("statistic") == "mean") & (pl.col("domain") == "g=b")).row(0, named=True)
    assert empty["estimate"] is None and empty["se"] is None and empty["n"] == 0
    assert empty["reason"] == "no respondents in this domain with an answer"
    ratio = out.filter((pl.col("statistic") == "ratio") & (pl.col("domain") == "")).row(0, named=True)
    assert ratio["estimate"] is None and ratio["reason"] == "denominator total is 0"
    whole = out.filter((pl.col("statistic") == "mean") & (pl.col("domain") == "")).row(0, named=True)
    assert whole["estimate"] == pytest.approx((1 + 4 + 3 + 4) / 5) and whole["reason"] == ""


def merged_by_hand(frame: pl.DataFrame) -> pl.DataFrame:
    """Stratum C relabelled as B, its PSU renumbered 3 (after B's PSUs 1 and 2)."""
    return frame.with_columns(
        h=pl.when(pl.col("h") == "C").then(pl.lit("B")).otherwise(pl.col("h")),
        j=pl.when(pl.col("h") == "C").then(3).otherwise(pl.col("j")),
    )


@pytest.mark.parametrize("method", ["stratified-jackknife", "bootstrap"])
@pytest.mark.parametrize("population", [None, {"A": 10.0, "B": 8.0, "C": 5.0}])
def test_collapsed_single_psu_stratum_equals_strata_merged_by_hand_under_replicates(method: str, population) -> None:
    frame = lone_psu_sample()
    options = {"weight": "w", "strata": "h", "psu": "j", "total": "y", "mean": "y", "variance": method}
    if method == "bootstrap":  # seed and replicates apply to the bootstrap only (an error otherwise)
        options |= {"seed": 4, "replicates": 50}
    collapsed = estimate(frame, **options, single_psu="collapse", collapse_with={"C": "B"},
                         population_size=population).sort("statistic")
    merged_population = None if population is None else {"A": 10.0, "B": 13.0}  # N_h add up in the merged stratum
    by_hand = estimate(merged_by_hand(frame), **options, population_size=merged_population).sort("statistic")
    # identity: collapsing is relabelling the stratum (same PSU order, so the same bootstrap draws)
    assert collapsed["se"].to_list() == pytest.approx(by_hand["se"].to_list(), rel=1e-12)
    assert collapsed["df"].to_list() == by_hand["df"].to_list()


def test_collapsed_jackknife_of_a_total_equals_the_collapsed_taylor_variance() -> None:
    frame = lone_psu_sample()
    options = {"weight": "w", "strata": "h", "psu": "j", "total": "y", "single_psu": "collapse",
               "collapse_with": {"C": "B"}, "population_size": {"A": 10.0, "B": 8.0, "C": 5.0}}
    stratified = estimate(frame, **options, variance="stratified-jackknife").row(0, named=True)
    taylor = estimate(frame, **options).row(0, named=True)
    # identity: the stratified jackknife of a linear total is the with-replacement formula, FPC included
    # (Wolter 2007, Introduction to Variance Estimation, 2nd ed., section 4.5, from memory); both then add
    # the two-stage within-PSU term sum_h f_h sum_j v2(z_hj) (Cochran 1977 section 11.9, from memory)
    assert stratified["se"] == pytest.approx(taylor["se"], rel=1e-12)


def test_certainty_single_psu_stratum_under_jackknife_and_bootstrap() -> None:
    frame = lone_psu_sample()
    options = {"weight": "w", "strata": "h", "psu": "j", "total": "y"}
    stratified = estimate(frame, **options, variance="stratified-jackknife", single_psu="certainty").row(0, named=True)
    taylor = estimate(frame, **options, single_psu="certainty").row(0, named=True)
    assert stratified["se"] == pytest.approx(taylor["se"], rel=1e-12)  # identity as above; stratum C adds 0 to both
    assert stratified["df"] == 4 - 2  # the sampled strata A and B only
    boot = estimate(frame, **options, variance="bootstrap", replicates=200, seed=9, single_psu="certainty")
    without_c = estimate(frame.filter(pl.col("h") != "C"), **options, variance="bootstrap", replicates=200, seed=9)
    # identity: C's lone PSU keeps factor 1 in every replicate and C draws nothing, so the replicate
    # deviations are those of the sample without C under the same seed
    assert boot["se"][0] == pytest.approx(without_c["se"][0], rel=1e-12)
    assert boot["estimate"][0] == pytest.approx((frame["w"] * frame["y"]).sum(), rel=1e-12)


@pytest.mark.parametrize("policy", ["error", "grand-mean"])
def test_replicates_without_a_usable_single_psu_policy_name_the_stratum(policy: str) -> None:
    with pytest.raises(DataError) as info:
        estimate(lone_psu_sample(), weight="w", strata="h", psu="j", total="y", variance="stratified-jackknife", single_psu=policy)
    assert "e.g. ids C" in info.value.render() and "certainty" in info.value.render()


def test_population_size_and_sampling_fraction_are_explicit() -> None:
    """No value is guessed to be a fraction or a count: each option says which it is."""
    frame = lone_psu_sample().filter(pl.col("h") != "C")
    with pytest.raises(SpecError) as info:
        estimate(frame, weight="w", strata="h", psu="j", total="y", population_size={"A": 10.0, "B": 8.0},
                 sampling_fraction=0.1)
    text = info.value.render()
    assert "give the population size or the sampling fraction, not both" in text
    with pytest.raises(SpecError, match=r"the sampling fraction must lie in \(0, 1\]"):
        estimate(frame, weight="w", strata="h", psu="j", total="y", sampling_fraction=1.5)
    with pytest.raises(DataError, match="a sampling fraction outside"):
        estimate(frame, weight="w", strata="h", psu="j", total="y", sampling_fraction={"A": 0.5, "B": 2.0})
    # a population size of 1 is a count (one unit in the stratum's population), not a fraction of 100%
    with pytest.raises(DataError, match="a population size smaller than the number of sampled PSUs"):
        estimate(frame, weight="w", strata="h", psu="j", total="y", population_size={"A": 1.0, "B": 8.0})
    by_fraction = estimate(frame, weight="w", strata="h", psu="j", total="y", sampling_fraction=0.25)
    n_h = frame.group_by("h").agg(pl.col("j").n_unique()).sort("h")["j"].to_list()
    by_size = estimate(frame, weight="w", strata="h", psu="j", total="y",
                       population_size={"A": n_h[0] / 0.25, "B": n_h[1] / 0.25})
    assert by_fraction["se"][0] == pytest.approx(by_size["se"][0], rel=1e-12)  # N_h = n_h / f_h (identity)
