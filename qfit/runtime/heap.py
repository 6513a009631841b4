"""heap: keep freed tensor buffers in the C heap for reuse, instead of returning them to the kernel.

qfit's passes allocate and drop the same large buffers batch after batch (onnxruntime hands each
run's outputs to numpy without a copy, and its memory arena is off: qfit.runtime.sessions). glibc's
malloc serves a block above its mmap threshold (128 KiB at start, raised dynamically up to 32 MiB)
with a fresh mapping and unmaps it on free, and gives the top of the heap back above its trim
threshold; every batch then faults in its pages again, which the kernel zeroes. On a 2-core x86
machine that made a float pass exposing the demo's 57 tensors 2.3x slower (69 ms a batch against
30 ms with the thresholds below). Setting both thresholds fixes them (mallopt(3)): blocks up to
32 MiB come from the heap and up to 256 MiB of freed heap stays mapped for the next batch. The peak
of resident memory is what the largest batch touches either way.

Process-wide, so only the program calls it (qfit.cli.main), not the library; elsewhere than glibc
it does nothing.
"""
from __future__ import annotations

import ctypes
import ctypes.util
import platform

M_TRIM_THRESHOLD = -1     # <malloc.h>
M_MMAP_THRESHOLD = -3
MMAP_THRESHOLD_BYTES = 32 << 20   # glibc's largest (DEFAULT_MMAP_THRESHOLD_MAX on 64-bit)
TRIM_THRESHOLD_BYTES = 256 << 20


def keep_freed_buffers() -> bool:
    """Set glibc's mmap and trim thresholds; True when they were set."""
    if platform.system() != "Linux" or platform.libc_ver()[0] != "glibc":
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    return bool(mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES)) and bool(mallopt(M_TRIM_THRESHOLD, TRIM_THRESHOLD_BYTES))
