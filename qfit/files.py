"""Atomic output: every file qfit writes goes to a temporary name in the same folder, then is renamed.

A crash or an interrupt therefore leaves either the old file, the complete new file, or nothing —
never a half-written model or report.
"""
from __future__ import annotations

import json
import math
import os
import stat
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
    for path in contents:
        # the rename would put a regular file in place of a device node or FIFO (as root, over /dev/null)
        if os.path.exists(path) and not is_regular_file(path):
            raise QfitError(f"output: {path} exists and is not a regular file; nothing was written")
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


def text_bytes(text: str) -> bytes:
    """UTF-8 bytes of a report. A file or class name that is not UTF-8 on disk reaches Python as
    surrogate escapes (PEP 383), which UTF-8 cannot encode: such bytes are written as `\\xff`."""
    return printable_text(text).encode("utf-8")


def printable_text(text: str) -> str:
    """`text` with every lone surrogate (an undecodable byte of a file name) spelled `\\xNN`."""
    try:
        text.encode("utf-8")
        return text
    except UnicodeEncodeError:
        pass
    try:  # surrogate escapes of bytes (PEP 383) back to those bytes, shown as \xNN
        return text.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")
    except UnicodeEncodeError:  # some other lone surrogate: \udXXX
        return text.encode("utf-8", "backslashreplace").decode("utf-8")


def write_text(path: str, text: str) -> None:
    write_bytes(path, text_bytes(text))


def report_ready(data, where: str = "report"):
    """A copy of `data` that JSON can hold: names made printable (see `printable_text`), and a
    one-line refusal naming the key when a number is NaN or infinite (JSON has no such numbers, and
    a report must not pretend a figure exists). Values are checked here so that `allow_nan=False`
    never has to raise."""
    if isinstance(data, dict):
        return {printable_text(str(k)): report_ready(v, f"{where}.{printable_text(str(k))}") for k, v in data.items()}
    if isinstance(data, (list, tuple)):
        return [report_ready(v, f"{where}[{i}]") for i, v in enumerate(data)]
    if isinstance(data, str):
        return printable_text(data)
    if isinstance(data, float) and not math.isfinite(data):
        raise QfitError(f"{where}: the figure is {data}, not a finite number (from the input data or an "
                        f"option); nothing was written")
    return data


def json_bytes(data: dict) -> bytes:
    """The bytes report.json and every other JSON output hold: indented, no NaN, trailing newline."""
    return (json.dumps(report_ready(data), indent=2, allow_nan=False) + "\n").encode("utf-8")


def write_json(path: str, data: dict) -> None:
    write_bytes(path, json_bytes(data))


# ---- inputs that must never hang or be read without bound -------------------------------------------

def is_regular_file(path: str) -> bool:
    """True for a regular file (links followed); False for a FIFO, device, socket or folder, which
    would block a read forever (a FIFO without writer) or never end (/dev/zero)."""
    try:
        return stat.S_ISREG(os.stat(path).st_mode)
    except OSError:
        return False


def split_regular(folder: str, relative_paths: list[str]) -> tuple[list[str], list[str]]:
    """(regular files, everything else) among `relative_paths` under `folder`, order kept."""
    regular, other = [], []
    for rel in relative_paths:
        (regular if is_regular_file(os.path.join(folder, rel)) else other).append(rel)
    return regular, other


MAX_SMALL_FILE_BYTES = 64 * 1024 ** 2  # labels CSV, preprocessing JSON: a million rows fit
NOT_REGULAR_REASON = "not a regular file (a FIFO, device or socket): never read"


def read_regular_file(path: str, max_bytes: int, where: str) -> bytes:
    """The bytes of a small input file (labels CSV, preprocessing JSON), refusing anything that is
    not a regular file or is larger than `max_bytes`. Opened without blocking, so a FIFO cannot stall
    the run before it is refused."""
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except FileNotFoundError:
        raise QfitError(f"{where}: no such file") from None
    except OSError as e:
        raise QfitError(f"{where}: cannot read ({e.strerror or e})") from None
    mode = os.fstat(fd).st_mode  # checked before wrapping: a folder cannot even be wrapped for reading
    if not stat.S_ISREG(mode):
        os.close(fd)
        if stat.S_ISDIR(mode):
            raise QfitError(f"{where}: is a directory, not a file")
        raise QfitError(f"{where}: not a regular file (a FIFO, device or socket); give a file")
    with os.fdopen(fd, "rb") as f:
        try:
            data = f.read(max_bytes + 1)
        except OSError as e:
            raise QfitError(f"{where}: cannot read ({e.strerror or e})") from None
    if len(data) > max_bytes:
        raise QfitError(f"{where}: larger than {max_bytes // 1024 ** 2} MiB; this file is expected to be small")
    return data


# ---- outputs that must never replace an input or a special file -------------------------------------

def _same_or_inside(path: str, other: str) -> bool:
    real, other_real = os.path.realpath(path), os.path.realpath(other)
    return real == other_real or real.startswith(other_real.rstrip(os.sep) + os.sep)


def check_output_file(path: str, what: str, inputs: list[str] = ()) -> None:
    """Refuse an output file that is not a regular file or a new path (/dev/null, a FIFO, a folder:
    the atomic rename would replace a device node or fail late), that is one of the input files, or
    that lies inside an input folder. Checked before any work, so nothing is written or changed."""
    if os.path.isdir(path):
        raise QfitError(f"{what}: {path} is a folder; give a file name")
    if os.path.exists(path) and not is_regular_file(path):
        raise QfitError(f"{what}: {path} exists and is not a regular file (a device, FIFO or socket); "
                        f"give a new or regular file")
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise QfitError(f"{what}: folder {folder} does not exist")
    for given in inputs:
        if not given:
            continue
        if os.path.isdir(given) and _same_or_inside(path, given):
            raise QfitError(f"{what}: {path} is inside the input folder {given}; write outputs elsewhere")
        if os.path.exists(path) and os.path.exists(given) and os.path.samefile(path, given) \
                or os.path.realpath(path) == os.path.realpath(given):
            raise QfitError(f"{what}: {path} is the input {given}; writing it would destroy the input")


def check_output_folder(path: str, what: str = "--out", inputs: list[str] = ()) -> None:
    """`check_output_dir`, and refuse an output folder that is an input folder or lies inside one
    (an output could replace a data file, and a later run would read the reports as data)."""
    check_output_dir(path, what)
    for given in inputs:
        if given and os.path.isdir(given) and _same_or_inside(path, given):
            raise QfitError(f"{what}: {path} is inside the input folder {given}; write outputs elsewhere")
