"""Compiled union-find over the space x time graph: cluster labelling and TFCE.

The inner loops are compiled with numba (``nogil=True``, so threads run maps
in parallel; ``cache=True``, so a compiled function is written beside this
module and reused by the next process instead of being compiled again).

The graph
---------
Points are flat indices ``v = s * T + t`` over ``(n_sources, n_times)`` in C
order.  Two points are neighbours when they are the same sample at sources
joined by the source adjacency (CSR ``indptr`` / ``indices``, symmetric, no
self loops) or the same source at adjacent samples (Maris & Oostenveld 2007,
J Neurosci Methods 164:177-190) -- the graph of :mod:`.clusters`.

Labelling
---------
:func:`label_codes` joins neighbouring points that carry the same nonzero
code (+1 / -1: the two signs, never joined to each other) with a union-find
(union by size, path halving).  Its cost follows the number ``K`` of coded
points times their degree, plus one pass over the map to list them (every
later pass visits the listed points only): it does
not collapse at liberal thresholds the way a per-level or per-graph
construction does.  Components are numbered in order of their first point
(flat C order), the numbering ``scipy.sparse.csgraph.connected_components``
gives on the same graph.  :func:`cluster_extremes` fuses labelling and
scoring for the null distribution: per map, the largest positive and most
negative cluster score, sums taken in flat order (as ``numpy.bincount``);
:func:`listed_cluster_extremes` does the same from the supra-threshold lists
of :mod:`.exceedances`, without the maps.

TFCE in one pass (the component tree)
-------------------------------------
TFCE (Smith & Nichols 2009, NeuroImage 44:83-98) of a point ``v`` is
``integral_0^{x_v} e(h)^E h^H dh`` where ``e(h)`` is the size of ``v``'s
component in ``{x >= h}``.  Points are visited from the highest value down;
each visit creates a node of the *component tree* and every merge of two
components closes their nodes and opens a new one.  Between two consecutive
events a node's component is constant, so a node alive over heights
``(d, u]`` with ``n`` points contributes ``n^E (G(u) - G(d))`` to each of its
points, where ``G`` is the antiderivative of the height weight.  A point's
TFCE is the sum over the nodes from its leaf to the root, one top-down pass
over the nodes (parents are always created after their children).  Cost:
one sort of the supra-zero points plus near-linear merging.

* exact: ``G(h) = h^(H+1) / (H+1)`` -- the integral itself, heights at the
  data values, no discretisation.
* stepped: heights ``h_k = k dh`` and ``G(h) = sum_{k <= L(h)} h_k^H dh`` with
  ``L(h) = floor(h / dh)`` (a relative slack of 1e-9 for points sitting on a
  level): the right-endpoint sum ``sum_k e_k^E h_k^H dh`` over the levels a
  point reaches, the usual discretisation.  It differs from the exact value
  by ``O(dh)`` and converges to it as ``dh -> 0`` (``tests/test_scale_tfce.py``).

Two-sided maps: positive and negative points are visited in one pass in the
order of ``|x|`` and never joined across signs; the result carries the sign.
Memory layout, which sets the speed of the height-ordered pass (its reads
land at random places of the map): the pass works on time-major indices
(``t * n_sources + s``), so a point's spatial neighbours sit in the same time
slice; the union-find is indexed by point, so the parent of a neighbour is in
the cache line its visit check reads anyway; and the lines of the point
visited ``_AHEAD`` steps later are prefetched (:mod:`..engine.prefetch`), so those
reads overlap; a root keeps its open tree node in its parent slot.  Each step
gave identical values; together about 3x faster per map than a rank-indexed
pass on the source-major layout
(``tests/benchmarks/README.md``).  The null distribution only needs each map's
extremes, which :func:`tfce_extremes` reads from the nodes without writing the
map.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .exceedances import OVERFLOW
from ..engine.prefetch import prefetch

_JIT = dict(nogil=True, cache=True)
#: the TFCE pass's parent value of a point not (yet) visited
_NOT_YET = np.int32(2 ** 31 - 1)


@njit(**_JIT)
def _find(parent, x):
    """Root of ``x``; a root's slot holds a negative number (minus its size while
    joining), every other point's slot its parent (path halving)."""
    while True:
        p = parent[x]
        if p < 0:
            return x
        g = parent[p]
        if g < 0:
            return p
        parent[x] = g
        x = g


