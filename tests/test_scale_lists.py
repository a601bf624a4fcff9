"""Batches held as supra-threshold lists (groupsrc/stats/exceedances.py) for cluster mass
and extent.

* The listed scores equal bincount sums over scipy.sparse.csgraph.connected_components
  (reference library) of the supra-threshold points, as the map-based scores do
  (tests/test_scale_labelling.py).
* At one product block size, lists and maps give the same null scores bit for bit, for
  every tail and however many parts share a batch's products; a resample whose list
  overflows is scored from its recomputed map, with the same result.  (The project's
  own promise: the way a batch is held does not change a resample's score.)
"""

import numpy as np
import pytest

from groupsrc.sources import VolumeGrid
from groupsrc.stats.corrections import exceedances, unionfind
from groupsrc.stats.engine.backends import NullJob, auto_batch, make_backend
from groupsrc.stats.corrections.clusters import _up_csr
from groupsrc.stats.corrections.scorers import make_correction
from groupsrc.stats.corrections.exceedances import Exceedances, list_rows
from groupsrc.stats.models.ols import LIST_BLOCK, RES_BLOCK, OLSKernel

from test_scale_labelling import _random_graph, _reference

GRID = VolumeGrid.from_mask(np.ones((5, 4, 3), bool), np.eye(4))
T = 9
F = GRID.n_sources * T


def _lists_of(maps, threshold, want_pos, want_neg, parts=1, capacity=None):
    """List the maps' points as a kernel does, the features split into ``parts`` runs
    (room for every point unless ``capacity`` says otherwise)."""
    B, n = maps.shape
    ex = Exceedances(B, n, threshold, want_pos, want_neg, parts, capacity or n)
    for j in range(parts):
        _, base, slots = ex.region((j, parts))
        a, b = n * j // parts, n * (j + 1) // parts
        for c in range(a, b, 7):                  # chunk by chunk, as the kernel does
            e = min(b, c + 7)
            list_rows(np.ascontiguousarray(maps[:, c:e]), B, e - c, c, ex.upper, ex.lower,
                      ex.idx, ex.val, ex.count[j], 0, base, slots)
    return ex


@pytest.mark.parametrize("parts", [1, 2, 3])
def test_listed_scores_equal_component_sums(parts):
    rng = np.random.default_rng(11)
    S, T_, B = 40, 6, 5
    adj = _random_graph(rng, S, 0.1)
    maps = rng.standard_normal((B, S * T_)).astype(np.float32)
    ptr, ind = _up_csr(adj)
    ws = unionfind.cluster_workspace(S * T_)
    for by_mass in (True, False):
        ex = _lists_of(maps, 0.8, True, True, parts)
        pos, neg = np.zeros(B), np.zeros(B)
        unionfind.listed_cluster_extremes(ex.idx, ex.val, ex.count, ex.bases, 0, B, 0.8, True,
                                          by_mass, ptr, ind, T_, pos, neg, ws)
        assert not ws[0].any()                   # codes left clean for the next call
        for b in range(B):
            x = maps[b].astype(np.float64)
            code = (x > 0.8).astype(np.int8) - (x < -0.8).astype(np.int8)
            idx, comp, n = _reference(code, adj, T_)
            assert n > 2
            w = x[idx] if by_mass else code[idx].astype(float)
            score = np.bincount(comp, weights=w, minlength=n)
            assert pos[b] == max(0.0, score.max())
            assert neg[b] == min(0.0, score.min())


@pytest.mark.parametrize("want", [(True, True), (True, False), (False, True)])
@pytest.mark.parametrize("parts", [1, 2, 3])
def test_lists_give_the_map_scores_bit_for_bit(want, parts):
    rng = np.random.default_rng(5)
    adj = _random_graph(rng, 30, 0.12)
    maps = (rng.standard_normal((6, 30 * 5)) * 1.3).astype(np.float32)
    ptr, ind = _up_csr(adj)
    ws = unionfind.cluster_workspace(maps.shape[1])
    for by_mass in (True, False):
        ref = np.zeros(6), np.zeros(6)
        unionfind.cluster_extremes(maps, 0.7, *want, by_mass, ptr, ind, 5, *ref, ws)
        ex = _lists_of(maps, 0.7, *want, parts)
        got = np.zeros(4), np.zeros(4)
        unionfind.listed_cluster_extremes(ex.idx, ex.val, ex.count, ex.bases, 2, 6, 0.7,
                                          want[0], by_mass, ptr, ind, 5, *got, ws)
        for g, r in zip(got, ref):
            np.testing.assert_array_equal(g, r[2:])
        assert np.any(ref[0] != 0) or np.any(ref[1] != 0)


