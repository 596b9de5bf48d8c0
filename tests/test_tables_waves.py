"""Wave-over-wave change of banner cells (pipeline.tables.wave_change)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
from scipy import stats
from tables_helpers import cluster_sample, make_study, tabulate

from pipeline.staging.spec import Variable, Wave
from pipeline.tables.wave_change import satterthwaite, wave_pairs

WAVES = tuple(Wave(w, w, Path(f"{w}.csv")) for w in ("W1", "W2", "W3"))
STUDY = make_study({
    "y": Variable("y", "single", "Y", values={1: "a", 2: "b", 3: "c"}),
    "g": Variable("g", "single", "G", values={1: "g1", 2: "g2"}),
    "x": Variable("x", "numeric", "X"),
}, waves=WAVES)


def _three_waves():
    tab = None
    for i, wave in enumerate(("W1", "W2", "W3")):
        frame = cluster_sample(np.random.default_rng(30 + i), strata=2, psus=4, per_psu=15, categories=3, groups=2)
        tab = tabulate(frame, STUDY, ("g",), wave=wave, tabulation=tab)
    return tab.finish()


def test_independent_waves_change_variance_is_the_sum_of_the_two():
    """v(theta_t - theta_s) = v(theta_t) + v(theta_s) for independent samples; t on Satterthwaite's df."""
    result = _three_waves()
    waves = result.tests.filter(pl.col("comparison") == "waves")
    assert set(zip(waves["wave"], waves["wave_b"], strict=True)) == {("W2", "W1"), ("W3", "W2")}
    cells = result.cells.select("wave", "table", "row", "column", "estimate", "se", "df")
    joined = waves.join(cells, left_on=["wave", "table", "row", "column_a"],
                        right_on=["wave", "table", "row", "column"]).join(
        cells, left_on=["wave_b", "table", "row", "column_a"], right_on=["wave", "table", "row", "column"],
        suffix="_b")
    assert joined.height == waves.height > 20
    np.testing.assert_allclose(joined["difference"], joined["estimate"] - joined["estimate_b"], rtol=1e-12)
    np.testing.assert_allclose(joined["se_difference"] ** 2, joined["se"] ** 2 + joined["se_b"] ** 2, rtol=1e-12)
    df = satterthwaite(joined["se"].to_numpy() ** 2, joined["df"].to_numpy(), joined["se_b"].to_numpy() ** 2,
                       joined["df_b"].to_numpy())
    np.testing.assert_allclose(joined["df_den"], df, rtol=1e-12)
    np.testing.assert_allclose(joined["p_value"], 2 * stats.t.sf(np.abs(joined["statistic"]), df), rtol=1e-10)


def test_change_columns_and_marks_on_the_cells():
    result = _three_waves()
    w2 = result.cells.filter((pl.col("wave") == "W2") & pl.col("change_from_previous").is_not_null())
    assert w2.height > 0
    assert result.cells.filter(pl.col("wave") == "W1")["change_from_previous"].null_count() == \
        result.cells.filter(pl.col("wave") == "W1").height
    marked = result.tests.filter((pl.col("comparison") == "waves") & pl.col("significant"))
    for wave, table, row, column, diff in marked.select("wave", "table", "row", "column_a", "difference").iter_rows():
        cell = result.cells.filter((pl.col("wave") == wave) & (pl.col("table") == table) & (pl.col("row") == row)
                                   & (pl.col("column") == column))
        if wave != "W1":
            assert cell["change_mark"][0] == ("up" if diff > 0 else "down")


def test_satterthwaite_and_wave_pairs():
    """Equal variances and dfs give df_a + df_b (the pooled df; Satterthwaite 1946, a mathematical identity)."""
    np.testing.assert_allclose(satterthwaite(np.array([2.0]), np.array([10.0]), np.array([2.0]), np.array([10.0])),
                               [20.0])
    assert wave_pairs(["W1", "W2", "W3"], None) == [("W2", "W1"), ("W3", "W2")]
    assert wave_pairs(["W1", "W2", "W3"], "W1") == [("W2", "W1"), ("W3", "W2"), ("W3", "W1")]


