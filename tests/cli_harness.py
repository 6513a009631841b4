"""Run one `qfit` command line in a subprocess and record what it did to the world.

The in-process tests (tests/test_bad_input.py) see what `main()` returns; a subprocess also sees what
only a real process shows: the exit status after an uncaught exception or a signal, a traceback
printed by the interpreter, output lost to a closed pipe, a hang (a timeout here), and a file the run
replaced on disk. Each run records:

* `exit_code` (negative: killed by that signal; None: timed out and killed);
* `traceback`: whether stdout or stderr holds a Python traceback;
* `inputs_before` / `inputs_after`: SHA-256 of every input path given (a folder: every file in it,
  plus the file type of the path itself, so a device or FIFO swapped for a file shows);
* `outputs_after`: SHA-256 of every file under each output path (None when absent).

`tests/test_bad_input_subprocess.py` runs every case of docs/bad-input.md's "round two" table here.
"""
from __future__ import annotations

import hashlib
import os
import stat
import subprocess
import sys
from dataclasses import dataclass, field

TIMEOUT_S = 180  # a case that takes longer is a hang, not a slow machine: these runs take seconds


def _kind(path: str) -> str:
    try:
        mode = os.lstat(path).st_mode
    except FileNotFoundError:
        return "absent"
    for test, name in ((stat.S_ISREG, "file"), (stat.S_ISDIR, "dir"), (stat.S_ISFIFO, "fifo"),
                       (stat.S_ISCHR, "chardev"), (stat.S_ISLNK, "symlink"), (stat.S_ISSOCK, "socket")):
        if test(mode):
            return name
    return "other"


def _file_hash(path: str) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def fingerprint(path: str) -> dict[str, str] | None:
    """{relative path: kind or sha256} for `path` and everything under it; None when it is absent.
    Only regular files are read (a FIFO or a device is recorded by its kind, never opened)."""
    path = str(path)
    kind = _kind(path)
    if kind == "absent":
        return None
    if kind != "dir":
        return {".": _file_hash(path) if kind == "file" else kind}
    found = {".": "dir"}
    for root, dirs, names in os.walk(path):
        for name in sorted(dirs + names):
            full = os.path.join(root, name)
            rel = os.path.relpath(full, path)
            kind = _kind(full)
            found[rel] = _file_hash(full) if kind == "file" else kind
    return found


@dataclass
class CaseRun:
    args: list[str]
    exit_code: int | None
    stdout: str
    stderr: str
    inputs_before: dict = field(default_factory=dict)
    inputs_after: dict = field(default_factory=dict)
    outputs_after: dict = field(default_factory=dict)

    @property
    def traceback(self) -> bool:
        return "Traceback (most recent call last)" in self.stdout + self.stderr

    @property
    def inputs_unchanged(self) -> bool:
        return self.inputs_before == self.inputs_after

    @property
    def message(self) -> str:
        """The last stderr line (the one-line refusal, when there is one)."""
        lines = self.stderr.strip().splitlines()
        return lines[-1] if lines else ""

    def summary(self) -> str:
        return (f"exit {self.exit_code}, traceback {self.traceback}, inputs unchanged {self.inputs_unchanged}, "
                f"stderr {self.stderr[-2000:]!r}")


def qfit_command(args: list[str]) -> list[str]:
    return [sys.executable, "-m", "qfit.cli", *[os.fsdecode(a) if isinstance(a, bytes) else str(a) for a in args]]


def run_case(args: list, inputs: list = (), outputs: list = (), shell_tail: str | None = None,
             timeout_s: float = TIMEOUT_S, env: dict | None = None, cwd: str | None = None) -> CaseRun:
    """Run `qfit ARGS` in a fresh interpreter. `shell_tail` (e.g. "| head -1") pipes its stdout
    through a shell command; the exit code is then qfit's own (bash PIPESTATUS[0])."""
    command = qfit_command(list(args))
    before = {str(p): fingerprint(p) for p in inputs}
    run_env = dict(os.environ, PYTHONWARNINGS="default", **(env or {}))
    if shell_tail is None:
        popen_args = dict(args=command)
    else:
        quoted = " ".join("'" + c.replace("'", "'\\''") + "'" for c in command)
        popen_args = dict(args=["bash", "-c", f"{quoted} {shell_tail}; exit ${{PIPESTATUS[0]}}"])
    proc = subprocess.Popen(**popen_args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL,
                            env=run_env, cwd=cwd, start_new_session=True)
    try:
        out, err = proc.communicate(timeout=timeout_s)
        code = proc.returncode
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, 9)
        out, err = proc.communicate()
        code = None
    return CaseRun(args=[str(a) for a in args], exit_code=code,
                   stdout=out.decode("utf-8", "replace"), stderr=err.decode("utf-8", "replace"),
                   inputs_before=before, inputs_after={str(p): fingerprint(p) for p in inputs},
                   outputs_after={str(p): fingerprint(p) for p in outputs})