def test_a_full_region_is_marked_and_left_to_the_maps():
    maps = np.array([[3.0, 0, 3, 3, 3, 3], [0, 0, 3, 0, 0, 0]], np.float32)
    ex = _lists_of(maps, 1.0, True, True, parts=2, capacity=4)    # 2 slots per part
    assert ex.count[0, 0] == 2 and ex.count[1, 0] == exceedances.OVERFLOW
    assert ex.count[1, 1] == 0 and ex.count[0, 1] == 1
    adj = _random_graph(np.random.default_rng(0), 6, 0.0)
    ptr, ind = _up_csr(adj)
    pos, neg = np.zeros(2), np.zeros(2)
    unionfind.listed_cluster_extremes(ex.idx, ex.val, ex.count, ex.bases, 0, 2, 1.0, True,
                                      True, ptr, ind, 1, pos, neg,
                                      unionfind.cluster_workspace(6))
    assert np.isnan(pos[0]) and np.isnan(neg[0])
    assert pos[1] == 3.0 and neg[1] == 0.0


def _job(correction, tails, lists=True, block=None):
    rng = np.random.default_rng(2)
    n = 12
    Y = rng.standard_normal((n, F)).astype(np.float32) + 0.2
    X = np.c_[np.ones(n), rng.standard_normal(n)]
    kernel = OLSKernel(Y, X, [1.0, 0.0], scheme="sign-flip")
    kernel.prepare(kernel.rearrangements(150, 4))
    corr = make_correction(correction, "t", tails, (GRID.n_sources, T), GRID.adjacency("face"),
                           threshold=kernel.threshold(0.05, tails))
    if not lists:
        corr.lists = False
    job = NullJob(kernel, corr)
    if block:
        kernel.block = job.block = block
    return job


def _null(job, backend="serial", workers=1, batch=40, m=150):
    pos, neg = np.full(m, np.nan), np.full(m, np.nan)

    def collect(lo, p, q):
        pos[lo:lo + p.size] = p
        neg[lo:lo + q.size] = q
    make_backend(backend, workers).run(job, [(a, min(m, a + batch)) for a in range(0, m, batch)],
                                       collect)
    return pos, neg


@pytest.mark.parametrize("correction", ["cluster-mass", "cluster-extent"])
@pytest.mark.parametrize("tails", ["two", "greater", "less"])
def test_a_job_on_lists_equals_the_job_on_maps(correction, tails, monkeypatch):
    monkeypatch.setattr("groupsrc.stats.models.ols.FEATURE_CHUNK", 64)    # several chunks
    listed = _job(correction, tails)
    assert listed.lists and listed.kernel.block == LIST_BLOCK
    maps = _job(correction, tails, lists=False, block=LIST_BLOCK)
    assert not maps.lists
    ref = _null(maps)
    assert np.isfinite(ref[0]).all() and (np.abs(ref[0]) + np.abs(ref[1]) > 0).any()
    for backend, workers, batch in [("serial", 1, 40), ("threads", 2, 33), ("threads", 3, 150)]:
        got = _null(listed, backend, workers, batch)
        for g, r in zip(got, ref):
            np.testing.assert_array_equal(g, r, err_msg=f"{backend} {workers} {batch}")


def test_overflowing_lists_fall_back_to_the_maps(monkeypatch):
    # room for about one point in 300: nearly every resample overflows, and is scored
    # from its recomputed map
    monkeypatch.setattr("groupsrc.stats.models.ols.FEATURE_CHUNK", 64)
    ref = _null(_job("cluster-mass", "two", lists=False, block=LIST_BLOCK))
    monkeypatch.setattr(exceedances, "CAPACITY_DIVISOR", 300)
    job = _job("cluster-mass", "two")
    seen = []
    real = job._from_maps
    monkeypatch.setattr(job, "_from_maps", lambda *a: (seen.append(int(np.isnan(a[2]).sum())),
                                                       real(*a)))
    for backend, workers in [("serial", 1), ("threads", 2)]:
        got = _null(job, backend, workers, batch=40)
        for g, r in zip(got, ref):
            np.testing.assert_array_equal(g, r)
    assert sum(seen) > 100                       # the fallback really ran


