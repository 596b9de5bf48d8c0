"""load_spec: the example spec loads to the right objects; each validation rule has a broken spec."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pytest

from conftest import TRACKER_SPEC
from pipeline.errors import Problem, SpecError
from pipeline.staging.spec import load_spec


def problems_of(tmp_path: Path, text: str) -> list[Problem]:
    """The problems load_spec reports for a spec text (fails the test if it loads)."""
    path = tmp_path / "study.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SpecError) as info:
        load_spec(path)
    assert all(p.file == str(path.resolve()) for p in info.value.problems)
    return info.value.problems


def one(problems: list[Problem], rule: str) -> Problem:
    found = [p for p in problems if p.rule == rule]
    assert len(found) == 1, [p.render() for p in problems]
    return found[0]


def test_example_spec_loads_to_typed_objects(tmp_path: Path) -> None:
    path = tmp_path / "study.toml"
    path.write_text(TRACKER_SPEC, encoding="utf-8")
    study = load_spec(path)
    assert study.title == "Riverbend Kettle Tracker"
    assert study.respondent_id == "resp_id"
    assert [w.id for w in study.waves] == ["W1", "W2"]
    assert study.waves[0].file == tmp_path.resolve() / "waves" / "wave1.csv"
    assert study.waves[0].fieldwork_start == dt.date(2026, 3, 2)
    assert study.waves[1].fieldwork_start is None
    assert study.database_path == tmp_path.resolve() / "study.duckdb"
    assert study.design.population == {1: 220.0, 2: 180.0}
    assert study.design.columns == ("region", "area", "p_select")
    region = study.variables["region"]
    assert region.values == {1: "Northmoor", 2: "Eastvale"} and region.int_coded
    channel = study.variables["channel"]
    assert channel.values == {"shop": "In a shop", "web": "On the web"} and not channel.int_coded
    satisfaction = study.variables["satisfaction"]
    # a rating's valid codes fill the unlabelled integers between its lowest and highest on-scale codes
    assert satisfaction.valid_codes == (*range(11), 99)
    assert satisfaction.exclude_from_statistics == (99,)
    assert satisfaction.nets == {"Top two box (9-10)": (9, 10)}
    assert study.variables["aware"].columns == ("aware_kestrel", "aware_lumen")
    assert study.variables["spend"].minimum == 0.0 and study.variables["spend"].maximum == 5000.0


def test_mixed_code_keys_are_all_strings(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace('values = { shop = "In a shop", web = "On the web" }', 'values = { 1 = "One", b = "Bee" }')
    path = tmp_path / "study.toml"
    path.write_text(text, encoding="utf-8")
    assert load_spec(path).variables["channel"].values == {"1": "One", "b": "Bee"}


def test_database_path_is_relative_to_the_spec(tmp_path: Path) -> None:
    path = tmp_path / "study.toml"
    path.write_text('database = "data/tracker.duckdb"\n' + TRACKER_SPEC, encoding="utf-8")
    assert load_spec(path).database_path == tmp_path.resolve() / "data" / "tracker.duckdb"


def test_weighting_and_variance_are_kept_raw(tmp_path: Path) -> None:
    text = TRACKER_SPEC + '\n[variance]\nmethod = "jackknife"\n\n[[weighting]]\nstep = "trim"\nupper = 4.0\n'
    path = tmp_path / "study.toml"
    path.write_text(text, encoding="utf-8")
    study = load_spec(path)
    assert study.weighting == ({"step": "trim", "upper": 4.0},)
    assert study.variance == {"method": "jackknife"}


def test_section_problems_join_the_spec_problems(tmp_path: Path) -> None:
    """[variance] and [[weighting]] are validated by their own modules, in the same run."""
    text = TRACKER_SPEC + '\n[variance]\nmethod = "guess"\n\n[[weighting]]\nstep = "trim"\nuppper = 4.0\n'
    rules = sorted(p.rule for p in problems_of(tmp_path, text))
    assert "variance-option" in rules and "spec-weighting" in rules
    broken_base = text.replace('title = "Riverbend Kettle Tracker"', "title = 3")
    rules = sorted(p.rule for p in problems_of(tmp_path, broken_base))
    assert "wrong-type" in rules and "variance-option" in rules  # weighting waits for a valid base spec


def test_toml_syntax_error_names_file_and_line(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace('label = "Age band"', 'label = "Age band')
    problem = one(problems_of(tmp_path, text), "toml-syntax")
    line = TRACKER_SPEC.splitlines().index('label = "Age band"') + 1
    assert f"study.toml, line {line}" in problem.message


def test_missing_spec_file(tmp_path: Path) -> None:
    with pytest.raises(SpecError) as info:
        load_spec(tmp_path / "nope.toml")
    assert info.value.problems[0].rule == "missing-file"
    assert "nope.toml" in info.value.problems[0].message


@pytest.mark.parametrize(
    ("old", "new", "key"),
    [
        ('title = "Riverbend Kettle Tracker"', 'title = "R"\ncolour = "red"', "colour"),
        ('label = "Wave 2 (June 2026)"', 'label = "W"\nfiles = "x"', "waves.W2.files"),
        ('psu_ids = "within-stratum"', 'psu_ids = "within-stratum"\nclusters = "area"', "design.clusters"),
        ('label = "Monthly spend (credits)"', 'label = "S"\nunit = "credits"', "variables.spend.unit"),
    ],
)
def test_unknown_keys_are_named(tmp_path: Path, old: str, new: str, key: str) -> None:
    problem = one(problems_of(tmp_path, TRACKER_SPEC.replace(old, new)), "unknown-key")
    assert problem.message.startswith(f"{key}: unknown key")


@pytest.mark.parametrize(
    ("old", "new", "key"),
    [
        ('title = "Riverbend Kettle Tracker"', "title = 3", "title"),
        ('notes = ["Fieldwork by an invented agency."]', "notes = [1, 2]", "notes"),
        ("fieldwork = [2026-03-02, 2026-03-21]", 'fieldwork = ["March"]', "waves.W1.fieldwork"),
        ("minimum = 0", 'minimum = "zero"', "variables.spend.minimum"),
        ('strata = "region"', "strata = 1", "design.strata"),
        ("population = { 1 = 220, 2 = 180 }", 'population = { 1 = "many", 2 = 180 }', "design.population.1"),
        ('values = { 1 = "18-34", 2 = "35-54", 3 = "55+" }', "values = { 1 = 5 }", "variables.age_band.values.1"),
    ],
)
def test_wrong_types_are_named(tmp_path: Path, old: str, new: str, key: str) -> None:
    assert old in TRACKER_SPEC
    problem = one(problems_of(tmp_path, TRACKER_SPEC.replace(old, new)), "wrong-type")
    assert problem.message.startswith(f"{key}: ")


def test_weighting_must_be_an_array_of_tables_and_variance_a_table(tmp_path: Path) -> None:
    problems = problems_of(tmp_path, 'weighting = "rake"\nvariance = 3\n' + TRACKER_SPEC)
    assert sorted(p.message.split(":")[0] for p in problems if p.rule == "wrong-type") == ["variance", "weighting"]


@pytest.mark.parametrize(
    ("old", "key"),
    [
        ('respondent_id = "resp_id"\n', "respondent_id"),
        ('file = "waves/wave2.csv"\n', "waves.W2.file"),
        ('label = "Region"\n', "variables.region.label"),
        ('values = { 1 = "Northmoor", 2 = "Eastvale" }\n', "variables.region.values"),
    ],
)
def test_missing_keys_are_named(tmp_path: Path, old: str, key: str) -> None:
    problem = one(problems_of(tmp_path, TRACKER_SPEC.replace(old, "")), "missing-key")
    assert problem.message.startswith(f"{key}: required key")


def test_missing_type(tmp_path: Path) -> None:
    problem = one(problems_of(tmp_path, TRACKER_SPEC.replace('type = "numeric"\n', "")), "missing-key")
    assert problem.message.startswith("variables.spend.type")


def test_exclude_from_mean_code_must_be_labelled(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace("exclude_from_statistics = [99]", "exclude_from_statistics = [98]")
    problem = one(problems_of(tmp_path, text), "undeclared-code")
    assert problem.message.startswith("variables.satisfaction.exclude_from_statistics: code 98")
    assert problem.value == "98"


def test_net_codes_must_be_valid(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace('nets = { "Top two box (9-10)" = [9, 10] }', 'nets = { "Top" = [9, 11] }')
    problem = one(problems_of(tmp_path, text), "undeclared-code")
    assert problem.message.startswith("variables.satisfaction.nets.Top: code 11")
    assert "valid: 0..10, 99" in problem.message


def test_net_of_string_codes(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace(
        'values = { shop = "In a shop", web = "On the web" }',
        'values = { shop = "In a shop", web = "On the web" }\nnets = { "Any" = ["shop", "post"] }',
    )
    problem = one(problems_of(tmp_path, text), "undeclared-code")
    assert problem.message.startswith("variables.channel.nets.Any: code 'post'")


@pytest.mark.parametrize(
    ("old", "new", "key"),
    [
        ('label = "Age band"', 'label = "Age band"\nitems = { a = "A" }', "variables.age_band.items"),
        ('label = "Age band"', "exclude_from_statistics = [1]\nlabel = \"Age band\"", "variables.age_band.exclude_from_statistics"),
        ('label = "Monthly spend (credits)"', 'label = "S"\nvalues = { 1 = "x" }', "variables.spend.values"),
    ],
)
def test_keys_of_another_type(tmp_path: Path, old: str, new: str, key: str) -> None:
    problem = one(problems_of(tmp_path, TRACKER_SPEC.replace(old, new, 1)), "key-not-for-type")
    assert problem.message.startswith(f"{key}: ")


def test_bad_variable_type(tmp_path: Path) -> None:
    problem = one(problems_of(tmp_path, TRACKER_SPEC.replace('type = "numeric"', 'type = "number"')), "bad-value")
    assert problem.message.startswith("variables.spend.type: 'number' is not one of")


def test_scale_codes_must_be_integers(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace('99 = "Don\'t know" }', 'dk = "Don\'t know" }').replace("exclude_from_statistics = [99]\n", "")
    problem = one(problems_of(tmp_path, text), "wrong-type")
    assert problem.message.startswith("variables.satisfaction.values: the codes of a rating must all be integers")


def test_base_weight_and_probability_conflict(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace('selection_probability = "p_select"', 'selection_probability = "p_select"\nbase_weight = "w"')
    problem = one(problems_of(tmp_path, text), "conflicting-keys")
    assert problem.message.startswith("design.base_weight: give at most one")


def test_nonprobability_with_supplied_weight_is_allowed(tmp_path: Path) -> None:
    text = (
        TRACKER_SPEC.replace('kind = "probability"', 'kind = "nonprobability"')
        .replace('selection_probability = "p_select"', 'base_weight = "panel_wt"')
        .replace("population = { 1 = 220, 2 = 180 }\n", "")
    )
    path = tmp_path / "study.toml"
    path.write_text(text, encoding="utf-8")
    design = load_spec(path).design
    assert design.kind == "nonprobability" and design.base_weight == "panel_wt"


def test_nonprobability_cannot_have_probabilities_or_fpc(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace('kind = "probability"', 'kind = "nonprobability"')
    problems = [p for p in problems_of(tmp_path, text) if p.rule == "conflicting-keys"]
    assert sorted(p.message.split(":")[0] for p in problems) == ["design.population", "design.selection_probability"]


def test_population_keys_must_be_strata_codes(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace("population = { 1 = 220, 2 = 180 }", "population = { 1 = 220, 3 = 180 }")
    problem = one(problems_of(tmp_path, text), "undeclared-code")
    assert problem.message.startswith("design.population.3: '3' is not a code of the strata variable 'region'")


@pytest.mark.parametrize(
    ("new", "key", "rule"),
    [
        ("population = { 1 = 220, 2 = -5 }", "design.population.2", "bad-value"),
        ("sampling_fraction = { 1 = 0.5, 2 = 1.5 }", "design.sampling_fraction.2", "bad-value"),
    ],
)
def test_population_values(tmp_path: Path, new: str, key: str, rule: str) -> None:
    problem = one(problems_of(tmp_path, TRACKER_SPEC.replace("population = { 1 = 220, 2 = 180 }", new)), rule)
    assert problem.message.startswith(f"{key}: must be")


def test_population_and_fraction_conflict(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace(
        "population = { 1 = 220, 2 = 180 }", "population = { 1 = 220, 2 = 180 }\nsampling_fraction = { 1 = 0.1, 2 = 0.1 }"
    )
    problem = one(problems_of(tmp_path, text), "conflicting-keys")
    assert problem.message.startswith("design.sampling_fraction: give population or sampling_fraction")


def test_unstratified_population_has_one_entry(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace('strata = "region"\n', "")
    problem = one(problems_of(tmp_path, text), "bad-value")
    assert problem.message.startswith("design.population: without design.strata give exactly one entry")


def test_collapse_with_needs_collapse_policy(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace("population = { 1 = 220, 2 = 180 }", "population = { 1 = 220, 2 = 180 }\ncollapse_with = { 1 = 2 }")
    problem = one(problems_of(tmp_path, text), "conflicting-keys")
    assert problem.message.startswith('design.collapse_with: collapse_with needs single_psu = "collapse"')


def test_collapse_with_loads_typed_codes(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace(
        "population = { 1 = 220, 2 = 180 }", 'single_psu = "collapse"\ncollapse_with = { 1 = 2 }'
    )
    path = tmp_path / "study.toml"
    path.write_text(text, encoding="utf-8")
    assert load_spec(path).design.collapse_with == {1: 2}


def test_duplicate_and_reserved_columns(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace(
        'items = { aware_kestrel = "Kestrel", aware_lumen = "Lumen" }',
        'items = { aware_kestrel = "Kestrel", spend = "Lumen", wave = "W" }',
    )
    problems = problems_of(tmp_path, text)
    duplicate = one(problems, "duplicate-column")
    assert "column 'spend' is already used by variables.aware" in duplicate.message
    assert one(problems, "reserved-name").message.startswith("variables.aware: 'wave' is a column name")


def test_bad_wave_id_and_dates(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace("[waves.W2]", '[waves."W 2"]').replace(
        "fieldwork = [2026-03-02, 2026-03-21]", "fieldwork = [2026-03-22, 2026-03-21]"
    )
    problems = [p for p in problems_of(tmp_path, text) if p.rule == "bad-value"]
    assert sorted(p.message.split(":")[0] for p in problems) == ["waves.W 2", "waves.W1.fieldwork"]


def test_every_problem_is_reported_at_once(tmp_path: Path) -> None:
    text = (
        TRACKER_SPEC.replace('title = "Riverbend Kettle Tracker"', "title = 3")
        .replace("exclude_from_statistics = [99]", "exclude_from_statistics = [98]")
        .replace('psu_ids = "within-stratum"', 'psu_ids = "within-stratum"\nclusters = "area"')
    )
    path = tmp_path / "study.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SpecError) as info:
        load_spec(path)
    assert sorted(p.rule for p in info.value.problems) == ["undeclared-code", "unknown-key", "wrong-type"]
    assert info.value.summary == f"the study spec {path.resolve()} has 3 problems"
