"""Retired names: no help text or document uses them, and a spec or command line that does is
refused with the new name (never read with the old meaning).

The retired spec values, keys and options come from `pipeline.renamed`, so a rename added there
is checked here without editing this file. The retired file suffixes and the product they belong
to are matched by the SHA-256 of the lowercased word, so their names appear nowhere in the
repository, this test included.
"""

from __future__ import annotations

import hashlib
import re
from pathlib import Path

import pytest

from conftest import TRACKER_SPEC
from pipeline.cli import COMMANDS, main
from pipeline.errors import Problem, SpecError
from pipeline.renamed import OPTIONS, SPEC_VALUES, VARIABLE_KEYS
from pipeline.staging.spec import load_spec

ROOT = Path(__file__).resolve().parents[1]
DOCUMENTS = ("README.md", "DEVELOPERS.md", "sample_data/study.toml")

# sha256 of the lowercased retired words: the two suffixes of the removed labelled-file format and
# the name of the product that defines it
HASHED_WORDS = frozenset(
    {
        "b0dbfb9ca12aeb92a60cba7e2be00f0d49d0412c082cced1eaceb2fcfa7ee4d7",
        "6c9bf4a3168558bb2b61b7136620c2886b9b06f0b52119dafb08076b0d0c8adc",
        "1ccd6adc9ee3180d3c3946ca5bad020dd5c059669d964e98cea363d29bbe8942",
    }
)
# names retired without a table entry in pipeline.renamed (internal names shown in documents)
EXTRA_WORDS = ("rscales", "replicate_scale")
# a retired value that is also an ordinary English word is retired only where it stands as a value:
# quoted, in an argparse choice list {a,b}, after its key or option, or as "(value," in a help text
ORDINARY_WORDS = frozenset({"nested", "centre", "scale"})


def _digest(word: str) -> str:
    return hashlib.sha256(word.lower().encode()).hexdigest()


def _value_patterns(key: str, value: str) -> list[str]:
    name = key.rsplit(".", 1)[-1].replace("_", "[_-]")
    v = re.escape(value)
    return [rf"[\"']{v}[\"']", rf"[{{,]\s*{v}\s*[,}}]", rf"\b{name}\W{{1,4}}{v}\b", rf"\({v},"]


def _patterns() -> dict[str, list[str]]:
    """Retired name -> the regular expressions that find it as a whole word (or as a value)."""
    out: dict[str, list[str]] = {}
    for key, values in SPEC_VALUES.items():
        for old in values:
            if old in ORDINARY_WORDS:
                out.setdefault(old, []).extend(_value_patterns(key, old))
            else:
                out.setdefault(old, []).append(rf"(?<![\w-]){re.escape(old)}(?![\w-])")
    for old in (*VARIABLE_KEYS, *OPTIONS, *EXTRA_WORDS):
        out[old] = [rf"(?<![\w-]){re.escape(old)}(?![\w-])"]
    return out


PATTERNS = _patterns()


def retired_names(text: str, *, hashed: frozenset[str] = HASHED_WORDS) -> list[str]:
    """Every retired name found in `text` (hashed words reported as 'hashed word <digest prefix>')."""
    found = [name for name, patterns in PATTERNS.items() if any(re.search(p, text) for p in patterns)]
    for word in set(re.findall(r"[A-Za-z0-9]+", text)):
        digest = _digest(word)
        if digest in hashed:
            found.append(f"hashed word {digest[:12]}")
    return found


def test_the_detector_finds_each_retired_name() -> None:
    """The check below can fail: every retired form is caught, the new names and prose are not."""
    samples = {
        'method = "jk1"': "jk1",
        "--variance {taylor,jkn,brr}": "jkn",
        "[--replicate-scale X]": "--replicate-scale",
        "--fpc COL": "--fpc",
        'psu_ids = "nested"': "nested",
        "--psu-ids {nested,unique}": "nested",
        "PSU ids restart within each stratum (nested, default)": "nested",
        'single_psu = "centre"': "centre",
        "--single-psu {error,certainty,centre}": "centre",
        'type = "scale"': "scale",
        "exclude_from_mean = [99]": "exclude_from_mean",
        "per-replicate `rscales`": "rscales",
    }
    for text, name in samples.items():
        assert retired_names(text) == [name], text
    clean = (
        'method = "stratified-jackknife"; psu_ids = "within-stratum"; single_psu = "grand-mean"; '
        'type = "rating" on a rating scale; exclude_from_statistics; --replicate-multiplier; '
        "--population-size; --sampling-fraction; the centre of the city; nested loops; jk10; --fpcx"
    )
    assert retired_names(clean) == []
    # the hashed words: the same matching, shown with an ordinary word standing in for them
    assert retired_names("a kettle.csv file", hashed=frozenset({_digest("csv")})) == [
        f"hashed word {_digest('csv')[:12]}"
    ]
    assert retired_names("a kettle.csv file", hashed=frozenset({_digest("cs")})) == []


