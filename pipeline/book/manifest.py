"""The run manifest: what produced a book, written as `manifest.json` beside it.

`run_manifest(study, options, started, finished)` records the tool and library versions, the
SHA-256 of the spec, of every wave file and of every targets file the weighting steps name, the
variance method with its replicate count and seed, and the run's start and end (UTC).
`manifest_hash(manifest)` is the SHA-256 of its canonical JSON (sorted keys, no spaces); the
book's footer shows its first 12 hex digits, so a printed page can be matched to its manifest.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import platform
from collections.abc import Iterator
from importlib import metadata
from pathlib import Path

from pipeline import __version__
from pipeline.estimation.options import VarianceOptions
from pipeline.outputs import file_sha256
from pipeline.staging.spec import Study

LIBRARIES = ("polars", "numpy", "scipy", "duckdb", "jinja2", "pyarrow")
SHORT_HASH = 12


def _targets_files(raw: object) -> Iterator[str]:
    """Every `targets = "file.csv"` value anywhere in the raw weighting steps."""
    if isinstance(raw, dict):
        for key, value in raw.items():
            if key == "targets" and isinstance(value, str):
                yield value
            else:
                yield from _targets_files(value)
    elif isinstance(raw, (list, tuple)):
        for item in raw:
            yield from _targets_files(item)


def _version(name: str) -> str | None:
    try:
        return metadata.version(name)
    except metadata.PackageNotFoundError:
        return None


def _hashed(path: Path, folder: Path) -> dict[str, str | None]:
    """A file's path (relative to the spec folder where possible) and SHA-256 (None when absent)."""
    try:
        shown = str(path.resolve().relative_to(folder.resolve()))
    except ValueError:
        shown = str(path)
    return {"path": shown, "sha256": file_sha256(path) if path.is_file() else None}


def run_manifest(
    study: Study, options: VarianceOptions, *, started: dt.datetime, finished: dt.datetime
) -> dict[str, object]:
    """The manifest of one run of `study` (a JSON-ready dict)."""
    folder = study.path.parent
    targets = dict.fromkeys(_targets_files(study.weighting))
    return {
        "tool": {"name": "wavebook", "version": __version__},
        "python": platform.python_version(),
        "libraries": {name: _version(name) for name in LIBRARIES},
        "spec": _hashed(study.path, folder),
        "waves": [{"id": w.id, **_hashed(w.file, folder)} for w in study.waves],
        "targets": [_hashed(folder / name, folder) for name in targets],
        "variance": {
            "method": options.method,
            "replicates": options.replicates,
            "seed": options.seed,
            "level": options.level,
        },
        "run": {"started": _utc(started), "finished": _utc(finished)},
    }


def _utc(moment: dt.datetime) -> str:
    return moment.astimezone(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def manifest_json(manifest: dict[str, object]) -> str:
    """The manifest as the indented JSON written to `manifest.json`."""
    return json.dumps(manifest, indent=2, sort_keys=True) + "\n"


def manifest_hash(manifest: dict[str, object]) -> str:
    """SHA-256 (hex) of the manifest's canonical JSON: sorted keys, no whitespace, UTF-8."""
    canonical = json.dumps(manifest, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()
