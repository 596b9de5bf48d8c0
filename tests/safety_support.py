"""Helpers of the safety tests: byte fingerprints of a study folder and running the command.

`fingerprint(folder)` maps every file under `folder` (relative path) to the SHA-256 of its bytes,
so a test asserts that a refused command left the database and every input byte-identical.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest

from pipeline.cli import main

RAKE_STEP = """
[[weighting]]
step = "rake"
margins = ["age_band"]
targets = "targets.csv"
"""
AGE_TARGETS = "variable,category,target\nage_band,1,0.3\nage_band,2,0.3\nage_band,3,0.4\n"


def fingerprint(folder: Path) -> dict[str, str]:
    """Relative path -> SHA-256 of every file under `folder` (symbolic links followed)."""
    return {
        str(path.relative_to(folder)): hashlib.sha256(path.read_bytes()).hexdigest()
        for path in sorted(folder.rglob("*"))
        if path.is_file()
    }


def wavebook(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    """Run `wavebook ARGV` in-process: (exit code, stdout, stderr)."""
    code = main(argv)
    captured = capsys.readouterr()
    return code, captured.out, captured.err