@njit(**_JIT)
def _union(parent, a, b):
    """Join the components of ``a`` and ``b``: union by size, the larger (or, on a
    tie, ``a``'s) root stays."""
    ra = _find(parent, a)
    rb = _find(parent, b)
    if ra == rb:
        return ra
    if parent[ra] > parent[rb]:                # -size: ra is the smaller one
        ra, rb = rb, ra
    parent[ra] += parent[rb]
    parent[rb] = ra
    return ra


@njit(**_JIT)
def _join_forward(code, idx, K, up_ptr, up_idx, T, parent):
    """Union every coded point with its forward neighbours of the same code.

    ``idx[:K]``: the coded points in ascending flat order (the only points
    visited, so the cost follows K, not the map size), each a root of size
    one (``parent = -1``); ``up_ptr`` / ``up_idx``: the upper triangle (u > s)
    of the source adjacency, so each spatial edge is seen once; in time the
    next sample.
    """
    for i in range(K):
        v = idx[i]
        c = code[v]
        s = v // T
        t = v - s * T
        if t + 1 < T and code[v + 1] == c:
            _union(parent, v, v + 1)
        for j in range(up_ptr[s], up_ptr[s + 1]):
            u = np.int64(up_idx[j]) * T + t
            if code[u] == c:
                _union(parent, v, u)


#: a root's slot before it is numbered (below every ``-1 - number``)
_UNNUMBERED = np.int32(-2 ** 31)


@njit(**_JIT)
def _unnumber_roots(parent, idx, K):
    """Mark the roots among ``idx[:K]`` as not yet numbered (``_UNNUMBERED``)."""
    for i in range(K):
        v = idx[i]
        if parent[v] < 0:
            parent[v] = _UNNUMBERED


@njit(**_JIT)
def _number_components(parent, idx, K):
    """Number the components of ``idx[:K]`` 0..n-1 in order of their first point
    (``idx`` ascending): each root's slot becomes ``-1 - number``.  Returns n."""
    _unnumber_roots(parent, idx, K)
    n = 0
    for i in range(K):
        r = _find(parent, idx[i])
        if parent[r] == _UNNUMBERED:
            parent[r] = -1 - n
            n += 1
    return n


@njit(**_JIT)
def label_codes(code, up_ptr, up_idx, T):
    """Components of the coded points: (idx, comp, n).

    ``code`` (F,) int8, 0 = not in a cluster; ``idx`` the flat indices of the
    coded points (ascending), ``comp`` their component numbers 0..n-1 in
    order of first appearance.
    """
    F = code.size
    parent = np.empty(F, np.int32)      # int32: maps below 2^31 points, half the memory
    listed = np.empty(F, np.int32)
    K = 0
    for v in range(F):
        if code[v] != 0:
            parent[v] = -1
            listed[K] = v
            K += 1
    _join_forward(code, listed, K, up_ptr, up_idx, T, parent)
    n = _number_components(parent, listed, K)
    idx = listed[:K].astype(np.int64)
    comp = np.empty(K, np.int64)
    for i in range(K):
        comp[i] = -1 - parent[_find(parent, idx[i])]
    return idx, comp, n


#: bytes per point of :func:`cluster_workspace` (int8 code, int32 parent and list)
#: plus, at most, the float64 sum of one component per point (allocated per map,
#: one entry per coded point, touched once per component)
CLUSTER_SCRATCH_BYTES = 1 + 4 + 4 + 8


