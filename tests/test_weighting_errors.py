"""Bad weighting input: one clear error naming the variable, category and count, every problem at once."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline.errors import DataError, SpecError
from pipeline.staging.spec import Design, Study, Variable
from pipeline.weighting.margins import Collapse
from pipeline.weighting.recipe import fit_recipe
from pipeline.weighting.steps import RakeStep, TrimStep, parse_steps
from pipeline.weighting.targets import TargetTable


def _data(n: int = 300) -> pl.DataFrame:
    rng = np.random.default_rng(2)
    return pl.DataFrame({"respondent_id": [f"r{i}" for i in range(n)], "a": rng.integers(1, 4, n), "b": rng.integers(1, 3, n)})


def _rake(targets: dict, **kw: object) -> list:
    return [RakeStep(0, tuple(tuple(k.split(" x ")) for k in targets), TargetTable(
        {k: {tuple(c.split(" x ")): v for c, v in cats.items()} for k, cats in targets.items()}, "test"), **kw)]


def _problems(exc: pytest.ExceptionInfo) -> list[tuple[str, str | None, str | None]]:
    return [(p.rule, p.column, p.value) for p in exc.value.problems]


def test_every_target_problem_is_reported_at_once() -> None:
    steps = _rake({
        "a": {"1": 0.3, "2": 0.3, "4": 0.4},              # data category 3 without target; code 4 unknown
        "b": {"1": 0.5, "2": 0.4},                         # proportions summing to 0.9
    })
    with pytest.raises(DataError) as exc:
        fit_recipe(_data(), steps, base_weights=np.ones(300))
    assert ("target-unknown-category", "a", "4") in _problems(exc)
    steps = _rake({"a": {"1": 0.3, "2": 0.3}, "b": {"1": 0.5, "2": 0.4}})
    with pytest.raises(DataError) as exc:
        fit_recipe(_data(), steps, base_weights=np.ones(300))
    found = _problems(exc)
    assert ("target-no-category", "a", "3") in found
    assert ("target-proportions", "b", None) in found
    no_cat = next(p for p in exc.value.problems if p.rule == "target-no-category")
    assert no_cat.count == int((_data()["a"] == 3).sum())  # names how many respondents are affected


def test_empty_cell_and_disagreeing_totals() -> None:
    data = _data().filter(pl.col("a") != 3)
    steps = _rake({"a": {"1": 300, "2": 300, "3": 400}, "b": {"1": 500, "2": 500}})
    with pytest.raises(DataError) as exc:  # code 3 is in the codebook but no respondent has it
        fit_recipe(data, steps, base_weights=np.ones(data.height), code_order={"a": ["1", "2", "3"]})
    assert _problems(exc) == [("target-empty-cell", "a", "3")]
    with pytest.raises(DataError) as exc:  # without a codebook the code is unknown altogether
        fit_recipe(data, steps, base_weights=np.ones(data.height))
    assert _problems(exc) == [("target-unknown-category", "a", "3")]
    steps = _rake({"a": {"1": 300, "2": 300, "3": 400}, "b": {"1": 500, "2": 400}})
    with pytest.raises(DataError) as exc:
        fit_recipe(_data(), steps, base_weights=np.ones(300))
    assert exc.value.problems[0].rule == "target-totals-disagree"
    assert "1,000" in exc.value.problems[0].message and "900" in exc.value.problems[0].message


@pytest.mark.parametrize("bad", [0.0, -2.0, np.nan])
def test_unusable_base_weights(bad: float) -> None:
    base = np.ones(300)
    base[[3, 7]] = bad
    with pytest.raises(DataError) as exc:
        fit_recipe(_data(), _rake({"a": {"1": 0.3, "2": 0.3, "3": 0.4}}), base_weights=base)
    (problem,) = exc.value.problems
    assert problem.count == 2 and problem.examples == ("r3", "r7")


def test_infeasible_trimming_names_the_conflicting_category() -> None:
    steps = _rake({"a": {"1": 0.8, "2": 0.1, "3": 0.1}}) + [TrimStep(1, upper=1.5)]
    with pytest.raises(DataError) as exc:
        fit_recipe(_data(), steps, base_weights=np.ones(300))
    problem = exc.value.problems[0]
    assert problem.rule == "trim-infeasible" and problem.column == "a" and problem.value == "1"
    assert "outside the bounds" in problem.message


def test_nonconvergence_is_an_error_or_a_warning_when_allowed() -> None:
    steps = _rake({"a": {"1": 0.3, "2": 0.3, "3": 0.4}, "b": {"1": 0.5, "2": 0.5}}, max_iterations=1, tolerance=1e-14)
    data = _data()
    # make a and b strongly associated so one cycle cannot meet both margins
    data = data.with_columns(b=pl.when(pl.col("a") == 1).then(1).otherwise(pl.col("b")))
    with pytest.raises(DataError, match="did not converge") as exc:
        fit_recipe(data, steps, base_weights=np.ones(300))
    assert {p.column for p in exc.value.problems} == {"a", "b"}
    allowed = _rake({"a": {"1": 0.3, "2": 0.3, "3": 0.4}, "b": {"1": 0.5, "2": 0.5}}, max_iterations=1, tolerance=1e-14,
                    allow_nonconvergence=True)
    recipe = fit_recipe(data, allowed, base_weights=np.ones(300))
    assert recipe.reports[0].converged is False and recipe.warnings[0].severity == "warning"


def test_collapse_order_exhausted_is_reported() -> None:
    age = np.array([1] * 50 + [2] * 50 + [3] * 5)
    data = pl.DataFrame({"respondent_id": [str(i) for i in range(age.size)], "age": age})
    steps = [RakeStep(0, (("age",),), TargetTable({"age": {("1",): 0.4, ("2",): 0.4, ("3",): 0.2}}, "t"),
                      collapse=Collapse(20, {"age": (("1", "2"),)}))]
    with pytest.raises(DataError) as exc:
        fit_recipe(data, steps, base_weights=np.ones(age.size))
    assert _problems(exc) == [("collapse-exhausted", "age", "3")]


def _study(tmp_path: Path) -> Study:
    return Study(
        path=tmp_path / "study.toml", title="t", respondent_id="id", waves=(), design=Design(),
        variables={
            "age_band": Variable("age_band", "single", "Age", values={1: "18-34", 2: "35+"}),
            "sex": Variable("sex", "single", "Sex", values={1: "M", 2: "F"}),
            "hh": Variable("hh", "numeric", "Household size"),
            "status": Variable("status", "single", "Status", values={1: "done", 2: "refused"}),
        },
    )


def test_parse_steps_reads_every_kind(tmp_path: Path) -> None:
    (tmp_path / "m.csv").write_text("variable,category,target\nage_band x sex,1 x 1,0.25\nsex,1,0.5\n")
    raw = (
        {"step": "nonresponse", "status": "status", "responded": [1], "nonrespondent": [2], "classes": ["sex"]},
        {"step": "poststratify", "cells": "age_band x sex", "targets": "m.csv"},
        {"step": "rake", "margins": ["age_band x sex", "sex"], "targets": "m.csv", "tolerance": 1e-9,
         "collapse": {"min_count": 10, "order": {"age_band": [[1, 2]]}}},
        {"step": "trim", "upper": 4, "lower": 0.25, "relative_to": "median"},
        {"step": "calibrate", "distance": "logit", "bounds": [0.5, 2], "margins": ["sex"], "numeric": {"hh": 5000},
         "totals": {"sex": {"1": 0.5, "2": 0.5}}},
    )
    steps = parse_steps(raw, _study(tmp_path).step_context())
    assert [s.kind for s in steps] == ["nonresponse", "poststratify", "rake", "trim", "calibrate"]
    assert steps[2].margins == (("age_band", "sex"), ("sex",)) and steps[2].tolerance == 1e-9
    assert steps[2].collapse == Collapse(10, {"age_band": (("1", "2"),)})
    assert steps[1].targets.margins["age_band x sex"] == {("1", "1"): 0.25}
    assert steps[4].bounds == (0.5, 2.0) and steps[4].numeric == {"hh": 5000.0}


def test_parse_steps_collects_every_problem_naming_keys(tmp_path: Path) -> None:
    raw = (
        {"step": "rake", "margins": ["age_band x region"], "targets": "missing.csv", "tolerence": 1e-6},
        {"step": "trim"},
        {"step": "calibrate", "distance": "logit", "bounds": [1.2, 2], "totals": {"sex": {"1": 1}}, "margins": ["sex"]},
        {"step": "smooth"},
        {"step": "nonresponse", "status": "status", "responded": [1], "nonrespondent": [1]},
    )
    with pytest.raises(SpecError) as exc:
        parse_steps(raw, _study(tmp_path).step_context())
    text = exc.value.render()
    for fragment in ("weighting step 1, margins[0]: 'region'", "weighting step 1, tolerence: unknown key", "missing.csv",
                     "weighting step 2, upper", "weighting step 3, bounds", "weighting step 4, step",
                     "weighting step 5, responded",
                     "weighting step 5, step: the nonresponse adjustment must be the first"):
        assert fragment in text, fragment
