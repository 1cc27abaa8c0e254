"""Give the memory freed by a stage back to the operating system.

The C allocator keeps freed blocks of the heap (and of each worker thread's arena) for
reuse; after a stage that built and dropped many arrays of a few megabytes (the block
statistics on worker threads, the registration's block passes) that memory stays in the
process's resident set, often scattered too finely for the next stage's larger arrays to
reuse. ``malloc_trim(0)`` of the GNU C library returns the free pages of every arena. On
other C libraries nothing happens.
"""
from __future__ import annotations

import ctypes
import ctypes.util
import sys
from typing import Any

__all__ = ["release_freed_memory"]

_TRIM: list[Any] = []


def _trim_function() -> Any:
    if not _TRIM:
        fn = None
        if sys.platform.startswith("linux"):
            try:
                libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
                fn = getattr(libc, "malloc_trim", None)
            except OSError:
                fn = None
            if fn is not None:
                fn.argtypes = [ctypes.c_size_t]
                fn.restype = ctypes.c_int
        _TRIM.append(fn)
    return _TRIM[0]


def release_freed_memory() -> bool:
    """Return the free pages of the C heap to the operating system (GNU C library only).

    Returns
    -------
    bool
        True when the allocator supports it (the call was made), False otherwise.
    """
    fn = _trim_function()
    if fn is None:
        return False
    fn(0)
    return True
