"""Threshold-free cluster enhancement over space x time.

TFCE (Smith & Nichols 2009, NeuroImage 44:83-98) replaces each point's
statistic by the integral, over heights ``h`` from 0 to its value, of
``e(h)^E h^H dh``, where ``e(h)`` is the extent of the cluster containing the
point when the map is thresholded at ``h``.  The integral is the usual
discrete sum over heights ``h_k = k dh`` (k = 1, 2, ...) with the point
counted at ``h_k`` when ``stat >= h_k``:

    tfce(v) = sum_k  e_k(v)^E  h_k^H  dh.

Step: by default ``dh = max|stat| / steps`` with ``steps = 100`` computed on
each map separately (observed and each resample), so every map is integrated
with the same number of steps; a fixed ``dh`` may be given instead.  Defaults
E = 0.5, H = 2 are the values recommended for 3D data by Smith & Nichols.

Neighbourhood: the space x time graph of :mod:`groupsrc.stats.clusters`.
Two-sided maps are enhanced by applying the transform to the positive part
and to the negated negative part; the result carries the statistic's sign.

All heights are handled in one labelling: point ``v`` with ``L(v)`` levels
becomes ``L(v)`` nodes, one per height, and neighbours are joined at every
height both reach; a single connected-components call labels all levels.

Examples
--------
>>> import numpy as np
>>> from scipy import sparse
>>> adj = sparse.csr_matrix((1, 1))
>>> x = np.full((1, 4), 2.0)           # one flat cluster, height 2, extent 4
>>> round(float(tfce(x, adj, dh=0.5)[0, 0]), 4)  # sum_k 4^0.5 (0.5k)^2 0.5
7.5
"""

from __future__ import annotations

import math

import numpy as np
from scipy import sparse
from scipy.sparse.csgraph import connected_components

from .clusters import _neighbour_pairs

