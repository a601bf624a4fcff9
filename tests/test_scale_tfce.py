"""One-pass TFCE (groupsrc.stats.corrections.tfce / unionfind) against its definition.

Smith & Nichols (2009, NeuroImage 44:83-98): TFCE(v) = integral_0^{x_v} e(h)^E h^H dh.
Checks: the closed form of a flat cluster, e^E h^(H+1) / (H+1) (analytic, from the
definition); a two-level map integrated by hand; a brute-force stepped sum that labels
every height with scipy.ndimage (reference library) -- equal to the stepped version at
equal steps, and converging to the exact integral with an error proportional to the step.
"""

import threading

import numpy as np
import pytest
from scipy import ndimage, sparse

from groupsrc.sources import VolumeGrid
from groupsrc.stats.corrections.tfce import tfce, tfce_batch


def _chain(n):
    return sparse.csr_matrix(np.eye(n, k=1) + np.eye(n, k=-1), dtype=bool)


def _brute_stepped(vol, dh, E=0.5, H=2.0):
    """Per-height labelling with scipy.ndimage (4D face neighbours = space x time):
    sum over h_k = k dh of e_k^E h_k^H dh, point counted when vol >= h_k; both signs."""
    out = np.zeros_like(vol)
    st = ndimage.generate_binary_structure(vol.ndim, 1)
    for sign in (1, -1):
        v = np.maximum(sign * vol, 0)
        k = 1
        while k * dh <= v.max() + 1e-12:
            lab, _ = ndimage.label(v >= k * dh - 1e-12, st)
            sizes = np.bincount(lab.ravel()).astype(float)
            sizes[0] = 0
            out += sign * sizes[lab] ** E * (k * dh) ** H * dh * (lab > 0)
            k += 1
    return out


def _small(seed, shape=(4, 4, 3), T=5):
    rng = np.random.default_rng(seed)
    grid = VolumeGrid.from_mask(np.ones(shape, bool), np.eye(4))
    vol = ndimage.gaussian_filter(rng.standard_normal(shape + (T,)), 0.8) * 6
    return grid, vol


@pytest.mark.parametrize("E,H", [(0.5, 2.0), (1.0, 1.0), (0.66, 2.5)])
def test_exact_flat_cluster_equals_closed_form(E, H):
    h, e = 3.0, 12
    x = np.zeros((20, 1)); x[4:4 + e] = h
    out = tfce(x, _chain(20), E=E, H=H)
    # Smith & Nichols 2009: a flat cluster of height h and extent e: e^E h^(H+1) / (H+1)
    np.testing.assert_allclose(out[4:4 + e, 0], e ** E * h ** (H + 1) / (H + 1), rtol=1e-12)
    assert np.all(out[:4] == 0) and np.all(out[4 + e:] == 0)


def test_exact_two_levels_by_hand():
    # chain a=3, b=1 (neighbours), c=-2 alone: by the definition,
    # a: int_0^1 2^E h^2 dh + int_1^3 1^E h^2 dh = 2^0.5/3 + 26/3; b: 2^0.5/3; c: -(8/3)
    x = np.array([[3.0], [1.0], [0.0], [-2.0]])
    out = tfce(x, _chain(4))[:, 0]
    np.testing.assert_allclose(out, [2 ** 0.5 / 3 + 26 / 3, 2 ** 0.5 / 3, 0, -8 / 3],
                               rtol=1e-12)


@pytest.mark.parametrize("seed", range(3))
def test_stepped_equals_brute_force_at_equal_steps(seed):
    grid, vol = _small(seed)
    for dh in (0.7, 0.25):
        ref = _brute_stepped(vol, dh)
        got = grid.to_volume(tfce(grid.from_volume(vol), grid.adjacency("face"), dh=dh))
        np.testing.assert_allclose(got, ref, rtol=1e-10, atol=1e-12)
    steps = 30                                    # per-map step max|x| / steps
    got = grid.to_volume(tfce(grid.from_volume(vol), grid.adjacency("face"), steps=steps))
    np.testing.assert_allclose(got, _brute_stepped(vol, np.abs(vol).max() / steps),
                               rtol=1e-10, atol=1e-12)


def test_brute_force_converges_to_exact_in_proportion_to_the_step():
    grid, vol = _small(11)
    exact = grid.to_volume(tfce(grid.from_volume(vol), grid.adjacency("face")))
    errors = []
    for dh in (0.08, 0.04, 0.02, 0.01):
        errors.append(np.abs(_brute_stepped(vol, dh) - exact).max())
    errors = np.array(errors)
    ratios = errors[:-1] / errors[1:]
    # first-order convergence of a right-endpoint sum: halving the step halves the error
    assert np.all(ratios > 1.5) and np.all(ratios < 2.6), ratios
    assert errors[-1] < 0.02 * np.abs(exact).max()


