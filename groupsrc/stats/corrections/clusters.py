"""Connected components over space x time.

Features are laid out as ``(n_sources, n_times)``.  Two points are neighbours
when they are the same sample at neighbouring sources (the grid's sparse,
symmetric source adjacency without self loops) or the same source at
adjacent samples -- the space-time neighbourhood used for cluster inference
on event-related responses (Maris & Oostenveld 2007, J Neurosci Methods
164:177-190).

The work follows the number ``K`` of supra-threshold points, not the grid:
a compiled union-find (:mod:`.unionfind`) joins each supra-threshold point
with its supra-threshold neighbours, so liberal thresholds cost in
proportion to the points they pass.  The labelling equals
``scipy.sparse.csgraph.connected_components`` on the same graph
(``tests/test_scale_labelling.py``).

Examples
--------
>>> import numpy as np
>>> from scipy import sparse
>>> adj = sparse.csr_matrix(np.array([[0, 1, 0], [1, 0, 0], [0, 0, 0]], bool))
>>> supra = np.array([[1, 0], [1, 1], [0, 1]], bool)
>>> lab, n = label_clusters(supra, adj)
>>> n, lab.tolist()
(2, [[1, 0], [1, 1], [0, 2]])
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import sparse

from . import unionfind


def check_adjacency(adjacency, n_sources):
    """Return the source adjacency as CSR (int32 indices), validated."""
    if not sparse.issparse(adjacency):
        adjacency = sparse.csr_matrix(np.asarray(adjacency))
    adjacency = sparse.csr_matrix(adjacency)
    if adjacency.shape != (n_sources, n_sources):
        raise ValueError(f"adjacency must be ({n_sources}, {n_sources}) "
                         f"for {n_sources} sources, got {adjacency.shape}")
    adjacency.eliminate_zeros()
    adjacency.sort_indices()
    if adjacency.diagonal().any():
        adjacency = adjacency.tolil()
        adjacency.setdiag(0)
        adjacency = sparse.csr_matrix(adjacency)
        adjacency.eliminate_zeros()
    return adjacency


_UPPER_CACHE: dict = {}


def _upper(adjacency):
    """Upper triangle (u < v) of a symmetric adjacency, cached per matrix."""
    hit = _UPPER_CACHE.get(id(adjacency))
    if hit is not None and hit[0] is adjacency:
        return hit[1]
    up = sparse.csr_matrix(sparse.triu(adjacency, k=1))
    up.sort_indices()
    if len(_UPPER_CACHE) > 16:
        _UPPER_CACHE.clear()
    _UPPER_CACHE[id(adjacency)] = (adjacency, up)
    return up


def _up_csr(adjacency):
    """int32 CSR arrays of the upper triangle, for the compiled union-find."""
    up = _upper(adjacency)
    return up.indptr.astype(np.int32, copy=False), up.indices.astype(np.int32, copy=False)


def label_codes(code, adjacency, n_times):
    """Components of the points with equal nonzero ``code`` (flat int8, C order).

    Returns ``idx`` (flat indices of the coded points, ascending), ``comp``
    (component numbers 0..n-1 by first appearance) and ``n``; compiled
    union-find (:mod:`.unionfind`), cost following the coded points.
    """
    ptr, ind = _up_csr(adjacency)
    return unionfind.label_codes(np.ascontiguousarray(code, np.int8), ptr, ind, int(n_times))


def components(supra, adjacency):
    """Component label (0..n-1) of each supra-threshold point.

    Returns ``idx`` (flat indices of the supra points, sorted), ``comp``
    (their component numbers) and the number of components.
    """
    supra = np.asarray(supra, dtype=bool)
    idx, comp, n = label_codes(supra.reshape(-1).view(np.int8), adjacency, supra.shape[1])
    return idx, comp, int(n)


def label_clusters(supra, adjacency):
    """Label supra-threshold points of a (n_sources, n_times) boolean map.

    Returns ``(labels, n)``: int32 labels 1..n (0 outside clusters), numbered
    in order of each cluster's first point (flat C order).
    """
    supra = np.asarray(supra, dtype=bool)
    idx, comp, n = components(supra, adjacency)
    labels = np.zeros(supra.size, np.int32)
    if n:
        # renumber by first appearance (idx is sorted)
        first = np.full(n, idx.size, np.int64)
        np.minimum.at(first, comp, np.arange(idx.size))
        rank = np.empty(n, np.int64)
        rank[np.argsort(first, kind="stable")] = np.arange(n)
        labels[idx] = rank[comp] + 1
    return labels.reshape(supra.shape), n


@dataclass
class ClusterScores:
    """Observed clusters of one sign.

    ``idx`` / ``comp`` give the flat point indices and their cluster number
    (0..n-1); ``mass`` and ``extent`` are per cluster.
    """

    sign: int
    idx: np.ndarray
    comp: np.ndarray
    mass: np.ndarray
    extent: np.ndarray


def cluster_scores(stat, threshold, adjacency, sign=1):
    """Clusters of ``sign * stat > threshold`` with their mass and extent.

    ``mass`` is the sum of the (signed) statistic over the cluster, so it is
    negative for negative clusters; ``extent`` is the number of points.

    Examples
    --------
    >>> import numpy as np
    >>> from scipy import sparse
    >>> adj = sparse.csr_matrix((2, 2))
    >>> c = cluster_scores(np.array([[3.0, 2.5, 0.1], [-4.0, 0.0, 0.0]]), 2.0, adj)
    >>> c.mass.tolist(), c.extent.tolist()
    ([5.5], [2])
    """
    stat = np.asarray(stat)
    supra = (stat > threshold) if sign > 0 else (stat < -threshold)
    idx, comp, n = components(supra, adjacency)
    vals = stat.reshape(-1)[idx].astype(np.float64)
    mass = np.bincount(comp, weights=vals, minlength=n)
    extent = np.bincount(comp, minlength=n)
    return ClusterScores(int(np.sign(sign)), idx, comp, mass, extent)


@dataclass
class SignedClusters:
    """Clusters of both signs labelled in one pass: per-cluster sign, mass, extent."""

    idx: np.ndarray
    comp: np.ndarray
    sign: np.ndarray
    mass: np.ndarray
    extent: np.ndarray


def signed_cluster_scores(stat, threshold, adjacency, signs=(1, -1)):
    """Clusters of ``stat > threshold`` and ``stat < -threshold`` in one labelling.

    Points of opposite sign are never joined.  Equivalent to calling
    :func:`cluster_scores` once per sign, with a single graph.
    """
    stat = np.asarray(stat)
    shape = stat.shape
    flat = stat.reshape(-1)
    if 1 in signs and -1 in signs:
        code = (flat > threshold).view(np.int8) - (flat < -threshold).view(np.int8)
    elif 1 in signs:
        code = (flat > threshold).view(np.int8)
    else:
        code = -(flat < -threshold).view(np.int8)
    idx, comp, n = label_codes(code, adjacency, shape[1])
    if n == 0:
        z = np.zeros(0)
        return SignedClusters(idx, z.astype(np.int64), z.astype(np.int8), z, z.astype(np.int64))
    vals = flat[idx].astype(np.float64)
    mass = np.bincount(comp, weights=vals, minlength=n)
    extent = np.bincount(comp, minlength=n)
    sign = np.zeros(n, np.int8)
    sign[comp] = code[idx]
    return SignedClusters(idx, comp, sign, mass, extent)


def max_cluster_score(stat, threshold, adjacency, sign=1, score="mass"):
    """Largest |score| among the clusters of one sign (0.0 when none)."""
    c = cluster_scores(stat, threshold, adjacency, sign)
    if c.mass.size == 0:
        return 0.0
    vals = np.abs(c.mass) if score == "mass" else c.extent.astype(float)
    return float(vals.max())


# ----------------------------------------------------------------------------
# cluster tables
# ----------------------------------------------------------------------------

#: columns of the cluster table a correction returns
CLUSTER_COLUMNS = ["cluster", "sign", "mass", "extent", "n_sources", "n_samples",
                   "p_corrected"]


def cluster_table(parts, shape):
    """Cluster table and label map from per-sign components (vectorised).

    ``parts``: list of (sign, flat idx, comp, n, mass, extent, p).  Rows are
    sorted by p, then |mass| descending; labels 1..K follow the rows.
    """
    S, T = shape
    labels = np.zeros(S * T, np.int32)
    parts = [pt for pt in parts if pt[3] > 0]
    if not parts:
        return pd.DataFrame(columns=CLUSTER_COLUMNS), labels.reshape(shape)
    signs, masses, extents, ps, nsrc, nsmp, idx_all, comp_all = [], [], [], [], [], [], [], []
    offset = 0
    for sign, idx, comp, n, mass, extent, p in parts:
        comp = np.asarray(comp, np.int64)
        src, smp = idx // T, idx % T
        nsrc.append(np.bincount(np.unique(comp * S + src) // S, minlength=n))
        nsmp.append(np.bincount(np.unique(comp * T + smp) // T, minlength=n))
        signs.append(np.full(n, int(sign)))
        masses.append(np.asarray(mass, float))
        extents.append(np.asarray(extent, np.int64))
        ps.append(np.asarray(p, float))
        idx_all.append(idx)
        comp_all.append(comp + offset)
        offset += n
    mass = np.concatenate(masses)
    p = np.concatenate(ps)
    order = np.lexsort((-np.abs(mass), np.where(np.isnan(p), np.inf, p)))
    rank = np.empty(offset, np.int64)
    rank[order] = np.arange(offset)
    labels[np.concatenate(idx_all)] = rank[np.concatenate(comp_all)] + 1
    df = pd.DataFrame({
        "cluster": np.arange(1, offset + 1),
        "sign": np.concatenate(signs)[order],
        "mass": mass[order],
        "extent": np.concatenate(extents)[order],
        "n_sources": np.concatenate(nsrc)[order],
        "n_samples": np.concatenate(nsmp)[order],
        "p_corrected": p[order]})
    return df[CLUSTER_COLUMNS], labels.reshape(shape)


def components_by_sign(mask_map, stat, pmap, adjacency, kind):
    """Connected components of a boolean map split by the statistic's sign."""
    parts = []
    flat_stat = stat.reshape(-1)
    for sign in ((1,) if kind == "F" else (1, -1)):
        sel = mask_map & ((stat > 0) if sign > 0 else (stat < 0))
        idx, comp, n = components(sel, adjacency)
        vals = flat_stat[idx]
        mass = np.bincount(comp, weights=vals, minlength=n)
        extent = np.bincount(comp, minlength=n)
        if pmap is None:
            p = np.full(n, np.nan)
        else:
            p = np.full(n, np.inf)
            np.minimum.at(p, comp, pmap.reshape(-1)[idx])
        parts.append((sign, idx, comp, n, mass, extent, p))
    return parts
