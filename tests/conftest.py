"""Shared fixtures: a small invented tracker study written into a temp folder.

`tracker` builds a study folder with the spec below (TRACKER_SPEC) and writes wave files from
lists of row dicts, so each test states exactly the rows it needs. `reference_dir` is the
shared open reference data (../shared/reference from the project root); tests that need it
skip with a message naming the folder when it is absent.
"""

from __future__ import annotations

import csv
from collections.abc import Iterable
from pathlib import Path

import pytest

from pipeline.staging.spec import Study, load_spec

REFERENCE_DIR = Path(__file__).resolve().parents[1].parent / "shared" / "reference"

TRACKER_SPEC = """\
title = "Riverbend Kettle Tracker"
notes = ["Fieldwork by an invented agency."]
respondent_id = "resp_id"

[waves.W1]
label = "Wave 1 (March 2026)"
file = "waves/wave1.csv"
fieldwork = [2026-03-02, 2026-03-21]

[waves.W2]
label = "Wave 2 (June 2026)"
file = "waves/wave2.csv"

[design]
kind = "probability"
strata = "region"
psu = "area"
psu_ids = "within-stratum"
selection_probability = "p_select"
population = { 1 = 220, 2 = 180 }

[variables.region]
label = "Region"
type = "single"
values = { 1 = "Northmoor", 2 = "Eastvale" }

[variables.age_band]
label = "Age band"
type = "single"
values = { 1 = "18-34", 2 = "35-54", 3 = "55+" }

[variables.channel]
label = "Preferred channel"
type = "single"
values = { shop = "In a shop", web = "On the web" }

[variables.aware]
label = "Brand awareness (aided)"
type = "multi"
items = { aware_kestrel = "Kestrel", aware_lumen = "Lumen" }

[variables.satisfaction]
label = "Overall satisfaction (0-10)"
type = "rating"
values = { 0 = "0 Not at all satisfied", 10 = "10 Completely satisfied", 99 = "Don't know" }
exclude_from_statistics = [99]
nets = { "Top two box (9-10)" = [9, 10] }

[variables.spend]
label = "Monthly spend (credits)"
type = "numeric"
minimum = 0
maximum = 5000
"""

TRACKER_COLUMNS = [
    "resp_id",
    "region",
    "area",
    "p_select",
    "age_band",
    "channel",
    "aware_kestrel",
    "aware_lumen",
    "satisfaction",
    "spend",
]


def tracker_rows(n: int = 12, *, prefix: str = "r") -> list[dict[str, str]]:
    """`n` valid invented respondents (deterministic): 2 regions x 2 areas, every code used."""
    rows = []
    for i in range(n):
        rows.append(
            {
                "resp_id": f"{prefix}{i + 1:03d}",
                "region": str(1 + i % 2),
                "area": str(1 + (i // 2) % 2),
                "p_select": "0.01" if i % 2 == 0 else "0.02",
                "age_band": str(1 + i % 3),
                "channel": "shop" if i % 4 < 2 else "web",
                "aware_kestrel": str(i % 2),
                "aware_lumen": str((i // 3) % 2),
                "satisfaction": str([0, 5, 9, 10, 99, 7][i % 6]),
                "spend": "" if i % 5 == 4 else f"{12.5 * i:g}",
            }
        )
    return rows


def write_csv(path: Path, rows: Iterable[dict[str, str]], columns: list[str] | None = None) -> Path:
    """Write rows (dicts of text) as a CSV file with a header; missing keys are empty fields."""
    rows = list(rows)
    columns = columns if columns is not None else (list(rows[0]) if rows else TRACKER_COLUMNS)
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=columns, extrasaction="ignore")
        writer.writeheader()
        writer.writerows(rows)
    return path


class Tracker:
    """A study folder in tmp_path: spec text, wave files, and the loaded Study."""

    def __init__(self, folder: Path, spec_text: str = TRACKER_SPEC) -> None:
        self.folder = folder
        self.spec_path = folder / "study.toml"
        self.write_spec(spec_text)

    def write_spec(self, text: str) -> None:
        self.spec_path.write_text(text, encoding="utf-8")

    def study(self) -> Study:
        return load_spec(self.spec_path)

    def write_wave(self, name: str, rows: Iterable[dict[str, str]], columns: list[str] | None = None) -> Path:
        """Write waves/<name> (a CSV) and return its path."""
        return write_csv(self.folder / "waves" / name, rows, columns)


@pytest.fixture
def tracker(tmp_path: Path) -> Tracker:
    """A study folder with TRACKER_SPEC and a valid waves/wave1.csv (12 rows) and waves/wave2.csv (12 rows)."""
    t = Tracker(tmp_path)
    t.write_wave("wave1.csv", tracker_rows(12, prefix="a"))
    t.write_wave("wave2.csv", tracker_rows(12, prefix="b"))
    return t


@pytest.fixture
def reference_dir() -> Path:
    """../shared/reference (open reference data with SOURCE.md files); skip when absent."""
    if not REFERENCE_DIR.is_dir():
        pytest.skip(f"reference data folder {REFERENCE_DIR} is absent")
    return REFERENCE_DIR


@pytest.fixture(scope="session")
def demo_study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo study copied and run once per test session (book, manifest, stored results);
    returns its spec. Tests must not change the folder."""
    from pipeline.commands.demo import DEMO_SPEC, copy_demo
    from pipeline.runner import run_study

    folder = copy_demo(tmp_path_factory.mktemp("demo-study") / "study")
    run_study(folder / DEMO_SPEC, quiet=True)
    return folder / DEMO_SPEC
