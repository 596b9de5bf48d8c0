"""Issue 8, data loss 1 and 5: no command writes over an input, nor over a file it did not write.

Every refusal is checked the same way: exit 1 with the named rule, and the study folder (the
database and every input file) byte-identical before and after (SHA-256 fingerprints).
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from conftest import TRACKER_SPEC, Tracker, tracker_rows, write_csv
from safety_support import AGE_TARGETS, RAKE_STEP, fingerprint, wavebook

from pipeline.commands.demo import copy_demo
from pipeline.errors import WavebookError


@pytest.fixture
def study(tracker: Tracker, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> Tracker:
    """The tracker study with a raking step reading targets.csv, staged and weighted, cwd in its folder."""
    tracker.write_spec(TRACKER_SPEC + RAKE_STEP)
    (tracker.folder / "targets.csv").write_text(AGE_TARGETS, encoding="utf-8")
    monkeypatch.chdir(tracker.folder)
    assert wavebook(["weigh", "study.toml", "--quiet"], capsys)[0] == 1  # nothing staged yet: refused
    assert wavebook(["stage", "study.toml", "--quiet"], capsys)[0] == 0
    assert wavebook(["weigh", "study.toml", "--quiet"], capsys)[0] == 0
    return tracker


def _links(folder: Path) -> None:
    (folder / "db_link.duckdb").symlink_to(folder / "study.duckdb")
    os.link(folder / "waves" / "wave2.csv", folder / "hard_wave2.csv")


INPUT_SPELLINGS = [
    "study.duckdb",
    "study.toml",
    "waves/wave1.csv",
    "./waves/../waves/wave2.csv",
    "targets.csv",
    "db_link.duckdb",
    "hard_wave2.csv",
]


@pytest.mark.parametrize("out", INPUT_SPELLINGS)
def test_run_out_never_replaces_an_input(study: Tracker, out: str, capsys: pytest.CaptureFixture[str]) -> None:
    _links(study.folder)
    before = fingerprint(study.folder)
    code, _, err = wavebook(["run", "study.toml", "--out", out, "--force", "--quiet"], capsys)
    assert code == 1
    assert "[output-is-input]" in err
    assert fingerprint(study.folder) == before


@pytest.mark.parametrize("out", ["waves/wave1.csv", "study.duckdb", "targets.csv", "<absolute spec path>"])
def test_weigh_export_never_replaces_an_input(study: Tracker, out: str, capsys: pytest.CaptureFixture[str]) -> None:
    out = str(study.spec_path) if out == "<absolute spec path>" else out
    before = fingerprint(study.folder)
    code, _, err = wavebook(["weigh", "study.toml", "--export", out, "--force", "--quiet"], capsys)
    assert code == 1
    assert "[output-is-input]" in err
    assert fingerprint(study.folder) == before


@pytest.mark.parametrize("out", ["data.csv", "margins.csv", "./sub/../margins.csv"])
def test_rake_out_never_replaces_its_inputs(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], out: str
) -> None:
    monkeypatch.chdir(tmp_path)
    (tmp_path / "sub").mkdir()
    write_csv(tmp_path / "data.csv", tracker_rows(12))
    (tmp_path / "margins.csv").write_text(AGE_TARGETS, encoding="utf-8")
    before = fingerprint(tmp_path)
    code, _, err = wavebook(["rake", "data.csv", "--targets", "margins.csv", "--out", out, "--force"], capsys)
    assert code == 1
    assert "[output-is-input]" in err
    assert fingerprint(tmp_path) == before


def test_init_out_never_replaces_its_wave_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = write_csv(tmp_path / "wave1.csv", tracker_rows(12))
    before = fingerprint(tmp_path)
    code, _, err = wavebook(["init", str(data), "--out", str(data), "--force"], capsys)
    assert code == 1
    assert "[output-is-input]" in err
    assert fingerprint(tmp_path) == before


def test_other_existing_files_need_force_but_own_output_is_replaced(
    study: Tracker, capsys: pytest.CaptureFixture[str]
) -> None:
    notes = study.folder / "notes.html"
    notes.write_text("<p>my notes</p>", encoding="utf-8")
    before = fingerprint(study.folder)
    code, _, err = wavebook(["run", "study.toml", "--out", "notes.html", "--quiet"], capsys)
    assert code == 1
    assert "[output-exists]" in err
    assert fingerprint(study.folder) == before

    assert wavebook(["run", "study.toml", "--out", "notes.html", "--force", "--quiet"], capsys)[0] == 0
    assert "wavebook" in notes.read_text(encoding="utf-8")
    assert wavebook(["run", "study.toml", "--out", "notes.html", "--quiet"], capsys)[0] == 0  # its own output

    notes.write_text(notes.read_text(encoding="utf-8") + "<!-- edited -->", encoding="utf-8")
    edited = notes.read_bytes()
    code, _, err = wavebook(["run", "study.toml", "--out", "notes.html", "--quiet"], capsys)
    assert (code, "[output-exists]" in err, notes.read_bytes()) == (1, True, edited)


def test_export_over_an_unrelated_file_needs_force(study: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    other = study.folder / "weights.csv"
    other.write_text("somebody else's file\n", encoding="utf-8")
    code, _, err = wavebook(["weigh", "study.toml", "--export", "weights.csv", "--quiet"], capsys)
    assert (code, "[output-exists]" in err, other.read_text(encoding="utf-8")) == (1, True, "somebody else's file\n")
    assert wavebook(["weigh", "study.toml", "--export", "weights.csv", "--quiet", "--force"], capsys)[0] == 0
    assert other.read_text(encoding="utf-8").startswith("respondent_id,wave,weight")
    assert wavebook(["weigh", "study.toml", "--export", "weights.csv", "--quiet"], capsys)[0] == 0


def test_out_naming_a_folder_writes_the_spec_stem_inside(study: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    (study.folder / "books").mkdir()
    code, out, _ = wavebook(["run", "study.toml", "--out", "books", "--quiet"], capsys)
    assert code == 0
    assert Path(out.strip()) == Path("books") / "study.html"
    assert (study.folder / "books" / "study.html").read_text(encoding="utf-8").startswith("<!DOCTYPE html>")


def test_export_naming_a_folder_is_refused(study: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    (study.folder / "exports").mkdir()
    code, _, err = wavebook(["weigh", "study.toml", "--export", "exports", "--quiet"], capsys)
    assert (code, "[output-not-a-file]" in err) == (1, True)


def test_demo_never_replaces_an_edited_file(tmp_path: Path) -> None:
    folder = copy_demo(tmp_path / "demo")
    copy_demo(folder)  # an untouched earlier demo is copied over silently
    spec = folder / "study.toml"
    spec.write_text(spec.read_text(encoding="utf-8") + "\n# my own note\n", encoding="utf-8")
    (folder / "waves" / "wave1.csv").write_text("resp_id\nmine\n", encoding="utf-8")
    before = fingerprint(folder)
    with pytest.raises(WavebookError) as info:
        copy_demo(folder)
    problems = {(p.rule, Path(p.file).name) for p in info.value.problems}
    assert problems == {("demo-file-changed", "study.toml"), ("demo-file-changed", "wave1.csv")}
    assert fingerprint(folder) == before
    copy_demo(folder, force=True)
    assert "# my own note" not in spec.read_text(encoding="utf-8")


def test_replicate_export_never_replaces_an_unrelated_recipe_file(
    study: Tracker, capsys: pytest.CaptureFixture[str]
) -> None:
    study.write_spec(TRACKER_SPEC + '\n[variance]\nmethod = "jackknife"\n' + RAKE_STEP)
    sidecar = study.folder / "w1.parquet.replicates.json"
    sidecar.write_text('{"mine": true}\n', encoding="utf-8")
    before = fingerprint(study.folder)
    argv = ["weigh", "study.toml", "--wave", "W1", "--export", "w1.parquet", "--replicates", "--quiet"]
    code, _, err = wavebook(argv, capsys)
    assert (code, "[output-exists]" in err) == (1, True)
    assert fingerprint(study.folder) == before
    assert wavebook([*argv, "--force"], capsys)[0] == 0
    assert '"mine"' not in sidecar.read_text(encoding="utf-8")
    assert wavebook(argv, capsys)[0] == 0  # both files are now wavebook's own
