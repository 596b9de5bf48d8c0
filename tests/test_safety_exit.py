"""Issue 8, items 13 and 14: no Python traceback reaches the user, and the exit code tells a
crash (3) from bad data (1), a usage error (2) and Ctrl-C (130).

Permission errors cannot be produced with file modes when the tests run as root, so those cases
raise the operating system's own exception (PermissionError, errno ENOSPC) where wavebook writes.
"""

from __future__ import annotations

import errno
import os
import subprocess
import sys
import time
from pathlib import Path

import pytest
from conftest import Tracker, tracker_rows
from safety_support import fingerprint, wavebook

from pipeline import outputs
from pipeline.cli import EXIT_BUG, EXIT_DATA, EXIT_INTERRUPTED, EXIT_USAGE


def _no_traceback(err: str) -> None:
    assert "Traceback" not in err
    assert 'File "' not in err


def test_spec_path_that_is_a_folder(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, _, err = wavebook(["check", str(tmp_path)], capsys)
    assert (code, "[not-a-file]" in err) == (EXIT_DATA, True)
    _no_traceback(err)


def test_book_folder_that_cannot_be_created(tracker: Tracker, capsys: pytest.CaptureFixture[str]) -> None:
    blocker = tracker.folder / "plain_file"
    blocker.write_text("not a folder\n", encoding="utf-8")
    code, _, err = wavebook(["run", str(tracker.spec_path), "--out", str(blocker / "book.html"), "--quiet"], capsys)
    assert (code, "[cannot-write]" in err, str(blocker) in err) == (EXIT_DATA, True, True)
    _no_traceback(err)


@pytest.mark.parametrize(
    ("error", "reason"),
    [
        (PermissionError(errno.EACCES, "Permission denied"), "Permission denied"),
        (OSError(errno.ENOSPC, "No space left on device"), "No space left on device"),
    ],
)
def test_unwritable_or_full_book_folder(
    tracker: Tracker, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], error: OSError, reason: str
) -> None:
    assert wavebook(["run", str(tracker.spec_path), "--quiet"], capsys)[0] == 0
    before = fingerprint(tracker.folder / "book")

    def refuse(*args: object, **kwargs: object) -> None:
        raise error

    monkeypatch.setattr(outputs.os, "replace", refuse)
    code, _, err = wavebook(["run", str(tracker.spec_path), "--quiet"], capsys)
    assert (code, "[cannot-write]" in err, reason in err) == (EXIT_DATA, True, True)
    _no_traceback(err)
    assert fingerprint(tracker.folder / "book") == before  # the previous book, no temporary file