def cluster_workspace(F):
    """Scratch arrays for :func:`cluster_extremes` on maps of ``F`` points, reused
    across calls by one thread (``code`` must start all zero; the function leaves it so)."""
    return (np.zeros(F, np.int8), np.empty(F, np.int32), np.empty(F, np.int32))


@njit(**_JIT)
def _component_extremes(code, parent, idx, K, x, by_point, by_mass, up_ptr, up_idx, T):
    """Join the coded points ``idx[:K]`` (ascending, each a root of size one), sum
    each component's scores and clear their codes; returns (largest, most negative).

    Components are numbered in order of their first point (as
    :func:`_number_components`) in the same pass that sums their scores in flat
    order, as ``numpy.bincount`` would, into one array allocated per call whose
    first entries hold one sum per component.  Mass adds ``x[v]`` (``by_point``)
    or ``x[i]`` (values listed beside ``idx``); extent adds the code.
    """
    _join_forward(code, idx, K, up_ptr, up_idx, T, parent)
    _unnumber_roots(parent, idx, K)
    acc = np.empty(K)
    n = 0
    for i in range(K):
        v = idx[i]
        r = _find(parent, v)
        if parent[r] == _UNNUMBERED:
            parent[r] = -1 - n
            acc[n] = 0.0
            n += 1
        k = -1 - parent[r]
        if by_mass:
            acc[k] += x[v] if by_point else x[i]
        else:
            acc[k] += code[v]
    hi = 0.0
    lo = 0.0
    for k in range(n):
        if acc[k] > hi:
            hi = acc[k]
        if acc[k] < lo:
            lo = acc[k]
    for i in range(K):                   # clear this map's points only
        code[idx[i]] = 0
    return hi, lo


@njit(**_JIT)
def cluster_extremes(maps, threshold, want_pos, want_neg, by_mass, up_ptr, up_idx, T,
                     pos, neg, ws):
    """Per map: largest positive and most negative cluster score (mass or signed extent).

    ``maps`` (B, F); clusters are ``x > threshold`` (when ``want_pos``) and
    ``x < -threshold`` (when ``want_neg``).  ``pos`` / ``neg`` (B,) receive
    the extremes (0 when there is no cluster of that sign).  ``ws``:
    :func:`cluster_workspace` (int32 indices: maps below 2^31 points).
    """
    B, F = maps.shape
    code, parent, idx = ws
    for b in range(B):
        x = maps[b]
        K = 0
        for v in range(F):
            xv = x[v]
            c = 0
            if want_pos and xv > threshold:
                c = 1
            elif want_neg and xv < -threshold:
                c = -1
            if c != 0:
                code[v] = c
                parent[v] = -1
                idx[K] = v
                K += 1
        pos[b], neg[b] = _component_extremes(code, parent, idx, K, x, True, by_mass,
                                             up_ptr, up_idx, T)


@njit(**_JIT)
def listed_cluster_extremes(idx, val, count, bases, u, v, threshold, want_pos, by_mass,
                            up_ptr, up_idx, T, pos, neg, ws):
    """:func:`cluster_extremes` of the resamples ``u..v-1`` of a batch given by their
    supra-threshold lists (:class:`.exceedances.Exceedances`: ``idx`` / ``val``
    rows, ``count`` per part, region ``bases``), into ``pos[:v-u]`` / ``neg``.

    A row's regions are first moved together (in place, in order), so its points
    are in flat order, as the map-based listing gives them; the same sums follow.
    A resample whose list overflowed gets NaN (to be scored from its map).
    ``ws``: :func:`cluster_workspace` (its list array is not used).
    """
    code, parent, _ = ws
    J = count.shape[0]
    for b in range(u, v):
        full = False
        for j in range(J):
            if count[j, b] == OVERFLOW:
                full = True
        if full:
            pos[b - u] = np.nan
            neg[b - u] = np.nan
            continue
        row, x = idx[b], val[b]
        K = 0
        for j in range(J):
            s = bases[j]
            for k in range(count[j, b]):
                p = row[s + k]
                row[K] = p
                x[K] = x[s + k]
                # the map-based listing's code: +1 for x > threshold when positive
                # clusters are wanted, else -1
                code[p] = 1 if (want_pos and x[K] > threshold) else -1
                parent[p] = -1
                K += 1
        pos[b - u], neg[b - u] = _component_extremes(code, parent, row, K, x, False,
                                                     by_mass, up_ptr, up_idx, T)


