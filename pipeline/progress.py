"""A small progress display for long steps, written to stderr.

Shown only when stderr is a terminal and `--quiet` was not given; otherwise silent.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager


def enabled(*, quiet: bool) -> bool:
    """Whether to show progress: not quiet, and stderr is an interactive terminal."""
    return not quiet and sys.stderr.isatty()


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
