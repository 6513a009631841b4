"""qfit.runtime.heap: the program's heap thresholds (glibc's mallopt(3): returns 1 on success, 0 when a
value is refused, e.g. an mmap threshold above 32 MiB on 64-bit)."""
from __future__ import annotations

import platform

import pytest

from qfit.runtime import heap


@pytest.mark.skipif(platform.system() != "Linux" or platform.libc_ver()[0] != "glibc", reason="glibc only")
def test_glibc_accepts_both_thresholds():
    assert heap.keep_freed_buffers() is True


def test_the_mmap_threshold_is_within_the_largest_glibc_accepts_on_64_bit():
    # glibc's malloc.c, DEFAULT_MMAP_THRESHOLD_MAX = 4 * 1024 * 1024 * sizeof(long) on 64-bit (from memory)
    assert 0 < heap.MMAP_THRESHOLD_BYTES <= 4 * 1024 * 1024 * 8