E_DEFAULT = 0.5
H_DEFAULT = 2.0
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
    E = 0.5, H = 2); ``steps`` a positive integer when ``dh`` is None;
    ``dh`` finite and positive when given.
    """
    if not _positive_number(E):
        raise ValueError(f"TFCE extent exponent E must be a positive number, got {E!r} "
                         f"-> use e.g. E = {E_DEFAULT} (Smith & Nichols 2009)")
    if not _positive_number(H):
        raise ValueError(f"TFCE height exponent H must be a positive number, got {H!r} "
                         f"-> use e.g. H = {H_DEFAULT} (Smith & Nichols 2009)")
    if dh is None:
        if (isinstance(steps, bool) or not isinstance(steps, (int, np.integer))
                or steps < 1):
            raise ValueError(f"TFCE steps must be a positive integer, got {steps!r} "
                             f"-> use e.g. steps = {STEPS_DEFAULT}")
    elif not _positive_number(dh):
        raise ValueError(f"TFCE height step dh must be a positive number, got {dh!r} "
                         f"-> give a positive step or leave dh unset to use steps")




def _tfce_positive(x, adjacency, E, H, dh):
    """TFCE of the positive part of ``x`` (n_sources, n_times).

    ``dh`` is the height step: a scalar, or one value per point (flat C
    order) when several maps with their own steps are stacked along the
    source axis with a block-diagonal adjacency.
    """
    flat = x.reshape(-1)
    out = np.zeros(flat.size, np.float64)
    dh_arr = np.broadcast_to(np.asarray(dh, np.float64), flat.shape)
    supra = (flat >= dh_arr) & (flat > 0)
    idx = np.flatnonzero(supra)
    if idx.size == 0:
        return out.reshape(x.shape)
    step = dh_arr[idx]
    # number of heights h_k = k dh reached by each point (tiny slack for
    # points sitting exactly on a level)
    L = np.floor(flat[idx].astype(np.float64) / step + 1e-9).astype(np.int64)
    L = np.maximum(L, 1)
    a, b = _neighbour_pairs(idx, x.shape, adjacency, supra)
    base = np.cumsum(L) - L                       # first node id of each point
    n_nodes = int(L.sum())
    m = np.minimum(L[a], L[b])                    # levels shared by each pair
    tot = int(m.sum())
    lev = np.arange(tot) - np.repeat(np.cumsum(m) - m, m)   # 0..m-1 per pair
    ea = np.repeat(base[a], m) + lev
    eb = np.repeat(base[b], m) + lev
    g = sparse.coo_matrix((np.ones(tot, np.int8), (ea, eb)), shape=(n_nodes, n_nodes)).tocsr()
    _, comp = connected_components(g, directed=False)
    size = np.bincount(comp).astype(np.float64)
    node_level = np.arange(n_nodes) - np.repeat(base, L) + 1          # k = 1..L
    node_step = np.repeat(step, L)
    contrib = size[comp] ** E * (node_level * node_step) ** H * node_step
    owner = np.repeat(np.arange(idx.size), L)
    out[idx] = np.bincount(owner, weights=contrib, minlength=idx.size)
    return out.reshape(x.shape)


def tfce_stack(maps, adjacency_stack, *, E=E_DEFAULT, H=H_DEFAULT, steps=STEPS_DEFAULT,
               dh=None, two_sided=True):
    """TFCE of several maps at once: ``maps`` (g, n_sources, n_times).

    ``adjacency_stack`` is the block-diagonal source adjacency of ``g`` (one
    sided) or ``2 g`` (two-sided: positive parts first, then negated
    negative parts) copies of the grid's adjacency.  Returns (g, n_sources,
    n_times), identical in definition to calling :func:`tfce` per map; one
    labelling serves all maps, which matters for small grids.
    """
    check_parameters(E, H, steps, dh)
    x = np.asarray(maps, dtype=np.float64)
    g, S, T = x.shape
    x = np.where(np.isfinite(x), x, 0.0)
    if two_sided:
        top = np.abs(x).reshape(g, -1).max(axis=1)
        parts = np.concatenate([np.maximum(x, 0.0), np.maximum(-x, 0.0)])
        top = np.concatenate([top, top])
    else:
        top = np.maximum(x.reshape(g, -1).max(axis=1), 0.0)
        parts = np.maximum(x, 0.0)
    if dh is not None:
        step = np.full(top.shape, float(dh))
    else:
        step = np.where(top > 0, top / int(steps), np.inf)
    dh_pts = np.repeat(step, S * T)
    out = _tfce_positive(parts.reshape(-1, T), adjacency_stack, E, H, dh_pts)
    out = out.reshape(-1, S, T)
    return out[:g] - out[g:] if two_sided else out


def tfce(stat, adjacency, *, E=E_DEFAULT, H=H_DEFAULT, steps=STEPS_DEFAULT, dh=None,
         two_sided=True):
    """TFCE-enhanced map of a (n_sources, n_times) statistic.

    Parameters
    ----------
    stat : (n_sources, n_times) array
    adjacency : (n_sources, n_sources) sparse source adjacency
    E, H : extent and height exponents (defaults 0.5 and 2)
    steps : number of height steps when ``dh`` is None:
        ``dh = max|stat| / steps``
    dh : fixed height step (overrides ``steps``)
    two_sided : also enhance the negative part (returned negative)

    Returns
    -------
    (n_sources, n_times) float64 array, signed like ``stat``.
    """
    check_parameters(E, H, steps, dh)
    x = np.asarray(stat, dtype=np.float64)
    if x.ndim != 2:
        raise ValueError(f"stat must be (n_sources, n_times), got shape {x.shape}")
    finite = np.where(np.isfinite(x), x, 0.0)
    top = float(np.abs(finite).max()) if two_sided else float(max(finite.max(), 0.0))
    if top == 0.0:
        return np.zeros_like(x)
    step = float(dh) if dh is not None else top / int(steps)
    out = _tfce_positive(np.maximum(finite, 0.0), adjacency, E, H, step)
    if two_sided:
        out -= _tfce_positive(np.maximum(-finite, 0.0), adjacency, E, H, step)
    return out