def test_batch_size_follows_the_buffer_bytes():
    # lists: an eighth of the features, 8 bytes each -> 1 byte per feature and resample
    assert exceedances.bytes_per_resample(8000) == 8000
    assert auto_batch(1000, 4.0 * 1e6, 1, block=RES_BLOCK, budget=128e6) == 32
    assert auto_batch(1000, 1e6, 1, block=LIST_BLOCK, budget=128e6) == 128
    assert auto_batch(1000, 1e6, 1, block=LIST_BLOCK, budget=1e6) == LIST_BLOCK   # one block
    assert auto_batch(1000, 0, 1, block=RES_BLOCK) == 256                          # no buffer
    # at least `tasks` batches while there are enough blocks (a tenth, for progress)
    assert auto_batch(1000, 0, 1, block=RES_BLOCK, tasks=10) == 96
    assert auto_batch(1000, 0, 1, block=LIST_BLOCK, tasks=10) == 64
    assert auto_batch(100, 0, 1, block=LIST_BLOCK, tasks=10) == 64                # one block


def test_float32_bounds_keep_the_float64_decisions():
    # x > t (float64 comparison, as the map-based scorer makes it) equals x > the
    # largest float32 not above t, for float32 x; IEEE 754 ordering (common practice)
    rng = np.random.default_rng(9)
    x = rng.standard_normal(20000).astype(np.float32) * 3
    ts = [2.0, 2.712, float(np.float32(2.712)), float(np.nextafter(np.float32(2.712), 3)),
          (float(np.float32(2.5)) + float(np.nextafter(np.float32(2.5), 3))) / 2, 3e38,
          # just below a float32, whose nearest float32 is above it: that value is listed
          float(np.float32(1.75)) - (1.75 - float(np.nextafter(np.float32(1.75), 0))) / 4]
    x[:len(ts)] = [np.float32(t) for t in ts]       # values sitting on each threshold
    for t in ts:
        b = exceedances.float32_at_or_below(t)
        assert b.dtype == np.float32 and float(b) <= t
        x64 = x.astype(np.float64)                  # compared in float64, as numba does
        np.testing.assert_array_equal(x64 > t, x > b)
        np.testing.assert_array_equal(x64 < -t, x < -b)


def test_listing_on_a_threshold_between_two_floats():
    rng = np.random.default_rng(4)
    t = (float(np.float32(0.5)) + float(np.nextafter(np.float32(0.5), 1))) / 2
    maps = rng.choice(np.array([0.5, np.nextafter(np.float32(0.5), 1), -0.5, 0.0, 2.0],
                               np.float32), size=(3, 64))
    adj = _random_graph(rng, 16, 0.2)
    ptr, ind = _up_csr(adj)
    ws = unionfind.cluster_workspace(64)
    ref, got = (np.zeros(3), np.zeros(3)), (np.zeros(3), np.zeros(3))
    unionfind.cluster_extremes(maps, t, True, True, True, ptr, ind, 4, *ref, ws)
    ex = _lists_of(maps, t, True, True)
    np.testing.assert_array_equal(ex.count[0], ((maps > t) | (maps < -t)).sum(axis=1))
    unionfind.listed_cluster_extremes(ex.idx, ex.val, ex.count, ex.bases, 0, 3, t, True, True,
                                      ptr, ind, 4, *got, ws)
    for g, r in zip(got, ref):
        np.testing.assert_array_equal(g, r)


def test_liberal_forming_thresholds_keep_map_batches(monkeypatch):
    # lists only while about forming_p of a null map lies beyond the threshold, well
    # within their room; beyond inference.LISTS_UP_TO_FORMING_P the batches are maps
    from groupsrc.stats import inference
    jobs = []

    class Recording(NullJob):
        def __init__(self, *a, **k):
            super().__init__(*a, **k)
            jobs.append(self)
    monkeypatch.setattr(inference, "NullJob", Recording)
    rng = np.random.default_rng(0)
    Y = rng.standard_normal((10, GRID.n_sources, T)).astype(np.float32)
    for forming_p, lists in [(0.01, True), (inference.LISTS_UP_TO_FORMING_P, True), (0.3, False)]:
        inference.run_inference(Y, np.ones((10, 1)), [1.0], GRID.adjacency("face"),
                                correction="cluster-mass", n_resamples=20, seed=1,
                                forming_p=forming_p)
        assert jobs[-1].lists is lists
        assert jobs[-1].block == (LIST_BLOCK if lists else RES_BLOCK)
