"""Where wavebook may write: the one guard every command that writes a file goes through.

Rules (README, "What wavebook refuses, and why"):

- `output-is-input`: never write onto the study database, the spec, a wave file, a targets file
  or any other input of the same command, however the path is spelled (relative paths, `..`,
  symbolic and hard links all lead to the same file, so files are compared as files).
- `output-exists`: never replace an existing file unless `--force`, except a file wavebook wrote
  itself and nobody changed since. Every file written here is recorded with its SHA-256 in the
  marker `.wavebook-outputs` (JSON, file name -> SHA-256) of its folder; a file whose bytes still
  match its record is wavebook's own previous output and may be replaced.
- `output-not-a-file`: the path names a folder or a special file.

`write_output` writes through a temporary file in the destination folder renamed into place, so
a failure (full disk, permission) never leaves a half-written file, and reports it as a
`cannot-write` problem naming the file instead of a traceback.
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from pipeline.errors import Problem, WavebookError

if TYPE_CHECKING:
    from pipeline.staging.spec import Study

MARKER = ".wavebook-outputs"


@dataclass(frozen=True)
class Input:
    """A file a command reads (or the database it keeps), with the role it plays in messages."""

    path: Path
    role: str  # e.g. "the study database", "the raw file of wave W1"


def file_sha256(path: Path) -> str:
    """Hex SHA-256 of a file's bytes (read in chunks)."""
    with open(path, "rb") as handle:
        return hashlib.file_digest(handle, "sha256").hexdigest()


def same_file(a: Path, b: Path) -> bool:
    """True when `a` and `b` name the same file: equal once symbolic links and relative parts are
    resolved, or (both existing) the same inode, which also catches hard links."""
    if os.path.realpath(a) == os.path.realpath(b):
        return True
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


def study_inputs(study: Study) -> list[Input]:
    """Every file a study command reads or keeps: the spec, the database (and its write-ahead log),
    each wave's raw file and each targets file named by a `[[weighting]]` step."""
    database = study.database_path
    inputs = [
        Input(study.path, "the study spec"),
        Input(database, "the study database"),
        Input(database.with_name(database.name + ".wal"), "the study database's write-ahead log"),
    ]
    inputs += [Input(w.file, f"the raw file of wave {w.id}") for w in study.waves]
    for number, step in enumerate(study.weighting, start=1):
        if isinstance(step.get("targets"), str):
            inputs.append(Input(study.path.parent / step["targets"], f"the targets file of weighting step {number}"))
    return inputs


def is_own_output(path: Path) -> bool:
    """True when `path` is recorded in its folder's marker and its bytes are unchanged since."""
    recorded = _read_marker(path.parent).get(path.name)
    return recorded is not None and path.is_file() and file_sha256(path) == recorded


def output_problems(path: Path, inputs: Iterable[Input], *, force: bool, option: str) -> list[Problem]:
    """Every reason not to write `path` (empty when it may be written); `option` names the flag."""
    for item in [*inputs, Input(path.parent / MARKER, "wavebook's record of the files it wrote")]:
        if same_file(path, item.path):
            return [
                Problem(
                    "output-is-input",
                    f"{option} {path} is {item.role}; wavebook never writes over its inputs: choose another file",
                    file=str(path),
                )
            ]
    if path.exists() and not path.is_file():
        kind = "a folder" if path.is_dir() else "not a regular file"
        return [Problem("output-not-a-file", f"{option} {path} is {kind}; name a file", file=str(path))]
    if path.exists() and not force and not is_own_output(path):
        return [
            Problem(
                "output-exists",
                f"{path} exists and was not written by wavebook (or was changed since); "
                "choose another file or add --force to replace it",
                file=str(path),
            )
        ]
    return []


def check_output(path: str | Path, inputs: Iterable[Input], *, force: bool, option: str) -> Path:
    """`path` as a Path when `output_problems` finds nothing; WavebookError listing them otherwise."""
    target = Path(path)
    problems = output_problems(target, inputs, force=force, option=option)
    if problems:
        raise WavebookError(f"not writing {target}", problems)
    return target


def write_output(path: Path, write: Callable[[Path], None]) -> Path:
    """Call `write(temporary path)` in `path`'s folder, rename the result onto `path` and record it
    in the folder's marker; returns `path`. An OSError (full disk, permission denied, read-only
    folder) becomes a WavebookError (rule cannot-write) and leaves `path` as it was."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        handle, temp_name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=path.suffix)
        os.close(handle)
        temp = Path(temp_name)
        try:
            write(temp)
            os.chmod(temp, 0o666 & ~_umask())
            digest = file_sha256(temp)
            os.replace(temp, path)
        finally:
            temp.unlink(missing_ok=True)
        _record(path, digest)
    except OSError as exc:
        raise cannot_write(path, exc) from None
    return path


def write_text_output(path: Path, text: str) -> Path:
    """`write_output` of a UTF-8 text, flushed to disk before the rename."""

    def write(temp: Path) -> None:
        with open(temp, "w", encoding="utf-8") as out:
            out.write(text)
            out.flush()
            os.fsync(out.fileno())

    return write_output(path, write)


def cannot_write(path: Path, exc: OSError) -> WavebookError:
    """The error of a failed write: the file and the system's reason (e.g. 'No space left on device')."""
    reason = exc.strerror or str(exc)
    return WavebookError(
        f"cannot write {path}",
        [Problem("cannot-write", f"{reason}; nothing was written", file=str(exc.filename or path))],
    )


def _read_marker(folder: Path) -> dict[str, str]:
    try:
        data = json.loads((folder / MARKER).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return {str(k): str(v) for k, v in data.items()} if isinstance(data, dict) else {}


def _record(path: Path, digest: str) -> None:
    """Add `path` with its SHA-256 to the marker of its folder (written through a temporary file)."""
    marker = path.parent / MARKER
    entries = _read_marker(path.parent)
    entries[path.name] = digest
    handle, temp = tempfile.mkstemp(dir=path.parent, prefix=f"{MARKER}.", suffix=".tmp")
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as out:
            out.write(json.dumps(entries, indent=1, sort_keys=True) + "\n")
        os.replace(temp, marker)
    finally:
        Path(temp).unlink(missing_ok=True)


def _umask() -> int:
    current = os.umask(0)
    os.umask(current)
    return current
