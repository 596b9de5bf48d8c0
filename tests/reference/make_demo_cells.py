"""Write tests/reference/demo_cells.csv: the Total rows of the demo study's cells export, with a provenance header.

Usage: python tests/reference/make_demo_cells.py

Copies the demo study into a temp folder, runs it (`pipeline.runner.run_study`) and writes the
Total rows (banner "total") of its `<stem>_cells` export, in the columns of the tidy export the
reference was first made with (`tests/test_cells_export.py` TOPLINE_COLUMNS), behind a header
naming this script, the wavebook version, the git commit and the date. `tests/test_cells_export.py` checks every later run of the demo against it, so a change
of the estimation engine that moves any demo figure fails. Regenerate it only when a figure is
meant to change, and say why in the commit. (The stored file was made from main's engine at
the commit its header names, before the one-pass engine of issue 10, by running that engine and passing the cells
it gave the book through the tidy export of that time; its header says so.)
"""

from __future__ import annotations

import datetime as dt
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
TARGET = ROOT / "tests" / "reference" / "demo_cells.csv"


def main() -> int:
    from pipeline import __version__
    from pipeline.commands.demo import DEMO_SPEC, copy_demo
    from pipeline.runner import run_study

    commit = subprocess.run(["git", "rev-parse", "HEAD"], cwd=ROOT, capture_output=True, text=True).stdout.strip()
    with tempfile.TemporaryDirectory(prefix="wavebook-reference-") as tmp:
        folder = copy_demo(Path(tmp) / "demo")
        book = run_study(folder / DEMO_SPEC, quiet=True)
        import polars as pl

        sys.path.insert(0, str(ROOT / "tests"))
        from test_cells_export import TOPLINE_COLUMNS

        export = pl.read_parquet(book.parent / f"{Path(DEMO_SPEC).stem}_cells.parquet")
        body = export.filter(pl.col("banner") == "total").select(TOPLINE_COLUMNS).write_csv()
    header = [
        "# The demo study's tidy cells export (invented data: sample_data/generate_demo.py).",
        f"# Written by tests/reference/make_demo_cells.py, wavebook {__version__}, commit {commit or 'unknown'},",
        f"# on {dt.datetime.now(dt.UTC):%Y-%m-%d %H:%M} UTC.",
    ]
    TARGET.parent.mkdir(parents=True, exist_ok=True)
    TARGET.write_text("\n".join(header) + "\n" + body, encoding="utf-8")
    print(TARGET)
    return 0


if __name__ == "__main__":
    sys.exit(main())
