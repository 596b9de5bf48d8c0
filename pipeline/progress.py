"""A small progress display for long steps, written to stderr.

Shown only when stderr is a terminal, `--quiet` was not given and the process does not run in
continuous integration (the `CI` environment variable set to anything but "" / "0" / "false",
as CI services set it); otherwise silent.
"""

from __future__ import annotations

import os
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager


def in_ci() -> bool:
    """Whether the `CI` environment variable says the process runs in continuous integration."""
    return os.environ.get("CI", "").strip().lower() not in ("", "0", "false", "no")


def enabled(*, quiet: bool) -> bool:
    """Whether to show progress: not quiet, not in CI, and stderr is an interactive terminal."""
    return not quiet and not in_ci() and sys.stderr.isatty()


@contextmanager
def step(label: str, *, quiet: bool = False) -> Iterator[None]:
    """Show `label ...` while the block runs, then `label ... done (1.2 s)`."""
    show = enabled(quiet=quiet)
    start = time.perf_counter()
    if show:
        sys.stderr.write(f"{label} ...")
        sys.stderr.flush()
    try:
        yield
    finally:
        if show:
            sys.stderr.write(f" done ({time.perf_counter() - start:.1f} s)\n")
            sys.stderr.flush()
