"""Supra-threshold lists: what cluster scoring needs of a resampled map, without the map.

Cluster mass and extent score a resampled map only through its points beyond
the cluster-forming threshold.  A kernel that supports it (``lists = True``)
writes, for each resample of a batch, the flat indices and values of those
points while a chunk of its statistic is still in cache, instead of the whole
float32 map; the scorer (:func:`.unionfind.listed_cluster_extremes`) joins the
listed points.  Two gains: no map is written and read back (the scorer's pass
over every point of every map), and a batch costs ``capacity x 8`` bytes per
resample instead of ``4 x n_features``, so batches -- and the product blocks
of :mod:`..models.ols` -- can be four times larger in the same memory.

Layout.  ``idx`` / ``val`` have one row per resample of the batch; a row's
``capacity`` slots are split into ``parts`` consecutive regions, one per run
of feature chunks (``part = (j, J)`` of the kernel contract), so threads
sharing a batch write disjoint slots.  ``count[j, i]`` is how many points part
``j`` listed for resample ``i``, in ascending flat order: the regions read one
after another give the row's points in flat order, the order of the scorer's
sums.  A region that fills up sets its count to ``OVERFLOW``; the scorer then
leaves that resample to the map-based path (:class:`..engine.backends.NullJob`).
The default capacity, one eighth of the features, is used up to a forming p of
0.05 (:data:`..inference.LISTS_UP_TO_FORMING_P`; more liberal thresholds keep map
batches), where about a twentieth of a null map lies beyond the threshold.  A
resample that still overflows costs time (a product block per run of up to 16
overflowed resamples) and, beyond the ``--memory`` plan, one buffer of up to 16
maps per scoring thread.
"""

from __future__ import annotations

import numpy as np
from numba import njit

#: ``count`` of a region that ran out of slots
OVERFLOW = -1
#: slots per feature (the default capacity is ``n_features // CAPACITY_DIVISOR``)
CAPACITY_DIVISOR = 8
#: bytes per slot (int32 index, float32 value)
SLOT_BYTES = 8


def default_capacity(n_features: int) -> int:
    return max(1, int(n_features) // CAPACITY_DIVISOR)


def bytes_per_resample(n_features: int) -> int:
    """Bytes one resample takes in a batch buffer (for the batch-size budget)."""
    return default_capacity(n_features) * SLOT_BYTES


class Exceedances:
    """The supra-threshold points of a batch of ``rows`` resamples (see the module
    docstring).  ``lo`` is the first resample's index, set by the kernel."""

    def __init__(self, rows, n_features, threshold, want_pos, want_neg, parts=1,
                 capacity=None):
        self.capacity = int(capacity or default_capacity(n_features))
        self.threshold = float(threshold)
        self.want_pos, self.want_neg = bool(want_pos), bool(want_neg)
        t32 = float32_at_or_below(self.threshold)
        #: float32 bounds of :func:`list_rows`: listed when ``x > upper`` or ``x < lower``
        self.upper = t32 if self.want_pos else np.float32(np.inf)
        self.lower = -t32 if self.want_neg else np.float32(-np.inf)
        self.idx = np.empty((rows, self.capacity), np.int32)
        self.val = np.empty((rows, self.capacity), np.float32)
        self.count = np.zeros((parts, rows), np.int64)
        self.bases = np.array([self.capacity * j // parts for j in range(parts + 1)], np.int64)
        self.lo = 0

    @property
    def rows(self) -> int:
        return self.idx.shape[0]

    @property
    def parts(self) -> int:
        return self.count.shape[0]

    def region(self, part):
        """(j, base, slots) of ``part = (j, J)`` (None: the only part)."""
        j, J = (0, 1) if part is None else part
        if J != self.parts:
            raise ValueError(f"the batch buffer has {self.parts} part(s), asked for "
                             f"part {j} of {J}")
        return j, int(self.bases[j]), int(self.bases[j + 1] - self.bases[j])


def float32_at_or_below(t) -> np.float32:
    """The largest float32 not above ``t``: for a float32 ``x``, ``x > t`` exactly when
    ``x > float32_at_or_below(t)`` (and ``x < -t`` when ``x < -float32_at_or_below(t)``),
    so the listing compares in float32 and keeps the float64 threshold's decisions."""
    f = np.float32(t)
    if float(f) > t:
        f = np.nextafter(f, np.float32(-np.inf))
    return f


@njit(nogil=True, cache=True)
def list_rows(st, n_rows, w, first, upper, lower, idx, val, count, row0, base, slots):
    """Append the points of ``st[i, :w]`` (float32; features ``first..first+w-1``) with
    ``x > upper`` or ``x < lower`` to row ``row0 + i`` of ``idx`` / ``val``, slots
    ``base..base+slots-1``, for ``i < n_rows``; ``count`` (rows,) the part's counts.

    ``upper`` / ``lower``: :attr:`Exceedances.upper` / ``lower``, the float32 forms of
    the map-based scorer's tests (``x > threshold`` when positive clusters are
    wanted, ``x < -threshold`` when negative ones are; +-inf for a sign not wanted).
    Each row is first marked in one branch-free pass (vectorised by the compiler),
    then only the 8-point groups with a mark are visited: most points of a map are
    below the threshold.
    """
    words = (w + 7) // 8
    mark = np.zeros(8 * words, np.uint8)
    marks = mark.view(np.uint64)
    for i in range(n_rows):
        r = row0 + i
        k = count[r]
        if k == OVERFLOW:
            continue
        x = st[i]
        for j in range(w):
            mark[j] = np.uint8(x[j] > upper) | np.uint8(x[j] < lower)
        for q in range(words):
            if marks[q] == 0:
                continue
            for j in range(8 * q, 8 * q + 8):
                if mark[j]:
                    if k == slots:
                        k = OVERFLOW
                        break
                    idx[r, base + k] = first + j
                    val[r, base + k] = x[j]
                    k += 1
            if k == OVERFLOW:
                break
        count[r] = k
