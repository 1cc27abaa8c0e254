"""Tests of pvscan.measure._memory: freed heap memory given back to the system.

The check reads the process's resident set from /proc/self/statm (proc(5), the Linux man
pages: second field, resident pages) around the call.
"""
from __future__ import annotations

import os
import sys

import numpy as np

from pvscan.measure._memory import release_freed_memory


def _resident_bytes() -> int:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def test_freed_small_blocks_leave_the_resident_set():
    """64 KiB arrays come from the C heap (below glibc's 128 KiB mmap threshold, from memory);
    freed while a later block stays in use above them, their pages stay resident until the
    heap is trimmed."""
    if not sys.platform.startswith("linux"):
        assert release_freed_memory() in (True, False)
        return
    release_freed_memory()
    blocks = [np.ones(8192) for _ in range(2400)]  # 2400 x 64 KiB = 150 MiB, pages touched
    keep = np.ones(8192)  # on top of the heap: a plain trim of the top cannot free the rest
    before = _resident_bytes()
    del blocks
    after_free = _resident_bytes()
    assert release_freed_memory() is True
    after_trim = _resident_bytes()
    assert keep.sum() == 8192.0
    # most of the 150 MiB were still resident after free() and are gone after the trim
    assert before - after_free < 50 * 2**20
    assert after_free - after_trim > 100 * 2**20
