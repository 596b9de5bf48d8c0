"""Set-up and routine tasks for a checkout of wavebook, needing only Python 3.11+ and pip.

    python3 dev.py demo [FOLDER]   build the demo result book (default folder ./wavebook-demo)
    python3 dev.py test [ARGS...]  run the test suite (ARGS go to pytest)
    python3 dev.py bench           run the benchmark scripts in bench/ (prints figures)

Each task first makes sure the local virtual environment `.venv` exists and holds wavebook
(editable) with its test extras; it is reinstalled when pyproject.toml changes.
"""

from __future__ import annotations

import hashlib
import subprocess
import sys
import venv
from pathlib import Path

ROOT = Path(__file__).resolve().parent
VENV = ROOT / ".venv"
BIN = VENV / ("Scripts" if sys.platform == "win32" else "bin")
PYTHON = BIN / "python"
STAMP = VENV / ".wavebook-installed"


def _fingerprint() -> str:
    return hashlib.sha256((ROOT / "pyproject.toml").read_bytes()).hexdigest()


def ensure_environment() -> None:
    """Create `.venv` and install wavebook[test] into it unless already done for this pyproject.toml."""
    if STAMP.exists() and STAMP.read_text() == _fingerprint() and PYTHON.exists():
        return
    if not PYTHON.exists():
        print("creating virtual environment .venv", flush=True)
        venv.EnvBuilder(with_pip=True).create(VENV)
    print("installing wavebook and its test extras into .venv", flush=True)
    subprocess.run([str(PYTHON), "-m", "pip", "install", "--quiet", "--upgrade", "pip"], check=True)
    subprocess.run([str(PYTHON), "-m", "pip", "install", "--quiet", "-e", f"{ROOT}[test]"], check=True)
    STAMP.write_text(_fingerprint())


def main(argv: list[str]) -> int:
    """Dispatch one task; returns its exit code."""
    if not argv or argv[0] not in {"demo", "test", "bench"}:
        print(__doc__, file=sys.stderr)
        return 2
    task, rest = argv[0], argv[1:]
    ensure_environment()
    if task == "demo":
        return subprocess.run([str(BIN / "wavebook"), "demo", *(rest or ["wavebook-demo"])]).returncode
    if task == "test":
        return subprocess.run([str(PYTHON), "-m", "pytest", *rest], cwd=ROOT).returncode
    status = 0
    for script in sorted((ROOT / "bench").glob("bench_*.py")):
        print(f"== {script.name}", flush=True)
        status |= subprocess.run([str(PYTHON), str(script)], cwd=ROOT).returncode
    return status


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
