"""The demo book as files: manifest.json, `wavebook book` re-rendering, the folder form, and
that no respondent id reaches any file of the output folder."""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path

import html5lib
import polars as pl
import pytest

from pipeline.book.manifest import manifest_hash
from pipeline.book.store import load_results, results_folder
from pipeline.cli import main
from pipeline.staging.database import load_responses, open_database
from pipeline.staging.spec import load_spec


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_manifest_beside_the_book_records_inputs_and_its_hash_is_in_the_footer(demo_study: Path) -> None:
    book = demo_study.parent / "book" / "study.html"
    manifest = json.loads((book.parent / "manifest.json").read_text(encoding="utf-8"))
    study = load_spec(demo_study)
    assert manifest["spec"]["sha256"] == _sha256(demo_study)  # hashlib over the same bytes
    assert [w["id"] for w in manifest["waves"]] == [w.id for w in study.waves]
    assert all(w["sha256"] == _sha256(wave.file) for w, wave in zip(manifest["waves"], study.waves, strict=True))
    targets = manifest["targets"]
    assert targets and all(t["sha256"] == _sha256(demo_study.parent / t["path"]) for t in targets)
    assert manifest["variance"]["method"] == (study.variance.get("method") or "taylor")
    assert manifest["run"]["started"] <= manifest["run"]["finished"]
    assert set(manifest["libraries"]) >= {"polars", "numpy", "scipy", "duckdb", "jinja2"}
    short = manifest_hash(manifest)[:12]
    footer = re.search(r'class="manifest-hash">([0-9a-f]+)<', book.read_text(encoding="utf-8"))
    assert footer is not None and footer.group(1) == short


def test_book_command_rerenders_from_stored_results_without_recomputing(
    demo_study: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    import pipeline.runner as runner

    def forbidden(*args: object, **kwargs: object) -> None:
        raise AssertionError("`wavebook book` must not stage, weight or estimate")

    for name in ("stage_wave", "unweighted_toplines", "weigh_and_estimate", "open_database"):
        monkeypatch.setattr(runner, name, forbidden)
    out = tmp_path / "again.html"
    assert main(["book", str(demo_study), "--out", str(out), "--quiet"]) == 0
    assert capsys.readouterr().out.strip() == str(out)
    original = (demo_study.parent / "book" / "study.html").read_text(encoding="utf-8")
    again = out.read_text(encoding="utf-8")
    strip = re.compile(r"generated \d{4}-\d\d-\d\d \d\d:\d\d UTC")  # the render time may differ
    assert strip.sub("", again) == strip.sub("", original)


def test_book_command_without_a_run_is_a_named_error(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from pipeline.commands.demo import copy_demo

    folder = copy_demo(tmp_path / "fresh")
    assert main(["book", str(folder / "study.toml"), "--quiet"]) == 1
    assert "run `wavebook run" in capsys.readouterr().err


def test_folder_book_has_an_index_and_a_page_per_table(demo_study: Path, tmp_path: Path) -> None:
    out = tmp_path / "book" / "study.html"
    assert main(["book", str(demo_study), "--out", str(out), "--folder", "--quiet"]) == 0
    folder = tmp_path / "book" / "study"
    names = {p.name for p in folder.iterdir()}
    study = load_spec(demo_study)
    assert {"index.html", "methodology.html", "trends.html", "appendix.html", "manifest.json"} <= names
    assert len([n for n in names if n.startswith("v")]) == len(study.variables)
    parser = html5lib.HTMLParser(strict=True)
    for page in folder.glob("*.html"):
        parser.parse(page.read_text(encoding="utf-8"))  # raises on any HTML5 parse error


def test_no_respondent_id_anywhere_in_the_output_or_stored_results(demo_study: Path) -> None:
    study = load_spec(demo_study)
    con = open_database(study, read_only=True)
    try:
        ids = {str(i) for i in load_responses(con, study)["respondent_id"].to_list()}
    finally:
        con.close()
    assert len(ids) > 1000
    token = re.compile(r"[A-Za-z0-9_-]+")
    files = [*(demo_study.parent / "book").rglob("*"), *results_folder(study).rglob("*")]
    for path in files:
        if not path.is_file():
            continue
        text = path.read_bytes().decode("utf-8", errors="replace")
        assert not (ids & set(token.findall(text))), path
        if path.suffix == ".parquet":
            frame = pl.read_parquet(path)
            values = {str(v) for c in frame.columns if frame[c].dtype == pl.String for v in frame[c].drop_nulls()}
            assert not (ids & values), path
    assert load_results(study).cells.height > 0
