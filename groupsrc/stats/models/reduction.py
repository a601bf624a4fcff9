"""Within-participant reduction: maps -> one map per participant for a contrast.

``W`` (n_participants, n_maps) holds the within-participant weights
(:func:`groupsrc.inputs.design.reduction_matrix`); the reduced data are
``W @ Y`` over the analysed samples.  The maps (often a memory-mapped cache)
are streamed in source chunks and accumulated in float64.  A map file
opened whole (``numpy.memmap``) is read chunk by chunk with positioned reads
instead of through the mapping: the pages then land in the system's file
cache, not in this process's resident set (through the mapping, a freshly
written file's pages can come in blocks of up to 2 MiB per map touched, and
the reduction's peak rose by about 170 MiB on ``tests/benchmarks/bench_memory.py``).

Examples
--------
>>> import numpy as np
>>> Y = np.arange(12, dtype=np.float32).reshape(2, 3, 2)     # 2 maps, 3 sources, 2 samples
>>> reduce_maps(Y, np.array([[1.0, -1.0]]), slice(0, 2)).tolist()
[[[-6.0, -6.0], [-6.0, -6.0], [-6.0, -6.0]]]
"""

from __future__ import annotations

import mmap
import os

import numpy as np

#: elements of the maps read per chunk (float64 working copy ~ 8x this in bytes)
CHUNK_ELEMENTS = 4e6


def reduce_maps(Y, W, samples: slice, *, chunk_bytes=None, out=None,
                progress=None) -> np.ndarray:
    """``W @ Y[:, :, samples]`` as float32 (n_participants, n_sources, n_samples).

    ``chunk_bytes`` bounds the float64 working copy of each source chunk
    (default ``8 x CHUNK_ELEMENTS``); ``out`` receives the result (e.g. an
    array on disk, :mod:`..engine.memory`); ``progress(done, total)`` is told the
    sources done.  Pages of memory-mapped inputs and outputs are handed back
    after each chunk, so the resident set stays at about one chunk.
    """
    from ..engine.pages import release
    W = np.asarray(W, np.float64)
    n_maps, S, _ = Y.shape
    T = len(range(*samples.indices(Y.shape[2])))
    if out is None:
        out = np.empty((W.shape[0], S, T), dtype=np.float32)
    elements = CHUNK_ELEMENTS if chunk_bytes is None else max(1.0, chunk_bytes / 8.0)
    step = max(1, int(elements // max(1, n_maps * T)))
    if progress is not None:
        progress(0, S)
    with _SourceReader(Y) as read:
        for a in range(0, S, step):
            b = min(S, a + step)
            block = np.asarray(read(a, b)[:, :, samples], dtype=np.float64)
            out[:, a:b, :] = np.tensordot(W, block, axes=(1, 0)).astype(np.float32)
            del block
            if not read.direct:             # read through the mapping: hand the pages back
                release(Y)
            release(out)
            if progress is not None:
                progress(b, S)
    return out


class _SourceReader:
    """``read(a, b)`` -> ``Y[:, a:b, :]``: positioned reads from the file when ``Y``
    is a whole-file ``numpy.memmap`` (C order), else a slice of ``Y``."""

    def __init__(self, Y):
        self.Y, self.fd = Y, None
        if (isinstance(Y, np.memmap) and isinstance(Y.base, mmap.mmap) and Y.filename
                and Y.flags.c_contiguous and Y.ndim == 3):
            self.fd = os.open(Y.filename, os.O_RDONLY)

    @property
    def direct(self) -> bool:
        """True when the reads go to the file, not through ``Y``'s mapping."""
        return self.fd is not None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        if self.fd is not None:
            os.close(self.fd)

    def __call__(self, a, b):
        Y = self.Y
        if not self.direct:
            return Y[:, a:b, :]
        n, S, T = Y.shape
        item = Y.dtype.itemsize
        buf = np.empty((n, b - a, T), Y.dtype)
        size = (b - a) * T * item
        for i in range(n):
            view = memoryview(buf[i].reshape(-1).view(np.uint8))
            got = os.preadv(self.fd, [view], Y.offset + (i * S + a) * T * item)
            if got != size:
                raise OSError(f"{Y.filename}: short read ({got} of {size} bytes) at map {i}; "
                              "the file changed or is truncated -> load the maps again")
        return buf
