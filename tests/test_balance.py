"""Balance scores (percentage plus minus percentage minus) with their design-based SE, and nets
over multi-response items."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

from conftest import TRACKER_SPEC, Tracker, tracker_rows
from pipeline.errors import SpecError
from pipeline.estimation import SampleDesign, group_totals, taylor_variance
from pipeline.estimation.estimands import Ratios
from pipeline.runner import variance_options, weigh_and_estimate
from pipeline.staging.database import load_responses, open_database
from pipeline.staging.stage import stage_wave
from pipeline.tables.topline import unweighted_toplines

BALANCE = 'balance = { "Satisfaction balance" = { plus = [9, 10], minus = [0, 1, 2, 3, 4, 5] } }\n'
NETS = 'nets = { "Kestrel or Lumen" = ["aware_kestrel", "aware_lumen"], "Only Lumen listed" = ["aware_lumen"] }\n'


def _spec(design: str) -> str:
    spec = TRACKER_SPEC.replace('nets = { "Top two box (9-10)" = [9, 10] }\n', 'nets = { "Top two box (9-10)" = [9, 10] }\n' + BALANCE)
    spec = spec.replace('items = { aware_kestrel = "Kestrel", aware_lumen = "Lumen" }\n',
                        'items = { aware_kestrel = "Kestrel", aware_lumen = "Lumen" }\n' + NETS)
    start, end = spec.index("[design]"), spec.index("[variables.region]")
    return spec[:start] + design + "\n" + spec[end:]


CLUSTERED = '[design]\nkind = "probability"\nstrata = "region"\npsu = "area"\nselection_probability = "p_select"\n'
SIMPLE = '[design]\nkind = "probability"\n'


def _rows(n: int, prefix: str, seed: int) -> list[dict[str, str]]:
    rng = np.random.default_rng(seed)
    rows = tracker_rows(n, prefix=prefix)
    for i, row in enumerate(rows):
        row["satisfaction"] = str(int(rng.choice([0, 2, 5, 7, 8, 9, 10, 99], p=[.1, .1, .15, .15, .1, .15, .15, .1])))
        row["area"] = str(1 + i % 4)
        row["aware_lumen"] = "" if i % 9 == 0 else str(int(rng.random() < 0.5))
    return rows


def _run(tmp_path: Path, design: str) -> tuple[pl.DataFrame, pl.DataFrame]:
    t = Tracker(tmp_path, _spec(design))
    t.write_wave("wave1.csv", _rows(160, "a", 1))
    t.write_wave("wave2.csv", _rows(120, "b", 2))
    study = t.study()
    for wave in ("W1", "W2"):
        stage_wave(study, wave, quiet=True)
    con = open_database(study, read_only=True)
    try:
        cells = unweighted_toplines(con, study)
        responses = load_responses(con, study, ["W1"])
    finally:
        con.close()
    estimated, *_ = weigh_and_estimate(study, cells, variance_options(study), quiet=True)
    return estimated.filter(pl.col("wave") == "W1"), responses


def _row(cells: pl.DataFrame, variable: str, kind: str, label: str | None = None) -> dict:
    mask = (pl.col("variable") == variable) & (pl.col("row_kind") == kind)
    if label is not None:
        mask &= pl.col("row_label") == label
    return cells.filter(mask).row(0, named=True)


def test_balance_se_equals_the_contrast_of_the_core_covariance(tmp_path: Path) -> None:
    cells, responses = _run(tmp_path, CLUSTERED)
    frame = responses.with_columns(w=1.0 / pl.col("p_select"))
    sat = pl.col("satisfaction")
    quantities = {
        "base": sat.is_not_null().cast(pl.Float64),
        "plus": sat.is_in([9, 10]).fill_null(False).cast(pl.Float64),
        "minus": sat.is_in([0, 1, 2, 3, 4, 5]).fill_null(False).cast(pl.Float64),
    }
    gt = group_totals(frame, quantities, weight="w", strata="region", psu="area")
    layout = SampleDesign(weight="w", strata="region", psu="area").layout(gt)
    ratios = Ratios(num=[gt.column("plus"), gt.column("minus")], den=[gt.column("base"), gt.column("base")])
    theta, cov = taylor_variance(gt, ratios, layout, covariance=True)
    contrast = np.array([1.0, -1.0])
    balance = _row(cells, "satisfaction", "balance")
    assert balance["estimate"] == pytest.approx(100 * (theta[0] - theta[1]), rel=1e-12)
    # var(p+ - p-) = c' V c with c = (1, -1): a linear contrast of the two shares
    assert balance["se"] == pytest.approx(100 * np.sqrt(contrast @ cov @ contrast), rel=1e-9)
    assert cov[0, 1] < 0  # the covariance matters: shares of one question are negatively correlated
    answered = responses.filter(sat.is_not_null())
    direct = 100 * (answered["satisfaction"].is_in([9, 10]).mean() - answered["satisfaction"].is_in(list(range(6))).mean())
    assert balance["value"] == pytest.approx(direct, rel=1e-12)
    assert balance["base"] == answered.height


def test_balance_se_under_simple_random_sampling_is_the_multinomial_difference(tmp_path: Path) -> None:
    cells, responses = _run(tmp_path, SIMPLE)
    answers = responses["satisfaction"].drop_nulls()
    n = answers.len()
    p_plus, p_minus = answers.is_in([9, 10]).mean(), answers.is_in(list(range(6))).mean()
    # Variance of the difference of two shares from one multinomial sample:
    # (p1 + p2 - (p1 - p2)^2) / n (Scott & Seber 1983, "Difference of proportions from the same
    # survey", The American Statistician 37(4), 319-320; from memory); the with-replacement
    # design-based estimator carries n / (n - 1), so the divisor is n - 1.
    expected = np.sqrt((p_plus + p_minus - (p_plus - p_minus) ** 2) / (n - 1))
    assert _row(cells, "satisfaction", "balance")["se"] == pytest.approx(100 * expected, rel=1e-9)


def test_nets_over_multi_items_count_anyone_choosing_one(tmp_path: Path) -> None:
    cells, responses = _run(tmp_path, CLUSTERED)
    asked = responses.filter(pl.col("aware_kestrel").is_not_null() | pl.col("aware_lumen").is_not_null())
    either = (asked["aware_kestrel"].fill_null(0) == 1) | (asked["aware_lumen"].fill_null(0) == 1)
    net = _row(cells, "aware", "net", "Kestrel or Lumen")
    assert (net["count"], net["base"]) == (either.sum(), asked.height)
    w = 1.0 / asked["p_select"]
    assert net["estimate"] == pytest.approx(100 * (w * either).sum() / w.sum(), rel=1e-12)
    lumen = _row(cells, "aware", "net", "Only Lumen listed")
    assert lumen["count"] == (asked["aware_lumen"] == 1).sum()
    labels = cells.filter(pl.col("variable") == "aware")["row_label"].to_list()
    assert labels.index("Kestrel or Lumen") < labels.index("Any of these")


@pytest.mark.parametrize(
    ("old", "new", "fragment"),
    [
        ("plus = [9, 10]", "plus = [5, 10]", "code 5 is both plus and minus"),
        ("plus = [9, 10]", "plus = [99]", "code 99 is not a valid code"),
        ('["aware_kestrel", "aware_lumen"]', '["aware_kestrel", "aware_nimbus"]', "'aware_nimbus' is not an item"),
        ('"Kestrel or Lumen"', '"Any of these"', "is the set's own net of every item"),
    ],
)
def test_bad_balance_and_item_nets_are_spec_errors(tmp_path: Path, old: str, new: str, fragment: str) -> None:
    spec = _spec(CLUSTERED).replace("exclude_from_statistics = [99]", "exclude_from_base = [99]")
    assert old in spec
    with pytest.raises(SpecError) as exc:
        Tracker(tmp_path, spec.replace(old, new)).study()
    assert fragment in exc.value.render()
