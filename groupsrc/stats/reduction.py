"""Within-participant reduction: maps -> one map per participant for a contrast.

``W`` (n_participants, n_maps) holds the within-participant weights
(:func:`groupsrc.inputs.design.reduction_matrix`); the reduced data are
``W @ Y`` over the analysed samples.  The maps (often a memory-mapped cache)
are streamed in source chunks and accumulated in float64.

Examples
--------
>>> import numpy as np
>>> Y = np.arange(12, dtype=np.float32).reshape(2, 3, 2)     # 2 maps, 3 sources, 2 samples
>>> reduce_maps(Y, np.array([[1.0, -1.0]]), slice(0, 2)).tolist()
[[[-6.0, -6.0], [-6.0, -6.0], [-6.0, -6.0]]]
"""

from __future__ import annotations

import numpy as np

#: elements of the maps read per chunk (float64 working copy ~ 8x this in bytes)
CHUNK_ELEMENTS = 4e6


def reduce_maps(Y, W, samples: slice, *, chunk_bytes=None, out=None,
                progress=None) -> np.ndarray:
    """``W @ Y[:, :, samples]`` as float32 (n_participants, n_sources, n_samples).

    ``chunk_bytes`` bounds the float64 working copy of each source chunk
    (default ``8 x CHUNK_ELEMENTS``); ``out`` receives the result (e.g. an
    array on disk, :mod:`.memory`); ``progress(done, total)`` is told the
    sources done.  Pages of memory-mapped inputs and outputs are handed back
    after each chunk, so the resident set stays at about one chunk.
    """
    from .pages import release
    W = np.asarray(W, np.float64)
    n_maps, S, _ = Y.shape
    T = len(range(*samples.indices(Y.shape[2])))
    if out is None:
        out = np.empty((W.shape[0], S, T), dtype=np.float32)
    elements = CHUNK_ELEMENTS if chunk_bytes is None else max(1.0, chunk_bytes / 8.0)
    step = max(1, int(elements // max(1, n_maps * T)))
    if progress is not None:
        progress(0, S)
    for a in range(0, S, step):
        b = min(S, a + step)
        block = np.asarray(Y[:, a:b, samples], dtype=np.float64)
        out[:, a:b, :] = np.tensordot(W, block, axes=(1, 0)).astype(np.float32)
        del block
        release(Y)
        release(out)
        if progress is not None:
            progress(b, S)
    return out
