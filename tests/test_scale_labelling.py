"""Compiled union-find labelling (groupsrc.stats.corrections.unionfind) against
scipy.sparse.csgraph.connected_components (reference library) on random maps and
random graphs; and the fused null scores against bincount sums over those components."""

import numpy as np
import pytest
from scipy import sparse
from scipy.sparse.csgraph import connected_components

from groupsrc.stats.corrections import unionfind
from groupsrc.stats.corrections.clusters import _up_csr, check_adjacency, label_codes


def _random_graph(rng, n, density):
    a = sparse.random(n, n, density=density, random_state=rng, format="csr") > 0
    a = ((a + a.T) > 0).astype(bool)
    a.setdiag(False)
    return check_adjacency(sparse.csr_matrix(a), n)


def _reference(code, adj, T):
    """Points with equal nonzero code joined over the space x time graph, labelled by
    scipy.sparse.csgraph.connected_components; numbers by first appearance."""
    S = adj.shape[0]
    space = sparse.kron(adj, sparse.identity(T), format="csr")          # same sample
    time = sparse.kron(sparse.identity(S),
                       sparse.eye(T, k=1) + sparse.eye(T, k=-1), format="csr")
    g = ((space + time) > 0).tocoo()
    keep = (code[g.row] != 0) & (code[g.row] == code[g.col])
    idx = np.flatnonzero(code)
    pos = np.full(code.size, -1)
    pos[idx] = np.arange(idx.size)
    sub = sparse.coo_matrix((np.ones(keep.sum()), (pos[g.row[keep]], pos[g.col[keep]])),
                            shape=(idx.size, idx.size))
    n, comp = connected_components(sub, directed=False)
    return idx, _first_appearance(comp), n


def _first_appearance(comp):
    order = {}
    return np.array([order.setdefault(c, len(order)) for c in comp], dtype=np.int64)


@pytest.mark.parametrize("seed", range(6))
def test_labelling_equals_connected_components(seed):
    rng = np.random.default_rng(seed)
    S, T = int(rng.integers(5, 60)), int(rng.integers(1, 9))
    adj = _random_graph(rng, S, float(rng.uniform(0.02, 0.3)))
    x = rng.standard_normal(S * T)
    for thr in (0.0, 0.5, 1.5):                      # liberal to strict
        code = (x > thr).astype(np.int8) - (x < -thr).astype(np.int8)
        idx, comp, n = label_codes(code, adj, T)
        ref_idx, ref_comp, ref_n = _reference(code, adj, T)
        assert n == ref_n
        np.testing.assert_array_equal(idx, ref_idx)
        np.testing.assert_array_equal(comp, ref_comp)   # numbering by first appearance
        assert n > 1 or thr > 1                          # a check with room to fail


def test_cluster_extremes_equal_component_sums():
    # mass and signed extent of the largest clusters, against bincount sums over the
    # connected_components labelling (reference library)
    rng = np.random.default_rng(7)
    S, T, B = 40, 6, 5
    adj = _random_graph(rng, S, 0.1)
    maps = rng.standard_normal((B, S * T)).astype(np.float32)
    ptr, ind = _up_csr(adj)
    ws = unionfind.cluster_workspace(S * T)      # one workspace reused by every call
    for by_mass in (True, False):
        pos, neg = np.zeros(B), np.zeros(B)
        unionfind.cluster_extremes(maps, 0.8, True, True, by_mass, ptr, ind, T, pos, neg, ws)
        assert not ws[0].any()                   # left clean for the next call
        for b in range(B):
            x = maps[b].astype(np.float64)
            code = (x > 0.8).astype(np.int8) - (x < -0.8).astype(np.int8)
            idx, comp, n = _reference(code, adj, T)
            w = x[idx] if by_mass else code[idx].astype(float)
            score = np.bincount(comp, weights=w, minlength=n)
            assert pos[b] == max(0.0, score.max())
            assert neg[b] == min(0.0, score.min())


def test_one_sign_only():
    rng = np.random.default_rng(3)
    adj = _random_graph(rng, 30, 0.1)
    maps = rng.standard_normal((2, 30 * 4)).astype(np.float32)
    ptr, ind = _up_csr(adj)
    pos, neg = np.zeros(2), np.zeros(2)
    unionfind.cluster_extremes(maps, 0.5, True, False, True, ptr, ind, 4, pos, neg,
                               unionfind.cluster_workspace(30 * 4))
    assert np.all(neg == 0) and np.all(pos > 0)


def test_maps_beyond_int32_indices_are_refused():
    # the compiled loops index points with int32 (numpy's int32 range, common practice)
    from scipy import sparse

    from groupsrc.stats.corrections.scorers import make_correction
    adj = sparse.csr_matrix((70_000, 70_000))
    with pytest.raises(ValueError, match="points a map may have"):
        make_correction("cluster-mass", "t", "two", (70_000, 40_000), adj, threshold=2.0)
    make_correction("cluster-mass", "t", "two", (70_000, 30_000), adj, threshold=2.0)
