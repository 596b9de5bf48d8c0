"""Progress on stderr (`pipeline.progress`): shown on a terminal, silent with --quiet, in CI and when piped."""

from __future__ import annotations

import io

import pytest

from pipeline import progress


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


@pytest.mark.parametrize(
    ("tty", "quiet", "ci", "shown"),
    [
        (True, False, None, True),
        (True, True, None, False),
        (True, False, "true", False),
        (True, False, "1", False),
        (True, False, "0", True),
        (True, False, "false", True),
        (False, False, None, False),
    ],
)
def test_progress_shows_only_on_a_terminal_outside_ci_without_quiet(
    monkeypatch: pytest.MonkeyPatch, tty: bool, quiet: bool, ci: str | None, shown: bool
) -> None:
    stream = _Terminal() if tty else io.StringIO()
    monkeypatch.setattr("sys.stderr", stream)
    if ci is None:
        monkeypatch.delenv("CI", raising=False)
    else:
        monkeypatch.setenv("CI", ci)
    with progress.step("estimating wave W1", quiet=quiet):
        pass
    text = stream.getvalue()
    assert (text.startswith("estimating wave W1 ...") and " done (" in text) if shown else text == ""