# ----------------------------------------------------------------------------
# TFCE
# ----------------------------------------------------------------------------

@njit(**_JIT)
def _height_weight(h, H, step, prefix):
    """G(h): the antiderivative (exact) or the level sum (stepped) of h^H."""
    if step <= 0.0:
        if H == 2.0:
            return h * h * h / 3.0
        return h ** (H + 1.0) / (H + 1.0)
    L = np.int64(np.floor(h / step + 1e-9))
    if L < 1:
        return 0.0
    if L >= prefix.size:
        L = prefix.size - 1
    return prefix[L]


@njit(**_JIT)
def _extent_weight(n, E):
    if E == 0.5:
        return np.sqrt(n)
    return n ** E


@njit(**_JIT)
def _sort_down(keys, pts, tmp_keys, tmp_pts):
    """Sort ``keys`` with their ``pts`` from the largest key down; return both.

    ``keys``: the IEEE bit patterns of floats as unsigned integers of the floats'
    width: non-negative floats keep their order, and a negative float (sign bit
    set) comes above every non-negative one, ordered by its magnitude.  LSD radix sort
    on (key, point) pairs, one pass per byte (a pass is skipped when every key
    has the same byte), so each pass reads sequentially; ties come out in
    reverse position order.  ``tmp_keys`` / ``tmp_pts`` (same sizes) are
    scratch; the result is in whichever pair the last pass wrote, ascending,
    and is read from the end.
    """
    K = keys.size
    count = np.empty(257, np.int64)
    sk, sp, dk, dp = keys, pts, tmp_keys, tmp_pts
    for shift in range(0, 8 * keys.itemsize, 8):
        sh = np.uint64(shift)
        count[:] = 0
        for i in range(K):
            count[((np.uint64(sk[i]) >> sh) & np.uint64(0xFF)) + 1] += 1
        if count[((np.uint64(sk[0]) >> sh) & np.uint64(0xFF)) + 1] == K:
            continue                  # one byte value for every key: nothing to move
        for j in range(256):
            count[j + 1] += count[j]
        for i in range(K):
            d = (np.uint64(sk[i]) >> sh) & np.uint64(0xFF)
            c = count[d]
            dk[c] = sk[i]
            dp[c] = sp[i]
            count[d] = c + 1
        sk, sp, dk, dp = dk, dp, sk, sp
    return sk, sp


@njit(**_JIT)
def _drop_below(heights, pts, K, step):
    """Keep the listed points (``pts[:K]``, ``|heights[:K]|``) at or above ``step``,
    in order; the others are not visited.  Returns how many are kept."""
    kept = 0
    for i in range(K):
        if abs(heights[i]) >= step:
            pts[kept] = pts[i]
            heights[kept] = heights[i]
            kept += 1
    return kept


@njit(**_JIT)
def _by_rank(heights, pts, P, A):
    """From :func:`_sort_down`'s ascending result: ``P[i]`` the point of rank ``i``
    (highest first) and ``A[i]`` its height ``|key|`` as float64; returns how many
    keys are negative (they come first)."""
    K = heights.size
    n_neg = 0
    for i in range(K):
        P[i] = pts[K - 1 - i]
        h = heights[K - 1 - i]
        if h < 0:
            n_neg += 1
            h = -h
        A[i] = h
    return n_neg


#: how many points ahead of the visit the TFCE pass prefetches (cache lines in flight)
_AHEAD = 16


