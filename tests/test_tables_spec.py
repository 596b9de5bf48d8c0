"""The [tables], [[banners]] and [[tables.sets]] spec (pipeline.tables.spec), validated with load_spec."""

from __future__ import annotations

import pytest
from conftest import TRACKER_SPEC

from pipeline.errors import SpecError
from pipeline.tables import tables_spec
from pipeline.tables.banners import build_banner


def test_the_issue_form_parses(tracker):
    tracker.write_spec(TRACKER_SPEC + """
[tables]
banner = ["region", "age_band"]
significance = 0.05
low_base = 50
suppress_below = 20
""")
    spec = tables_spec(tracker.study())
    assert spec.levels == (0.05,) and spec.low_base == 50 and spec.suppress_below == 20 and spec.adjust == "none"
    assert spec.banner_of("satisfaction").breaks == ("region", "age_band")


def test_two_levels_named_banners_and_sets(tracker):
    tracker.write_spec(TRACKER_SPEC + """
[tables]
banner = ["region"]
significance = [0.10, 0.05]
adjust = "holm"
reference_wave = "W1"

[[tables.sets]]
stubs = ["satisfaction", "spend"]
banner = "brands"

[[banners]]
name = "brands"
columns = ["aware", "channel"]
""")
    study = tracker.study()
    spec = tables_spec(study)
    assert spec.levels == (0.05, 0.10) and spec.adjust == "holm" and spec.reference_wave == "W1"
    assert spec.banner_of("spend").name == "brands" and spec.banner_of("channel").name == "default"
    banner = build_banner(study, spec.banners["brands"])
    keys = [c.key for c in banner.columns]
    assert keys == ["total", "aware=aware_kestrel", "aware=aware_lumen", "channel=shop", "channel=web"]
    assert [c.letter for c in banner.columns] == ["", "A", "B", "C", "D"]
    assert [c.key for c in banner.for_stub("channel")] == keys[:3]  # its own break dropped


def test_every_problem_is_named_at_once(tracker):
    tracker.write_spec(TRACKER_SPEC + """
[tables]
banner = ["region", "nosuch", "spend"]
significance = 0.6
adjust = "bonferroni"
colour = "red"

[[tables.sets]]
stubs = ["ghost"]
banner = "missing"
""")
    with pytest.raises(SpecError) as info:
        tracker.study()
    rules = sorted(p.rule for p in info.value.problems)
    assert rules == sorted(["unknown-variable", "numeric-banner", "bad-value", "bad-value", "unknown-key",
                            "unknown-banner", "unknown-variable"])
    text = info.value.render()
    for needle in ("'nosuch'", "'spend' is numeric", "tables.significance", "tables.adjust", "tables.colour",
                   "'ghost'", "no banner named 'missing'"):
        assert needle in text


@pytest.mark.parametrize("level", ["0", "0.51", "-0.05", "[0.05, 0.10, 0.20]", "\"5%\""])
def test_significance_outside_zero_to_half_is_refused(tracker, level):
    tracker.write_spec(TRACKER_SPEC + f"\n[tables]\nbanner = [\"region\"]\nsignificance = {level}\n")
    with pytest.raises(SpecError, match="tables.significance"):
        tracker.study()


def test_same_psus_across_waves_is_a_design_flag(tracker):
    tracker.write_spec(TRACKER_SPEC.replace('psu_ids = "within-stratum"', 'psu_ids = "within-stratum"\nsame_psus_across_waves = true'))
    assert tracker.study().design.same_psus_across_waves is True
    tracker.write_spec(TRACKER_SPEC.replace('psu_ids = "within-stratum"', 'psu_ids = "within-stratum"\nsame_psus_across_waves = 1'))
    with pytest.raises(SpecError, match="same_psus_across_waves"):
        tracker.study()
