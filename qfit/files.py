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


def write_bytes(path: str, data: bytes) -> None:
    """Write `data` to `path` atomically (temporary file in the same folder, then rename)."""
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
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def write_text(path: str, text: str) -> None:
    write_bytes(path, text.encode("utf-8"))


def write_json(path: str, data: dict) -> None:
    write_text(path, json.dumps(data, indent=2, allow_nan=False) + "\n")