def test_tails_and_batches():
    grid, vol = _small(4)
    adj = grid.adjacency("face")
    x = grid.from_volume(vol)
    one = tfce(x, adj, two_sided=False)
    assert np.all(one >= 0) and np.all(one[x <= 0] == 0)
    # lower tail: enhance -x and negate
    low = tfce_batch(x.reshape(1, -1), adj, two_sided=False, scale=-1.0).reshape(x.shape)
    np.testing.assert_array_equal(low, -tfce(-x, adj, two_sided=False))
    maps = np.stack([x, -x, 0.5 * x]).reshape(3, -1)
    full = tfce_batch(maps, adj)
    pos, neg = tfce_batch(maps, adj, extremes=True)
    np.testing.assert_array_equal(pos, np.maximum(full.max(axis=1), 0))
    np.testing.assert_array_equal(neg, np.minimum(full.min(axis=1), 0))
    np.testing.assert_array_equal(full[0], tfce(x, adj).ravel())


def test_threads_give_the_same_maps():
    # the compiled loops release the GIL; maps computed on threads equal the serial ones
    grid, vol = _small(5)
    adj = grid.adjacency("face")
    maps = np.stack([grid.from_volume(vol) * s for s in (1, -0.5, 2, 0.3)]).reshape(4, -1)
    serial = tfce_batch(maps, adj)
    got = [None] * 4

    def work(i):
        got[i] = tfce_batch(maps[i:i + 1], adj)[0]
    threads = [threading.Thread(target=work, args=(i,)) for i in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    np.testing.assert_array_equal(np.stack(got), serial)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_sort_down_orders_like_a_stable_sort(dtype):
    # the TFCE pass's radix sort against numpy's stable argsort (reference library):
    # largest first, ties in reverse position order; keys sharing their high bytes
    # (skipped passes), exact ties, and a single key
    from groupsrc.stats.corrections.unionfind import _sort_down
    rng = np.random.default_rng(3)
    utype = np.uint32 if dtype == np.float32 else np.uint64
    for vals in (rng.exponential(2.0, 5000).astype(dtype),
                 np.round(rng.uniform(1.0, 1.5, 3000), 2).astype(dtype),   # ties
                 (1.0 + np.arange(300) % 7).astype(dtype),
                 np.array([2.5], dtype)):
        K = vals.size
        pts = np.arange(K, dtype=np.int32) * 3 + 1
        sk, sp = _sort_down(vals.copy().view(utype), pts.copy(), np.empty(K, utype),
                            np.empty(K, np.int32))
        want = np.argsort(vals, kind="stable")[::-1]
        np.testing.assert_array_equal(sp[::-1], pts[want])
        np.testing.assert_array_equal(sk[::-1].view(dtype), vals[want])
    # signed keys (the TFCE pass stores -h for the positive points): every negative
    # key comes above every non-negative one, each group by magnitude, largest first
    mixed = rng.exponential(2.0, 4000).astype(dtype)
    mixed[rng.random(4000) < 0.5] *= -1
    mixed[:50] = np.round(mixed[:50])                   # ties in both groups
    K = mixed.size
    pts = np.arange(K, dtype=np.int32)
    sk, sp = _sort_down(mixed.copy().view(utype), pts.copy(), np.empty(K, utype),
                        np.empty(K, np.int32))
    want = np.lexsort((np.abs(mixed), np.signbit(mixed)))[::-1]   # numpy, stable
    np.testing.assert_array_equal(sp[::-1], pts[want])


@pytest.mark.parametrize("seed", range(2))
def test_float32_maps_equal_their_float64_copies_and_the_definition(seed):
    # float32 maps (the null distribution's) are sorted on 32-bit keys; with many
    # tied heights the result must still be the definition's (brute force with
    # scipy.ndimage) and bit for bit that of the same values in float64
    grid, vol = _small(seed)
    vol = np.round(vol * 2) / 2                          # ties: heights on a 0.5 grid
    adj = grid.adjacency("face")
    x = grid.from_volume(vol)
    x32 = x.astype(np.float32).reshape(1, -1)
    x64 = x32.astype(np.float64)
    for kw in ({}, {"dh": 0.25}):
        got32, got64 = tfce_batch(x32, adj, **kw), tfce_batch(x64, adj, **kw)
        np.testing.assert_array_equal(got32, got64)
        ext32 = tfce_batch(x32, adj, extremes=True, **kw)
        np.testing.assert_array_equal(ext32, tfce_batch(x64, adj, extremes=True, **kw))
        low32 = tfce_batch(x32, adj, two_sided=False, scale=-1.0, **kw)
        np.testing.assert_array_equal(low32, tfce_batch(x64, adj, two_sided=False,
                                                        scale=-1.0, **kw))
    ref = _brute_stepped(vol, 0.25)
    got = grid.to_volume(tfce_batch(x32, adj, dh=0.25).reshape(x.shape))
    np.testing.assert_allclose(got, ref, rtol=1e-10, atol=1e-12)
