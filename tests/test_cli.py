"""The `wavebook` command: help texts, exit codes, and the demo end to end."""

from __future__ import annotations

import contextlib
import importlib
import io
from html.parser import HTMLParser
from pathlib import Path

import pytest

from pipeline.cli import COMMANDS, main

AVAILABLE = list(COMMANDS)


def test_top_level_help_lists_every_available_command(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["--help"])
    assert exit_info.value.code == 0
    out = capsys.readouterr().out
    assert all(name in out for name in AVAILABLE)


@pytest.mark.parametrize("name", AVAILABLE)
def test_every_command_has_help_with_its_example(name: str, capsys: pytest.CaptureFixture[str]) -> None:
    module = importlib.import_module(f"pipeline.commands.{COMMANDS[name]}")
    with pytest.raises(SystemExit) as exit_info:
        main([name, "--help"])
    assert exit_info.value.code == 0
    out = capsys.readouterr().out
    assert module.HELP in " ".join(out.split())
    assert module.EXAMPLE in out


@pytest.mark.parametrize("argv", [["no-such-command"], ["run"], ["run", "a.toml", "--no-such-option"], []])
def test_usage_errors_exit_2(argv: list[str], capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(argv)
    assert exit_info.value.code == 2
    assert "usage: wavebook" in capsys.readouterr().err


def test_spec_error_exits_1_with_every_problem_on_stderr(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    spec = tmp_path / "broken.toml"
    spec.write_text(
        'title = "Broken"\nrespondent_id = "id"\ncolour = "teal"\n\n'
        '[variables.q1]\nlabel = "Q1"\ntype = "ranking"\n',
        encoding="utf-8",
    )
    assert main(["run", str(spec), "--quiet"]) == 1
    captured = capsys.readouterr()
    assert captured.out == ""
    assert "colour" in captured.err  # the unknown top-level key
    assert "q1" in captured.err  # the bad variable type, reported in the same run
    assert not (tmp_path / "book").exists()


def test_missing_spec_exits_1(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["run", str(tmp_path / "absent.toml")]) == 1
    assert "absent.toml" in capsys.readouterr().err


class _Counter(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.table_classes: list[str] = []
        self.script_sources: list[str | None] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        if tag == "script":
            self.script_sources.append(dict(attrs).get("src"))
        if tag == "table":
            self.table_classes.append(dict(attrs).get("class") or "")


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """`wavebook demo FOLDER --quiet` once for the module: (folder, book path printed)."""
    folder = tmp_path_factory.mktemp("cli") / "demo"
    out = io.StringIO()  # capsys is function-scoped; this fixture runs once per module
    with contextlib.redirect_stdout(out):
        code = main(["demo", str(folder), "--quiet"])
    assert code == 0
    return folder, Path(out.getvalue().strip())


def test_demo_builds_a_book_with_one_table_per_variable(demo_run: tuple[Path, Path]) -> None:
    from pipeline.staging.spec import load_spec

    folder, book = demo_run
    assert book == folder / "book" / "study.html"
    assert book.is_file()
    parser = _Counter()
    parser.feed(book.read_text(encoding="utf-8"))
    study = load_spec(folder / "study.toml")
    variable_tables = [c for c in parser.table_classes if {"result", "waves"} <= set(c.split())]
    assert len(variable_tables) == len(study.variables)
    banner_tables = [c for c in parser.table_classes if {"result", "banner"} <= set(c.split())]
    assert len(banner_tables) == len(study.variables)  # the demo tabulates every variable
    weight_tables = [c for c in parser.table_classes if "weights" in c.split()]
    assert len(weight_tables) == (2 if study.weighting else 1)  # summary (+ margins when raked)
    assert parser.script_sources == [None]  # the one inline script (contents filter), nothing loaded


def test_demo_book_shows_not_asked_rows_and_a_balance_score(demo_run: tuple[Path, Path]) -> None:
    """The demo routes its spend question (asked_if) and scores a recommendation balance."""
    _, book = demo_run
    html = book.read_text(encoding="utf-8")
    assert html.count('<tr class="row-not-asked">') == 2  # spend: its banner table and its by-wave table
    assert html.count('<tr class="row-balance">') == 2  # recommend: the same two tables
    assert "Recommend balance (9-10 minus 0-6)" in html


def test_demo_copies_the_study_but_not_run_artefacts(demo_run: tuple[Path, Path]) -> None:
    from pipeline.resources import resource_dir

    folder, _ = demo_run
    source = resource_dir("sample_data")
    for name in ("study.toml", "population_margins.csv", "population_truth.csv", "generate_demo.py"):
        assert (folder / name).read_bytes() == (source / name).read_bytes()
    copied = sorted(p.name for p in (folder / "waves").iterdir() if p.name != ".wavebook-outputs")
    assert copied == sorted(p.name for p in (source / "waves").iterdir())
    assert (folder / ".wavebook-demo").is_file()


def test_second_run_restages_nothing_until_a_file_changes(demo_run: tuple[Path, Path]) -> None:
    from pipeline.runner import waves_to_stage
    from pipeline.staging.spec import load_spec

    folder, _ = demo_run
    study = load_spec(folder / "study.toml")
    assert waves_to_stage(study) == []
    assert waves_to_stage(study, restage=True) == [w.id for w in study.waves]
    wave1 = study.waves[0].file
    original = wave1.read_bytes()
    try:
        wave1.write_bytes(original + b"\n")
        assert waves_to_stage(study) == [study.waves[0].id]
    finally:
        wave1.write_bytes(original)
    assert waves_to_stage(study) == []


def test_demo_again_into_a_demo_folder_is_allowed(
    demo_run: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    folder, book = demo_run
    assert main(["demo", str(folder), "--quiet"]) == 0
    assert capsys.readouterr().out.strip() == str(book)


def test_demo_refuses_a_foreign_non_empty_folder(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "thesis.txt").write_text("keep me", encoding="utf-8")
    assert main(["demo", str(tmp_path), "--quiet"]) == 1
    assert "--force" in capsys.readouterr().err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["thesis.txt"]


def test_run_writes_to_out(demo_run: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    folder, _ = demo_run
    out = tmp_path / "elsewhere" / "tracker.html"
    assert main(["run", str(folder / "study.toml"), "--out", str(out), "--quiet"]) == 0
    assert capsys.readouterr().out.strip() == str(out)
    assert out.is_file()
