"""How far the TFCE pass is from a bare union-find visiting the points in the same order.

Run:  python tests/benchmarks/bench_tfce_floor.py [--maps N] [--repeats R]

On null t maps of the TFCE benchmark's workload (~10,000 sources x 125 samples,
every point visited), this times per map:

* groupsrc's TFCE of the map's extremes (``unionfind.tfce_extremes``: setup,
  sort, the height-ordered pass with its tree nodes, the maxima);
* a bare union-find (union by size, path halving, nothing else) over the same
  space x time graph, visiting the points in the same order (given, not timed:
  no sort): the positive points from the highest down, then afresh the negative
  ones, on the same time-major layout;
* the same bare union-find visiting each sign's points in index order.

The first two ratios say how much of the TFCE map's time any pass in height
order would spend anyway; the last one what the order of the visits costs.
Also runs the bare pass on the first 8 samples only (a map 16x smaller, whose
arrays stay in cache) to show how the cost per point grows with the map.
Medians of repeated timings in one process; not collected by pytest.
"""

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from numba import njit

sys.path.insert(0, str(Path(__file__).parent))
from bench_cluster_mass import workload  # noqa: E402

from groupsrc.stats.corrections import unionfind  # noqa: E402
from groupsrc.stats.corrections.tfce import _csr  # noqa: E402

_NOT_YET = np.int32(2 ** 31 - 1)


@njit(nogil=True)
def time_major(x, T):
    """Heights |x| and signs on time-major indices t * S + s."""
    F = x.size
    S = F // T
    h = np.empty(F)
    g = np.empty(F, np.int8)
    for s in range(S):
        for t in range(T):
            h[t * S + s] = abs(x[s * T + t])
            g[t * S + s] = 1 if x[s * T + t] > 0 else -1
    return h, g


@njit(nogil=True)
def bare_union_find(order, n_pos, adj_ptr, adj_idx, T, par, size):
    """Join each visited point with its visited neighbours: the ``n_pos`` positive
    points first, then (afresh) the negative ones, as the TFCE pass does."""
    F = order.size
    S = F // T
    par[:] = _NOT_YET
    for i in range(F):
        if i == n_pos:
            par[:] = _NOT_YET
        v = np.int64(order[i])
        par[v] = v
        size[v] = 1
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
            if par[u] == _NOT_YET:
                continue
            r = np.int64(u)
            while par[r] != r:
                par[r] = par[par[r]]
                r = par[r]
            rv = v
            while par[rv] != rv:
                rv = par[rv]
            if r != rv:
                if size[r] < size[rv]:
                    r, rv = rv, r
                par[rv] = r
                size[r] += size[rv]


def _median_time(fn, repeats):
    fn()
    ts = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t0)
    return float(np.median(ts))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--maps", type=int, default=4)
    ap.add_argument("--repeats", type=int, default=5)
    a = ap.parse_args()
    grid, Y, X = workload()
    adj = grid.adjacency("face")
    S, T = grid.n_sources, Y.shape[2]
    ptr, idx = _csr(adj, S)
    rng = np.random.default_rng(7)
    maps = []
    for _ in range(a.maps):                       # null two-sample t maps, float32
        y = Y[rng.permutation(Y.shape[0])]
        m1, m2 = y[:20].mean(0), y[20:].mean(0)
        v = (y[:20].var(0, ddof=1) + y[20:].var(0, ddof=1)) / 2
        maps.append(((m1 - m2) / np.sqrt(v / 10)).astype(np.float32))
    print(f"{a.maps} null t maps, {S} sources x {T} samples; medians of {a.repeats}")
    for n_t in (T, 8):
        F = S * n_t
        ws = unionfind.tfce_workspace(F)
        par, size = np.empty(F, np.int32), np.empty(F, np.int32)
        tfce_ms, height_ms, index_ms = [], [], []
        for m in maps:
            x = np.ascontiguousarray(m[:, :n_t]).reshape(1, -1)
            pos, neg = np.zeros(1), np.zeros(1)
            tfce_ms.append(_median_time(lambda: unionfind.tfce_extremes(
                x, 1.0, True, ptr, idx, n_t, 0.5, 2.0, 0, 0.0, pos, neg, ws), a.repeats))
            h, g = time_major(x[0], n_t)
            down = np.argsort(-h, kind="stable")
            down = np.concatenate([down[g[down] > 0], down[g[down] < 0]]).astype(np.int32)
            every = np.arange(F)
            ahead = np.concatenate([every[g > 0], every[g < 0]]).astype(np.int32)
            n_pos = int((g > 0).sum())
            height_ms.append(_median_time(lambda: bare_union_find(
                down, n_pos, ptr, idx, n_t, par, size), a.repeats))
            index_ms.append(_median_time(lambda: bare_union_find(
                ahead, n_pos, ptr, idx, n_t, par, size), a.repeats))
        t_tf, t_h, t_i = (float(np.median(v)) for v in (tfce_ms, height_ms, index_ms))
        print(f"{n_t:4d} samples ({F:,} points):")
        print(f"  TFCE extremes (groupsrc)          {t_tf * 1e9 / F:6.1f} ns per point")
        print(f"  bare union-find, height order     {t_h * 1e9 / F:6.1f} ns per point "
              f"(TFCE / bare: {t_tf / t_h:.2f})")
        print(f"  bare union-find, index order      {t_i * 1e9 / F:6.1f} ns per point "
              f"(height order / index order: {t_h / t_i:.2f})")


if __name__ == "__main__":
    main()