def _panel_waves() -> tuple[pl.DataFrame, pl.DataFrame]:
    """Two waves drawn in the same 2 x 5 PSUs, with a PSU effect shared by both waves."""
    rng = np.random.default_rng(77)
    effect = rng.normal(0, 1.0, (2, 5))
    frames = []
    for wave in ("W1", "W2"):
        rows = []
        for h in range(2):
            for j in range(5):
                for i in range(12):
                    latent = effect[h, j] + rng.normal(0, 0.7) + (0.3 if wave == "W2" else 0.0)
                    rows.append({"respondent_id": f"{wave}-{h}-{j}-{i}", "h": str(h), "psu": str(j),
                                 "w": float(rng.uniform(1, 4)), "y": 1 + int(latent > 0), "g": 1 + i % 2,
                                 "x": float(5 + 2 * latent)})
        frames.append(pl.DataFrame(rows))
    return frames[0], frames[1]


def test_shared_psus_change_variance_equals_a_direct_stacked_computation():
    """same_psus_across_waves: z_i = d_i (y_i - p_t)/W_t for wave-t respondents and -d_i (y_i - p_s)/W_s for
    wave-s respondents, PSU totals over both waves, then the with-replacement PSU variance (a direct
    computation of the stacked design, Lohr 2022 section 9.1 applied to the stacked sample, from memory)."""
    from dataclasses import replace as dc_replace

    w1, w2 = _panel_waves()
    study = dc_replace(STUDY, design=dc_replace(STUDY.design, same_psus_across_waves=True))
    tab = tabulate(w1, study, ("g",), wave="W1")
    assert tab.stack_with("W2") == ["W1"]
    tab = tabulate(w2, study, ("g",), wave="W2", tabulation=tab, earlier={"W1": w1})
    result = tab.finish()
    got = result.tests.filter((pl.col("comparison") == "waves") & (pl.col("variable") == "y") & (pl.col("row") == 2))
    both = pl.concat([w1.with_columns(wave=pl.lit("W1")), w2.with_columns(wave=pl.lit("W2"))])
    w, y, g = both["w"].to_numpy(), both["y"].to_numpy(), both["g"].to_numpy()
    later = (both["wave"] == "W2").to_numpy()
    psu = (both["h"] + "/" + both["psu"]).to_numpy()
    independent = []
    for column, d in (("total", np.ones(len(g), bool)), ("g=1", g == 1), ("g=2", g == 2)):
        z = np.zeros(len(w))
        for sign, in_wave in ((1.0, later), (-1.0, ~later)):
            m = d & in_wave
            p = (w * (y == 2) * m).sum() / (w * m).sum()
            z += sign * m * ((y == 2) - p) / (w * m).sum()
        labels, inv = np.unique(psu, return_inverse=True)
        totals = np.bincount(inv, weights=w * z)
        strata = np.array([s.split("/")[0] for s in labels])
        v = sum(5 / 4 * ((totals[strata == h] - totals[strata == h].mean()) ** 2).sum() for h in ("0", "1"))
        row = got.filter(pl.col("column_a") == column)
        np.testing.assert_allclose(row["se_difference"][0], 100 * np.sqrt(v), rtol=1e-9)
        cells = result.cells.filter((pl.col("variable") == "y") & (pl.col("row") == 2) & (pl.col("column") == column))
        independent.append(np.sqrt((cells["se"] ** 2).sum()))
    # the shared PSU effect correlates the waves positively: the change is more precise than independence says
    assert got.sort("column_a")["se_difference"].to_numpy()[0] < independent[0]


def test_chance_marks_count_every_test_made_and_expect_tests_times_level():
    """Expected false marks if nothing differed = tests x level (linearity of expectation)."""
    result = _three_waves()
    made = int(result.tests["p_value"].is_not_null().sum())
    assert result.chance.tests == made > 50
    assert result.chance.expected == (made * 0.05,)
    assert f"{made:,} significance tests" in result.chance.sentence()