def test_internal_error_is_one_apology_line_and_exit_3(
    tracker: Tracker, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    import pipeline.runner

    def bug(*args: object, **kwargs: object) -> None:
        raise ZeroDivisionError("float division by zero")

    monkeypatch.setattr(pipeline.runner, "unweighted_toplines", bug)
    code, _, err = wavebook(["run", str(tracker.spec_path), "--quiet"], capsys)
    assert code == EXIT_BUG
    assert err.count("\n") == 1 and "ZeroDivisionError" in err and "bug" in err
    _no_traceback(err)
    code, _, err = wavebook(["run", str(tracker.spec_path), "--quiet", "--debug"], capsys)
    assert code == EXIT_BUG
    assert "Traceback" in err and "ZeroDivisionError" in err


def test_ctrl_c_prints_one_line_exits_130_and_changes_nothing(
    tracker: Tracker, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    import pipeline.staging.stage

    assert wavebook(["stage", str(tracker.spec_path), "--quiet"], capsys)[0] == 0
    tracker.write_wave("wave1.csv", tracker_rows(5, prefix="z"))
    before = fingerprint(tracker.folder)

    def interrupt(*args: object, **kwargs: object) -> None:
        raise KeyboardInterrupt

    monkeypatch.setattr(pipeline.staging.stage, "_insert_rows", interrupt)  # inside the staging transaction
    code, _, err = wavebook(["run", str(tracker.spec_path), "--quiet"], capsys)
    assert code == EXIT_INTERRUPTED
    assert err.count("\n") == 1 and err.startswith("interrupted")
    assert fingerprint(tracker.folder) == before


def test_sigint_to_the_command_exits_130(tracker: Tracker) -> None:
    """A real Ctrl-C: SIGINT to a `wavebook run` process while it works."""
    process = subprocess.Popen(
        [sys.executable, "-m", "pipeline.cli", "run", str(tracker.spec_path), "--quiet"],
        stderr=subprocess.PIPE,
        text=True,
    )
    # Signal once the run is at work (its study database exists), not while the interpreter is
    # still starting: on a loaded machine a fixed delay can land before Python installs its handler.
    database = tracker.folder / "study.duckdb"
    deadline = time.monotonic() + 60
    while not database.exists() and process.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)
    process.send_signal(2)
    _, err = process.communicate(timeout=60)
    if process.returncode == 0:
        pytest.skip("the run finished before the signal arrived")
    assert process.returncode == EXIT_INTERRUPTED
    assert err.strip().count("\n") == 0 and err.startswith("interrupted")


def test_busy_database_is_busy_and_permission_is_not_busy(
    tracker: Tracker, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    assert wavebook(["stage", str(tracker.spec_path), "--quiet"], capsys)[0] == 0
    database = tracker.folder / "study.duckdb"
    holder = subprocess.Popen(
        [sys.executable, "-c", "import duckdb, sys, time; c = duckdb.connect(sys.argv[1]); print('held', flush=True); "
         "time.sleep(60)", str(database)],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        code, _, err = wavebook(["stage", str(tracker.spec_path), "--quiet"], capsys)
        assert (code, "[database-busy]" in err) == (EXIT_DATA, True)
    finally:
        holder.kill()
        holder.wait()

    import duckdb

    def denied(*args: object, **kwargs: object) -> None:
        raise duckdb.IOException(f'IO Error: Cannot open file "{database}": Permission denied')

    monkeypatch.setattr(duckdb, "connect", denied)
    code, _, err = wavebook(["stage", str(tracker.spec_path), "--quiet"], capsys)
    assert (code, "[database-permission]" in err, "[database-busy]" in err) == (EXIT_DATA, True, False)
    _no_traceback(err)


def test_usage_errors_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = tmp_path / "data.csv"
    data.write_text("id,g\n1,a\n", encoding="utf-8")
    code, _, err = wavebook(["rake", str(data), "--targets", str(data), "--trim-max", "0.5"], capsys)
    assert (code, "--trim-max" in err) == (EXIT_USAGE, True)


def test_exit_codes_are_documented_in_help(capsys: pytest.CaptureFixture[str]) -> None:
    for argv in (["--help"], ["run", "--help"]):
        with pytest.raises(SystemExit):
            wavebook(argv, capsys)
        out = capsys.readouterr().out
        assert "exit codes:" in out
        assert all(f"  {code} " in out for code in (0, 1, 2, 3, 130))


def test_readme_documents_the_exit_codes() -> None:
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    assert "## Exit codes" in readme
    assert all(f"| {code} |" in readme for code in (0, 1, 2, 3, 130))


def test_folder_as_spec_on_the_real_command(tmp_path: Path) -> None:
    """The installed entry point, end to end: a folder as the spec, exit 1, no traceback."""
    result = subprocess.run(
        [sys.executable, "-m", "pipeline.cli", "check", str(tmp_path)],
        capture_output=True,
        text=True,
        timeout=60,
        env={**os.environ, "PYTHONWARNINGS": "ignore"},
    )
    assert result.returncode == EXIT_DATA
    _no_traceback(result.stderr)


def test_full_disk_while_staging_is_a_data_error_and_rolls_back(
    tracker: Tracker, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    import duckdb

    import pipeline.staging.stage

    assert wavebook(["stage", str(tracker.spec_path), "--quiet"], capsys)[0] == 0
    tracker.write_wave("wave1.csv", tracker_rows(5, prefix="z"))
    before = fingerprint(tracker.folder)

    def disk_full(*args: object, **kwargs: object) -> None:
        raise duckdb.IOException("IO Error: Could not write file: No space left on device")

    monkeypatch.setattr(pipeline.staging.stage, "_insert_rows", disk_full)  # inside the staging transaction
    code, _, err = wavebook(["stage", str(tracker.spec_path), "--wave", "W1", "--quiet"], capsys)
    assert (code, "No space left on device" in err) == (EXIT_DATA, True)
    _no_traceback(err)
    assert fingerprint(tracker.folder) == before