def _help_texts(capsys: pytest.CaptureFixture[str]) -> dict[str, str]:
    texts = {}
    for args in ([], *([name] for name in COMMANDS)):
        with pytest.raises(SystemExit) as info:
            main([*args, "--help"])
        assert info.value.code == 0
        texts["wavebook " + " ".join([*args, "--help"])] = capsys.readouterr().out
    return texts


def test_no_help_text_or_document_uses_a_retired_name(capsys: pytest.CaptureFixture[str]) -> None:
    texts = _help_texts(capsys)
    assert len(texts) == len(COMMANDS) + 1 and all(texts.values())
    for name in DOCUMENTS:
        texts[name] = (ROOT / name).read_text(encoding="utf-8")
    found = {where: names for where, text in texts.items() if (names := retired_names(text))}
    assert found == {}


# -- a spec with retired names ---------------------------------------------------------------


def _problems(tmp_path: Path, text: str) -> list[Problem]:
    path = tmp_path / "study.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SpecError) as info:
        load_spec(path)
    assert all(p.file == str(path.resolve()) for p in info.value.problems)
    return info.value.problems


def test_a_spec_with_retired_names_is_refused_naming_every_new_name(tmp_path: Path) -> None:
    text = (
        TRACKER_SPEC.replace('psu_ids = "within-stratum"', 'psu_ids = "nested"\nsingle_psu = "centre"')
        .replace('type = "rating"', 'type = "scale"')
        .replace("exclude_from_statistics = [99]", "exclude_from_mean = [99]")
        + '\n[variance]\nmethod = "jkn"\n'
    )
    problems = _problems(tmp_path, text)
    assert sorted(p.message for p in problems) == [
        'design.psu_ids "nested" is now "within-stratum"',
        'design.single_psu "centre" is now "grand-mean"',
        "variables.satisfaction.exclude_from_mean is now exclude_from_statistics",
        'variables.satisfaction.type "scale" is now "rating"',
        'variance.method "jkn" is now "stratified-jackknife"',
    ]
    assert sorted({p.rule for p in problems}) == ["renamed-key", "renamed-value"]
    assert "[renamed-value] variance.method \"jkn\" is now \"stratified-jackknife\"" in SpecError(
        "x", problems
    ).render()


def test_a_retired_key_beside_the_new_type_is_still_refused(tmp_path: Path) -> None:
    """No silent fallback: the old key is not read as the new one (nor ignored)."""
    text = TRACKER_SPEC.replace("exclude_from_statistics = [99]", "exclude_from_mean = [99]")
    (problem,) = _problems(tmp_path, text)
    assert problem.rule == "renamed-key"
    assert problem.message == "variables.satisfaction.exclude_from_mean is now exclude_from_statistics"


@pytest.mark.parametrize(("old", "new"), [("jk1", "jackknife"), ("jkn", "stratified-jackknife")])
def test_retired_variance_methods_are_refused(tmp_path: Path, old: str, new: str) -> None:
    (problem,) = _problems(tmp_path, TRACKER_SPEC + f'\n[variance]\nmethod = "{old}"\n')
    assert (problem.rule, problem.message) == ("renamed-value", f'variance.method "{old}" is now "{new}"')


def test_the_new_names_load(tmp_path: Path) -> None:
    text = TRACKER_SPEC.replace('population = { 1 = 220, 2 = 180 }', 'single_psu = "grand-mean"') + (
        '\n[variance]\nmethod = "stratified-jackknife"\n'
    )
    path = tmp_path / "study.toml"
    path.write_text(text, encoding="utf-8")
    study = load_spec(path)
    assert (study.design.psu_ids, study.design.single_psu) == ("within-stratum", "grand-mean")
    assert study.variables["satisfaction"].type == "rating"
    assert study.variables["satisfaction"].exclude_from_statistics == (99,)
    assert study.variance == {"method": "stratified-jackknife"}


# -- a command line with retired names -------------------------------------------------------


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--variance", "jk1"], 'argument --variance: "jk1" is now "jackknife"'),
        (["--variance", "jkn"], 'argument --variance: "jkn" is now "stratified-jackknife"'),
        (["--psu-ids", "nested"], 'argument --psu-ids: "nested" is now "within-stratum"'),
        (["--single-psu", "centre"], 'argument --single-psu: "centre" is now "grand-mean"'),
        (["--replicate-scale", "0.05"], "--replicate-scale is now --replicate-multiplier"),
        (["--fpc", "N"], "--fpc is now --population-size COL"),
    ],
)
def test_retired_options_are_usage_errors_naming_the_new_one(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], args: list[str], message: str
) -> None:
    data = tmp_path / "w.csv"
    data.write_text("w,y,N\n1,2,10\n1,3,10\n", encoding="utf-8")
    with pytest.raises(SystemExit) as info:
        main(["estimate", str(data), "--weight", "w", "--mean", "y", *args])
    assert info.value.code == 2
    err = capsys.readouterr().err
    assert message in err and "usage: wavebook estimate" in err
