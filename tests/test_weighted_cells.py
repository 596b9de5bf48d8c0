"""Weighted design-based estimates of the topline rows (pipeline.tables.weighted_cells)."""

from __future__ import annotations

import re

import numpy as np
import polars as pl
import pytest

from pipeline.estimation.options import VarianceOptions, parse_variance
from pipeline.staging.database import load_responses, open_database
from pipeline.staging.stage import stage_wave
from pipeline.tables.topline import unweighted_toplines
from pipeline.tables.weighted_cells import wave_estimates
from pipeline.weighting import fit_recipe, parse_steps
from pipeline.weighting.base import design_base_weights


def _rows(n: int) -> list[dict[str, str]]:
    """n invented respondents in 2 regions x 3 areas; age band 3 never used; unequal probabilities."""
    rng = np.random.default_rng(7)
    rows = []
    for i in range(n):
        region = 1 + i % 2
        rows.append(
            {
                "resp_id": f"r{i:04d}",
                "region": str(region),
                "area": str(1 + (i // 2) % 3),
                "p_select": f"{0.01 * region * (1 + (i // 6) % 2):g}",
                "age_band": str(1 + int(rng.integers(0, 2))),
                "channel": "shop" if rng.random() < 0.3 + 0.1 * region else "web",
                "aware_kestrel": str(int(rng.random() < 0.4)),
                "aware_lumen": "" if i % 7 == 0 else str(int(rng.random() < 0.6)),
                "satisfaction": str(int(rng.choice([0, 5, 7, 9, 10, 99]))),
                "spend": "" if i % 5 == 4 else f"{float(rng.gamma(2.0, 30.0)):.2f}",
            }
        )
    return rows


@pytest.fixture
def wave(tracker):
    """The tracker study with a 120-respondent W1, staged; returns (study, responses, layout, recipe)."""
    tracker.write_wave("wave1.csv", _rows(120))
    study = tracker.study()
    stage_wave(study, "W1", quiet=True)
    con = open_database(study, read_only=True)
    try:
        layout = unweighted_toplines(con, study).filter(pl.col("wave") == "W1")
        responses = load_responses(con, study, ["W1"])
    finally:
        con.close()
    base, _ = design_base_weights(responses, study)
    recipe = fit_recipe(responses, [], base_weights=base)
    return study, responses, layout, recipe


def _estimates(wave, options: VarianceOptions = VarianceOptions()) -> pl.DataFrame:
    study, responses, layout, recipe = wave
    est = wave_estimates(responses, study, recipe, layout, options, wave="W1")
    return layout.join(est, on=["wave", "variable", "row_order"], how="left")


def _row(cells: pl.DataFrame, variable: str, label: str) -> dict:
    return cells.filter((pl.col("variable") == variable) & (pl.col("row_label") == label)).row(0, named=True)


def test_weighted_percent_is_the_weighted_share_of_the_base(wave):
    cells = _estimates(wave)
    responses = wave[1].with_columns(w=1.0 / pl.col("p_select"))
    # identity: 100 * sum(w y) / sum(w) over the base
    shop = responses.select((pl.col("w") * (pl.col("channel") == "shop")).sum() / pl.col("w").sum()).item()
    assert _row(cells, "channel", "In a shop")["estimate"] == pytest.approx(100 * shop, rel=1e-12)
    asked = responses.filter(pl.col("aware_lumen").is_not_null())
    lumen = asked.select((pl.col("w") * pl.col("aware_lumen")).sum() / pl.col("w").sum()).item()
    assert _row(cells, "aware", "Lumen")["estimate"] == pytest.approx(100 * lumen, rel=1e-12)
    scored = responses.filter(pl.col("satisfaction") != 99)
    mean = scored.select((pl.col("w") * pl.col("satisfaction")).sum() / pl.col("w").sum()).item()
    assert _row(cells, "satisfaction", "Mean")["estimate"] == pytest.approx(mean, rel=1e-12)
    assert _row(cells, "channel", "In a shop")["weighted_base"] == pytest.approx(responses["w"].sum(), rel=1e-12)


def test_taylor_se_matches_the_ultimate_cluster_formula(wave):
    """SE of a ratio p = sum(w y)/sum(w) by the two-stage formula with the first-stage FPC,
    computed here independently: z_i = w_i (y_i - p) / sum(w); v = sum_h (1 - n_h/N_h) n_h/(n_h-1)
    sum_j (z_hj - zbar_h)^2 (Lohr, Sampling: Design and Analysis, 3rd ed., sections 6.3 and 9.1,
    from memory; N_h = 220 and 180 PSUs as declared in the spec)."""
    cells = _estimates(wave)
    r = wave[1].with_columns(w=1.0 / pl.col("p_select"), y=(pl.col("channel") == "shop").cast(pl.Float64))
    w, y = r["w"].to_numpy(), r["y"].to_numpy()
    p = (w * y).sum() / w.sum()
    z = w * (y - p) / w.sum()
    psu_totals = pl.DataFrame({"h": r["region"].cast(pl.String), "j": r["area"].cast(pl.String), "z": z}).group_by("h", "j").agg(pl.col("z").sum())
    v = 0.0
    for h, big_n in (("1", 220), ("2", 180)):
        zh = psu_totals.filter(pl.col("h") == h)["z"].to_numpy()
        n_h = len(zh)
        v += (1 - n_h / big_n) * n_h / (n_h - 1) * ((zh - zh.mean()) ** 2).sum()
    # plus the two-stage within-PSU term f_h sum_j m_j/(m_j-1) sum_i (z_i - zbar_j)^2, second-stage
    # fraction undeclared so taken as 0 (Cochran 1977, Sampling Techniques, 3rd ed., section 11.9, from memory)
    units = pl.DataFrame({"h": r["region"].cast(pl.String), "j": r["area"].cast(pl.String), "z": z})
    for (h, _), part in units.group_by("h", "j"):
        zj, n_h = part["z"].to_numpy(), psu_totals.filter(pl.col("h") == h).height
        v += n_h / {"1": 220, "2": 180}[h] * len(zj) / (len(zj) - 1) * ((zj - zj.mean()) ** 2).sum()
    assert _row(cells, "channel", "In a shop")["se"] == pytest.approx(100 * np.sqrt(v), rel=1e-9)
    # design degrees of freedom: PSUs minus strata = 6 - 2 (Lohr 3rd ed. section 9.1, from memory)
    assert _row(cells, "channel", "In a shop")["df"] == 4


def test_empty_codebook_category_is_kept_with_zero(wave):
    cells = _estimates(wave)
    row = _row(cells, "age_band", "55+")
    assert row["count"] == 0
    assert row["estimate"] == 0.0
    assert row["se"] == 0.0


def test_every_estimable_row_has_an_estimate_and_interval_around_it(wave):
    cells = _estimates(wave)
    estimable = cells.filter(pl.col("row_kind").is_in(["category", "net", "item", "missing"]) & (pl.col("count") > 0))
    assert estimable.height > 10
    assert estimable["estimate"].null_count() == 0
    assert (estimable["ci_low"] <= estimable["estimate"]).all()
    assert (estimable["estimate"] <= estimable["ci_high"]).all()
    assert ((estimable["ci_low"] >= 0) & (estimable["ci_high"] <= 100)).all()


def test_replicate_method_from_the_variance_table(wave):
    options, problems = parse_variance({"method": "stratified-jackknife"})
    assert problems == []
    taylor = _estimates(wave)
    jack = _estimates(wave, options)
    a, b = _row(taylor, "channel", "In a shop"), _row(jack, "channel", "In a shop")
    assert b["estimate"] == pytest.approx(a["estimate"], rel=1e-12)
    # the stratified jackknife of a ratio and its linearization agree to first order
    # (Wolter, Introduction to Variance Estimation, 2nd ed., section 4.5, from memory): within 25% here
    assert b["se"] == pytest.approx(a["se"], rel=0.25)


def test_variance_table_problems_name_the_key():
    _, problems = parse_variance({"method": "bootstrapp", "replicates": 1, "colour": "red", "level": 1.5})
    messages = " | ".join(p.message for p in problems)
    assert "variance.method" in messages
    assert "variance.replicates" in messages
    assert "variance.colour: unknown key" in messages
    assert "variance.level" in messages


def test_percentages_of_a_raking_margin_are_flagged_as_set_by_weighting(wave):
    """Raking to region shares makes the region percentages equal their targets exactly (the
    calibration equations), so they carry no sampling error; other variables keep theirs."""
    study, responses, layout, _ = wave
    steps = parse_steps(({"step": "rake", "margins": ["region"], "totals": {"region": {"1": 0.55, "2": 0.45}}},), study.step_context())
    base, _ = design_base_weights(responses, study)
    recipe = fit_recipe(responses, steps, base_weights=base)
    est = wave_estimates(responses, study, recipe, layout, VarianceOptions(), wave="W1")
    cells = layout.join(est, on=["wave", "variable", "row_order"], how="left")
    region = _row(cells, "region", "Northmoor")
    assert region["estimate"] == pytest.approx(55.0, rel=1e-6)  # the target (calibration identity)
    assert region["set_by_weighting"] is True
    assert region["se"] == 0.0 and region["deff"] is None
    channel = _row(cells, "channel", "In a shop")
    assert channel["set_by_weighting"] is False
    assert channel["se"] > 0.5  # percentage points: a real sampling error with 120 respondents


def test_book_shows_weighting_summary_and_flags(wave, tmp_path):
    from html.parser import HTMLParser

    from pipeline.book import build_context, render_book
    from pipeline.book import variance_lines, weighting_section
    from pipeline.tables import export_cells
    from pipeline.weighting.store import build_report

    study, responses, layout, _ = wave
    steps = parse_steps(({"step": "rake", "margins": ["region"], "totals": {"region": {"1": 0.55, "2": 0.45}}},), study.step_context())
    base, _ = design_base_weights(responses, study)
    recipe = fit_recipe(responses, steps, base_weights=base)
    report = build_report(recipe, wave="W1", n_input=responses.height)
    cells = export_cells(layout.join(
        wave_estimates(responses, study, recipe, layout, VarianceOptions(), wave="W1"),
        on=["wave", "variable", "row_order"],
        how="left",
    ))
    section = weighting_section(study, {"W1": report})
    assert [m.category for m in section.margins] == ["Northmoor", "Eastvale"]  # codebook labels, not codes
    assert section.margins[0].target == "55.0%"
    assert section.waves[0].deff == f"{report.final.deff:.2f}"
    lines = variance_lines(VarianceOptions(), study, calibrated=True)
    context = build_context(study, cells, weighting=section, variance=lines, level=0.9)
    assert context.weighting is section
    cautions = {c.title: " ".join(c.paragraphs) for c in context.cautions}
    assert "match the population on region" in cautions["What the weighting repairs"]
    assert "A 90% confidence interval" in cautions["What a confidence interval says"]
    assert any("residuals of the calibration" in p for p in context.methodology)
    book = render_book(study, cells, out_path=tmp_path / "book.html", weighting=section, variance=lines)

    class Collect(HTMLParser):
        def __init__(self) -> None:
            super().__init__()
            self.ids: list[str] = []
            self.text: list[str] = []

        def handle_starttag(self, tag, attrs):
            if dict(attrs).get("id"):
                self.ids.append(dict(attrs)["id"])

        def handle_data(self, data):
            self.text.append(data)

    parser = Collect()
    parser.feed(book.read_text(encoding="utf-8"))
    assert "weighting" in parser.ids
    text = " ".join(parser.text)
    assert "set by weighting" in text
    assert re.search(r"Design effect\s+(\d+\.\d\d\s+)+", text)  # the design effect's row label is text, not CSS
    assert "Respondents weighted" in text and "Effective number of respondents" in text  # headers say what they count
    assert not any(rid in text for rid in responses["respondent_id"].to_list())  # no respondent ids
