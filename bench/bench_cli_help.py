"""Time `wavebook --help` and `wavebook <command> --help` against the 0.4 s target.

Each timing is the best of 5 runs of a fresh Python process (`python -m pipeline.cli ...` from
the project root), so it includes interpreter start-up and every import the help needs. Prints
the figures and their ratio to the target; asserts nothing.

    python bench/bench_cli_help.py
"""

from __future__ import annotations

import importlib.util
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
TARGET_SECONDS = 0.4
REPEATS = 5


def best_time(argv: list[str], *, repeats: int = REPEATS) -> float:
    """The shortest wall-clock time of `repeats` runs of `python -m pipeline.cli *argv`."""
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        subprocess.run([sys.executable, "-m", "pipeline.cli", *argv], cwd=ROOT, check=True, capture_output=True)
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    """Print one line per help screen: seconds, ratio to the target, and whether it is within it."""
    sys.path.insert(0, str(ROOT))
    from pipeline.cli import COMMANDS

    commands = [name for name, module in COMMANDS.items() if importlib.util.find_spec(f"pipeline.commands.{module}")]
    baseline = best_time(["--version"])
    print(f"target {TARGET_SECONDS:.2f} s, best of {REPEATS}; `wavebook --version` {baseline:.3f} s for reference")
    for argv in [["--help"], *[[name, "--help"] for name in commands]]:
        seconds = best_time(argv)
        verdict = "ok" if seconds < TARGET_SECONDS else "OVER TARGET"
        print(f"wavebook {' '.join(argv):<22} {seconds:6.3f} s  {seconds / TARGET_SECONDS:5.2f} x target  {verdict}")


if __name__ == "__main__":
    main()
