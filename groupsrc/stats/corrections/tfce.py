"""Threshold-free cluster enhancement over space x time.

TFCE (Smith & Nichols 2009, NeuroImage 44:83-98) replaces each point's
statistic by the integral, over heights ``h`` from 0 to its value, of
``e(h)^E h^H dh``, where ``e(h)`` is the extent (number of points) of the
cluster containing the point when the map is thresholded at ``h``.

Two ways of taking the integral, both computed in one pass per map by the
component tree of :mod:`.unionfind` (one sort, near-linear merging):

* **exact** (the default): heights at the data values.  Between two
  consecutive data values every cluster is constant, so the integral is a
  finite sum of ``e^E (h_hi^(H+1) - h_lo^(H+1)) / (H+1)`` terms with no
  discretisation error.
* **stepped**: the usual discrete sum over heights ``h_k = k dh`` (k = 1, 2,
  ...), the point counted at ``h_k`` when ``stat >= h_k``:
  ``tfce(v) = sum_k e_k(v)^E h_k^H dh``.  Step ``dh = max|stat| / steps`` per
  map (observed and each resample), or a fixed ``dh``.  It is a right-endpoint
  Riemann sum of the same integral: it converges to the exact value as
  ``dh -> 0`` with an error proportional to ``dh`` (for a flat cluster of
  height ``h`` the relative excess is about ``(H + 1) dh / (2 h)``), and
  equals a per-level labelling (the definition) at the same steps.  Kept for
  comparison with tools that integrate in steps.

Defaults E = 0.5, H = 2 are the values recommended for 3D data by Smith &
Nichols.  Neighbourhood: the space x time graph of :mod:`.clusters`.
Two-sided maps are enhanced on the positive part and on the negated
negative part (never joined across signs); the result carries the sign.

Examples
--------
>>> import numpy as np
>>> from scipy import sparse
>>> adj = sparse.csr_matrix((1, 1))
>>> x = np.full((1, 4), 2.0)           # one flat cluster, height 2, extent 4
>>> round(float(tfce(x, adj, dh=0.5)[0, 0]), 4)  # sum_k 4^0.5 (0.5k)^2 0.5
7.5
>>> round(float(tfce(x, adj)[0, 0]), 4)          # 4^0.5 2^3 / 3, exact
5.3333
"""

from __future__ import annotations

import math

import numpy as np

from . import unionfind
from .clusters import check_adjacency

E_DEFAULT = 0.5
H_DEFAULT = 2.0
#: steps of the stepped sum when one is asked for without a number
STEPS_DEFAULT = 100


def _positive_number(value):
    try:
        value = float(value)
    except (TypeError, ValueError):
        return False
    return math.isfinite(value) and value > 0


def check_parameters(E, H, steps, dh):
    """Raise ValueError naming the first invalid TFCE parameter.

    E and H must be finite and positive (Smith & Nichols 2009 recommend
    E = 0.5, H = 2); ``steps`` None (exact integral) or a positive integer
    when ``dh`` is None; ``dh`` finite and positive when given.
    """
    if not _positive_number(E):
        raise ValueError(f"TFCE extent exponent E must be a positive number, got {E!r} "
                         f"-> use e.g. E = {E_DEFAULT} (Smith & Nichols 2009)")
    if not _positive_number(H):
        raise ValueError(f"TFCE height exponent H must be a positive number, got {H!r} "
                         f"-> use e.g. H = {H_DEFAULT} (Smith & Nichols 2009)")
    if dh is None and steps is not None:
        if (isinstance(steps, bool) or not isinstance(steps, (int, np.integer))
                or steps < 1):
            raise ValueError(f"TFCE steps must be a positive integer, got {steps!r} "
                             f"-> use e.g. steps = {STEPS_DEFAULT}")
    elif dh is not None and not _positive_number(dh):
        raise ValueError(f"TFCE height step dh must be a positive number, got {dh!r} "
                         f"-> give a positive step or leave dh unset to use steps")




def _csr(adjacency, n_sources):
    adj = check_adjacency(adjacency, n_sources)
    return adj.indptr.astype(np.int32), adj.indices.astype(np.int32)


def _step_args(steps, dh):
    """(steps, dh) for the compiled kernels: both 0 for the exact integral."""
    return (int(steps) if steps is not None else 0), (float(dh) if dh is not None else 0.0)


def tfce_batch(maps, adjacency, *, E=E_DEFAULT, H=H_DEFAULT, steps=None, dh=None,
               two_sided=True, scale=1.0, extremes=False, workspace=None):
    """TFCE of each map of ``maps`` (B, n_sources * n_times), one compiled pass each.

    ``scale = -1`` enhances ``-maps`` and returns the result negated
    (lower-tailed use).  With ``extremes`` only each map's largest positive
    and most negative value are returned, ``(pos, neg)``, without the maps.
    ``workspace``: scratch arrays from ``unionfind.tfce_workspace(F)`` reused
    across calls by one thread (default: allocated for this call).
    Releases the GIL: threads may run batches side by side.
    """
    check_parameters(E, H, steps, dh)
    maps = np.ascontiguousarray(maps)
    if maps.dtype not in (np.float32, np.float64):
        maps = maps.astype(np.float64)
    B, F = maps.shape
    n_sources = adjacency.shape[0]
    if n_sources == 0 or F % n_sources:
        raise ValueError(f"maps of {F} points are not sources x samples of the "
                         f"{n_sources}-source adjacency")
    ptr, idx = _csr(adjacency, n_sources)
    st, step = _step_args(steps, dh)
    ws = unionfind.tfce_workspace(F) if workspace is None else workspace
    args = (float(scale), bool(two_sided), ptr, idx, F // n_sources, float(E), float(H),
            st, step)
    if extremes:
        pos, neg = np.zeros(B), np.zeros(B)
        unionfind.tfce_extremes(maps, *args, pos, neg, ws)
        return pos, neg
    out = np.empty((B, F), np.float64)
    unionfind.tfce_maps(maps, *args, out, ws)
    return out


def tfce(stat, adjacency, *, E=E_DEFAULT, H=H_DEFAULT, steps=None, dh=None,
         two_sided=True):
    """TFCE-enhanced map of a (n_sources, n_times) statistic.

    Parameters
    ----------
    stat : (n_sources, n_times) array
    adjacency : (n_sources, n_sources) sparse source adjacency
    E, H : extent and height exponents (defaults 0.5 and 2)
    steps : stepped sum with ``dh = max|stat| / steps`` (None: exact integral)
    dh : fixed height step of the stepped sum (overrides ``steps``)
    two_sided : also enhance the negative part (returned negative)

    Returns
    -------
    (n_sources, n_times) float64 array, signed like ``stat``; exact integral
    unless ``steps`` or ``dh`` is given.
    """
    check_parameters(E, H, steps, dh)
    x = np.asarray(stat, dtype=np.float64)
    if x.ndim != 2:
        raise ValueError(f"stat must be (n_sources, n_times), got shape {x.shape}")
    finite = np.where(np.isfinite(x), x, 0.0)
    out = tfce_batch(finite.reshape(1, -1), adjacency, E=E, H=H, steps=steps, dh=dh,
                     two_sided=two_sided)
    return out.reshape(x.shape)
