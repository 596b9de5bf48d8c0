"""Package layout: the staging package's public entry, and no import circle between the spec and the weighting steps."""

from __future__ import annotations

import ast
from pathlib import Path

import pipeline.staging
from pipeline.weighting.steps import StepContext, parse_steps

PACKAGE = Path(__file__).resolve().parent.parent / "pipeline"


def _imported_modules(path: Path) -> set[str]:
    """Every module a source file imports, at any level (TYPE_CHECKING blocks and functions included)."""
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module:
            names.add(node.module)
        elif isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
    return names


def test_staging_package_gives_its_public_entry() -> None:
    for name in ("load_spec", "check_wave", "stage_wave", "open_database", "draft_spec"):
        assert callable(getattr(pipeline.staging, name)), name
    assert set(pipeline.staging.__all__) >= {"load_spec", "check_wave", "stage_wave", "open_database"}


def test_weighting_steps_never_import_the_spec() -> None:
    """The spec hands the steps a plain StepContext; only store.py (which loads a staged wave) reads staging."""
    bridges = {"store.py"}
    offenders = {
        path.name: sorted(m for m in _imported_modules(path) if m.startswith("pipeline.staging"))
        for path in (PACKAGE / "weighting").glob("*.py")
        if path.name not in bridges
    }
    assert {name: mods for name, mods in offenders.items() if mods} == {}


def test_steps_parse_against_a_plain_context_without_a_study(tmp_path: Path) -> None:
    context = StepContext(
        folder=tmp_path, source="plain", variable_types={"sex": "single", "hh": "numeric"},
        coded=frozenset({"sex"}), codes={"sex": ("1", "2")},
    )
    steps = parse_steps(({"step": "rake", "margins": ["sex"], "totals": {"sex": {"1": 0.4, "2": 0.6}}},), context)
    assert steps[0].margins == (("sex",),)
    assert context.code_order({"sex", "hh"}) == {"sex": ["1", "2"]}
