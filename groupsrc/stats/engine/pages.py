"""Handing the pages of memory-mapped arrays back to the system.

A memory-mapped file's pages stay in a process's resident set once read or
written; the chunked loops over the cache, the reduced data and the
residuals call :func:`release` after each chunk, so a run bounded by
``--memory`` (:mod:`.memory`) holds about one chunk of them at a time.  The
content stays in the file (and the system's page cache).
"""

from __future__ import annotations

import ctypes
import functools
import mmap


def release(array) -> None:
    """Hand the resident pages of a memory-mapped ``array`` (or its base) back to the
    system; their content stays in the file.  No-op for arrays in memory."""
    a = array
    while a is not None:
        mm = getattr(a, "_mmap", None)
        if mm is not None:
            try:
                mm.madvise(mmap.MADV_DONTNEED)
            except (AttributeError, ValueError, OSError):  # pragma: no cover - other systems
                pass
            return
        a = getattr(a, "base", None)


def trim() -> None:
    """Hand the free memory the C allocator still holds back to the system (glibc's
    ``malloc_trim``; a no-op where there is none).  Called before the resampling
    and before the observed maps: the temporaries of the stages before them (the
    reduction's chunks, the residual norms) would otherwise stay in the resident
    set (about 45 MiB on ``tests/benchmarks/bench_memory.py``)."""
    fn = _malloc_trim()
    if fn is not None:
        fn(0)


@functools.cache
def _malloc_trim():
    try:
        return getattr(ctypes.CDLL(None), "malloc_trim", None)
    except OSError:  # pragma: no cover - other systems
        return None
