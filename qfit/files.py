"""Atomic output: every file qfit writes goes to a temporary name in the same folder, then is renamed.

A crash or an interrupt therefore leaves either the old file, the complete new file, or nothing —
never a half-written model or report.
"""
from __future__ import annotations

import json
import os
import tempfile

from qfit.errors import QfitError


def ensure_writable_dir(path: str, what: str = "--out") -> None:
    """Create `path` if needed and check that files can be created in it."""
    try:
        os.makedirs(path, exist_ok=True)
    except OSError as e:
        raise QfitError(f"{what}: cannot create folder {path} ({e.strerror})") from None
    if not os.path.isdir(path):
        raise QfitError(f"{what}: {path} is not a folder")
    if not os.access(path, os.W_OK | os.X_OK):
        raise QfitError(f"{what}: folder {path} is not writable")


def check_output_dir(path: str, what: str = "--out") -> None:
    """Fail early if `path` could not be created or written, without creating it: a run refused at a
    later stage must leave no folder behind. `ensure_writable_dir` creates it when writing."""
    target = os.path.abspath(path)
    existing = target
    while not os.path.exists(existing) and os.path.dirname(existing) != existing:
        existing = os.path.dirname(existing)
    if os.path.isdir(existing):
        if not os.access(existing, os.W_OK | os.X_OK):
            raise QfitError(f"{what}: folder {existing} is not writable")
    elif existing == target:
        raise QfitError(f"{what}: {path} exists and is not a folder")
    else:
        raise QfitError(f"{what}: cannot create folder {path} ({existing} is a file, not a folder)")


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _stage(path: str, data: bytes) -> str:
    """Write `data` to a new temporary file next to `path`; return its name (removed again on failure)."""
    folder = os.path.dirname(os.path.abspath(path))
    try:
        fd, tmp = tempfile.mkstemp(prefix="." + os.path.basename(path) + ".", suffix=".partial", dir=folder)
    except OSError as e:
        raise QfitError(f"output: cannot write in {folder} ({e.strerror})") from None
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        # mkstemp makes the file private (0600); give it the permissions of any file the user creates
        os.chmod(tmp, 0o666 & ~_umask())
    except BaseException as e:
        _remove(tmp)
        if isinstance(e, OSError):  # e.g. the disk is full
            raise QfitError(f"output: cannot write {path} ({e.strerror or e})") from None
        raise
    return tmp


def _remove(path: str) -> None:
    try:
        os.unlink(path)
    except OSError:
        pass


def write_files(contents: dict[str, bytes]) -> None:
    """Write several files as one step: every file is staged under a temporary name first and only
    then are they renamed, so a failure or an interrupt while writing changes none of them."""
    staged: list[tuple[str, str]] = []
    try:
        for path, data in contents.items():
            staged.append((_stage(path, data), path))
        for tmp, path in staged:
            try:
                os.replace(tmp, path)
            except OSError as e:
                raise QfitError(f"output: cannot write {path} ({e.strerror or e})") from None
    finally:
        for tmp, _ in staged:
            if os.path.exists(tmp):  # not renamed: a failure or an interrupt came first
                _remove(tmp)


def write_bytes(path: str, data: bytes) -> None:
    """Write `data` to `path` atomically (temporary file in the same folder, then rename)."""
    write_files({path: data})


def write_text(path: str, text: str) -> None:
    write_bytes(path, text.encode("utf-8"))


def json_bytes(data: dict) -> bytes:
    """The bytes report.json and every other JSON output hold: indented, no NaN, trailing newline."""
    return (json.dumps(data, indent=2, allow_nan=False) + "\n").encode("utf-8")


def write_json(path: str, data: dict) -> None:
    write_bytes(path, json_bytes(data))