#: bytes per point of :func:`tfce_workspace`
TFCE_SCRATCH_BYTES = 8 + 4 + 6 * 8 + 4 + 8 + 4 + 4


def tfce_workspace(F):
    """Scratch arrays for :func:`_tfce_tree` on maps of ``F`` points, reused across
    maps: no allocation per map (large allocations and their page faults serialise
    threads)."""
    return (np.empty(F, np.float64), np.empty(F, np.int32), np.empty(6 * F, np.float64),
            np.empty(F, np.int32), np.empty(F, np.float64), np.empty(F, np.int32),
            np.empty(F, np.int32))


@njit(**_JIT)
def _find_root(par, x):
    """Root of ``x``: a point whose ``par`` is itself (no node yet) or negative
    (``-1 - node``); path halving on the way."""
    while True:
        p = par[x]
        if p < 0 or p == x:
            return x
        gp = par[p]
        if gp < 0 or gp == p:
            return p
        par[x] = gp
        x = gp


@njit(**_JIT)
def _open_node(nodes, nn, g, n):
    """Open node ``nn`` at height weight ``g`` for a component of ``n`` points."""
    nodes[3 * nn] = g                          # G at the height where it opened
    nodes[3 * nn + 1] = n                      # the size until it closes, then its contribution
    nodes[3 * nn + 2] = -1.0                   # its parent node (none yet)


@njit(**_JIT)
def _close_node(nodes, nd, g, parent, E):
    """Close node ``nd`` at height weight ``g``: ``n^E (G_open - g)``, under ``parent``."""
    nodes[3 * nd + 1] = _extent_weight(nodes[3 * nd + 1], E) * (nodes[3 * nd] - g)
    nodes[3 * nd + 2] = parent


@njit(**_JIT)
def _list_points(x, scale, two_sided, T, par, leaf, vals, k32, narrow):
    """The listing pass of :func:`_tfce_tree`: in time-major order ``w = t * S + s``,
    reset ``par[w]`` and list the points of either sign (one sign unless
    ``two_sided``) in ``leaf`` with their sort keys (``-|x|`` for positive points,
    which sort first) in ``k32`` (``narrow``: float32 keys) or ``vals``; return the
    number listed and the largest height."""
    F = x.size
    S = F // T
    top = 0.0
    K = 0
    for t in range(T):
        for s in range(S):
            w = t * S + s
            par[w] = _NOT_YET
            xv = scale * x[s * T + t]
            g = 0
            if xv > 0.0:
                g = 1
            elif two_sided and xv < 0.0:
                g = -1
                xv = -xv
            if g != 0:
                leaf[K] = w
                kv = -xv if g > 0 else xv         # positive points sort first
                if narrow:
                    k32[K] = kv
                else:
                    vals[K] = kv
                K += 1
                if xv > top:
                    top = xv
    return K, top


@njit(**_JIT)
def _tfce_tree(x, scale, two_sided, adj_ptr, adj_idx, T, E, H, steps, dh, ws):
    """Build the component tree of one map ``x`` (F,); return (K, nn, n_pos).

    After the call, with ``a, par, nodes, leaf, vals, scratch, P = ws``:
    ``P[:K]`` are the visited points (time-major indices ``t * S + s``), the
    ``n_pos`` positive ones first, each sign from the highest down, ``leaf[:K]`` the node
    each opened, and ``nodes[3 nd + 1]`` (nd < nn) each node's TFCE, accumulated
    from the root down.  ``scale`` multiplies the map first (-1 for lower-tailed
    use); ``steps`` / ``dh``: exact integral when both are <= 0, else the stepped
    sum with the fixed step ``dh`` or ``max|x| / steps``.

    The positive points are visited first (from the highest down), then, with
    ``par`` reset, the negative ones: components never join points of opposite
    signs, so a neighbour already visited in the same pass has the point's sign
    and the visit check reads ``par`` alone (each pass also touches half the
    map).  Their keys carry the sign for that (:func:`_sort_down`): one sort puts
    the positive points first, each sign in the order of the single descending
    pass over ``|x|``, which gives the same tree and the same values.

    The union-find is indexed by point, not by rank: ``par`` (parent point, or
    ``_NOT_YET``) of a neighbour lies in the cache line its visit check reads.  A
    root holds ``-1 - node`` of its open node, which keeps the component's size
    until it closes (a point alone, with no node yet, is its own parent), so the
    root's one line gives both.  The lines of the point ``_AHEAD`` visits later
    and of its neighbours are prefetched (:mod:`..engine.prefetch`).
    """
    a, par, nodes, leaf, vals, scratch, P = ws
    F = x.size
    S = F // T
    # a float32 map (scale +-1) has float32 heights: sorted on 32-bit keys, half
    # the passes, in the same order (float32 -> float64 keeps it)
    narrow = x.itemsize == 4 and abs(scale) == 1.0
    k32 = vals.view(np.float32)
    # time-major indices w = t * S + s: the neighbours of a point in space are near
    # it in memory (one time slice); x stays source-major.  One pass in w order
    # lists the visited points (``leaf``) with their heights (``vals``).
    K, top = _list_points(x, scale, two_sided, T, par, leaf, vals, k32, narrow)
    if K == 0:
        return 0, 0, 0
    step = 0.0
    if dh > 0.0:
        step = dh
    elif steps > 0:
        step = top / steps
    prefix = np.zeros(1, np.float64)
    if step > 0.0:
        n_lev = np.int64(np.floor(top / step + 1e-9)) + 2
        prefix = np.zeros(n_lev, np.float64)
        for k in range(1, n_lev):
            hk = k * step
            prefix[k] = prefix[k - 1] + hk ** H * step
        # below the first level: no contribution
        K = _drop_below(k32, leaf, K, step) if narrow else _drop_below(vals, leaf, K, step)
        if K == 0:
            return 0, 0, 0
    # descending height: P[i] the point of rank i, A[i] its height (float64, in
    # whichever of ``a`` / ``vals`` the sort did not leave its keys)
    if narrow:
        sk, sp = _sort_down(k32[:K].view(np.uint32), leaf[:K],
                            a.view(np.uint32)[:K], scratch[:K])
        A = vals if sk.ctypes.data == a.ctypes.data else a
        n_pos = _by_rank(sk.view(np.float32), sp, P, A)
    else:
        sk, sp = _sort_down(vals[:K].view(np.uint64), leaf[:K],
                            a.view(np.uint64)[:K], scratch[:K])
        A = vals if sk.ctypes.data == a.ctypes.data else a
        n_pos = _by_rank(sk.view(np.float64), sp, P, A)
    nn = 0
    for i in range(K):
        if i == n_pos and i > 0:      # the negative points: a fresh union-find
            par[:] = _NOT_YET
        if i + _AHEAD < K:
            q = np.int64(P[i + _AHEAD])
            tq = q // S
            sq = q - tq * S
            prefetch(par, q)
            if tq > 0:
                prefetch(par, q - S)
            if tq + 1 < T:
                prefetch(par, q + S)
            if adj_ptr[sq + 1] > adj_ptr[sq]:   # the farthest spatial neighbours
                prefetch(par, tq * S + np.int64(adj_idx[adj_ptr[sq]]))
                prefetch(par, tq * S + np.int64(adj_idx[adj_ptr[sq + 1] - 1]))
        v = np.int64(P[i])
        g = _height_weight(A[i], H, step, prefix)
        par[v] = v                    # a single point: its own root, no node until needed
        ri = v                        # the root of v's component
        t = v // S
        s = v - t * S
        j0 = adj_ptr[s]
        deg = adj_ptr[s + 1] - j0
        for d in range(-1, deg + 1):
            if d == -1:
                if t == 0:
                    continue
                u = v - S
            elif d == deg:
                if t + 1 >= T:
                    continue
                u = v + S
            else:
                u = t * S + np.int64(adj_idx[j0 + d])
            if par[u] == _NOT_YET:       # not yet visited in this sign's pass
                continue
            rj = np.int64(_find_root(par, u))
            if rj == ri:
                continue
            # sizes (kept in the open nodes), then close the nodes of both components
            # at this height (a node opened at this same height has length zero); the
            # merged component opens here
            pi = np.int64(par[ri])
            pj = np.int64(par[rj])
            ni = 1.0 if pi >= 0 else nodes[3 * (-1 - pi) + 1]
            nj = 1.0 if pj >= 0 else nodes[3 * (-1 - pj) + 1]
            if pj < 0:
                _close_node(nodes, -1 - pj, g, nn, E)
            if pi < 0:
                _close_node(nodes, -1 - pi, g, nn, E)
            if ni < nj:                   # union by size
                ri, rj = rj, ri
            par[rj] = ri
            par[ri] = -1 - nn
            _open_node(nodes, nn, g, ni + nj)
            nn += 1
        if par[ri] >= 0:              # no neighbour yet: a node of its own
            par[ri] = -1 - nn
            _open_node(nodes, nn, g, 1.0)
            nn += 1
        leaf[i] = -1 - par[ri]
    for nd in range(nn):              # nodes still open at height 0: the roots
        if nodes[3 * nd + 2] < 0.0:
            _close_node(nodes, nd, 0.0, -1.0, E)
    for nd in range(nn - 1, -1, -1):  # top-down: a parent is always created after its children
        up = nodes[3 * nd + 2]
        if up >= 0.0:
            nodes[3 * nd + 1] += nodes[3 * np.int64(up) + 1]
    return K, nn, n_pos


@njit(**_JIT)
def _tfce_into(x, scale, two_sided, adj_ptr, adj_idx, T, E, H, steps, dh, out, ws):
    """TFCE of one map ``x`` (F,) into ``out`` (F,) float64 (see :func:`_tfce_tree`)."""
    K, nn, n_pos = _tfce_tree(x, scale, two_sided, adj_ptr, adj_idx, T, E, H, steps, dh, ws)
    _, _, nodes, leaf, _, _, P = ws
    out[:] = 0.0
    S = x.size // T
    for i in range(K):
        v = np.int64(P[i])
        t = v // S
        sg = 1.0 if i < n_pos else -1.0
        out[(v - t * S) * T + t] = sg * nodes[3 * np.int64(leaf[i]) + 1] * scale


@njit(**_JIT)
def tfce_maps(maps, scale, two_sided, adj_ptr, adj_idx, T, E, H, steps, dh, out, ws):
    """TFCE of every map of ``maps`` (B, F) into ``out`` (B, F) float64."""
    for b in range(maps.shape[0]):
        _tfce_into(maps[b], scale, two_sided, adj_ptr, adj_idx, T, E, H, steps, dh, out[b], ws)


@njit(**_JIT)
def tfce_extremes(maps, scale, two_sided, adj_ptr, adj_idx, T, E, H, steps, dh, pos, neg,
                  ws):
    """Per map: the largest positive and most negative TFCE value (0 when none).

    Read from the nodes the points opened, without writing the map.
    """
    B = maps.shape[0]
    _, _, nodes, leaf, _, _, _ = ws
    for b in range(B):
        K, nn, n_pos = _tfce_tree(maps[b], scale, two_sided, adj_ptr, adj_idx, T, E, H, steps,
                                  dh, ws)
        hi = 0.0
        lo = 0.0
        for i in range(K):
            sg = 1.0 if i < n_pos else -1.0
            val = sg * nodes[3 * np.int64(leaf[i]) + 1] * scale
            if val > hi:
                hi = val
            if val < lo:
                lo = val
        pos[b] = hi
        neg[b] = lo
