"""TFCE against its defining sum (Smith & Nichols 2009, NeuroImage 44:83-98).

TFCE(v) = integral over h of e(h)^E h^H dh, taken as the right-endpoint sum
over heights h_k = k dh (the discretisation documented in groupsrc.stats.corrections.tfce); a
flat cluster of height h and extent e has the closed form e^E h^(H+1) / (H+1)
for the integral (analytic, from the definition).
"""

import numpy as np
import pytest
from scipy import ndimage, sparse

from groupsrc.sources import VolumeGrid
from groupsrc.stats.corrections.tfce import tfce


def _chain(n):
    return sparse.csr_matrix(np.eye(n, k=1) + np.eye(n, k=-1), dtype=bool)


@pytest.mark.parametrize("E,H", [(0.5, 2.0), (1.0, 1.0), (0.66, 2.5)])
def test_flat_cluster_analytic(E, H):
    h, e = 3.0, 12
    x = np.zeros((20, 1)); x[4:4 + e] = h
    steps = 100
    out = tfce(x, _chain(20), E=E, H=H, steps=steps)
    dh = h / steps
    # exact discrete sum from the definition: sum_k e^E (k dh)^H dh, k = 1..steps
    exact = sum(e ** E * (k * dh) ** H * dh for k in range(1, steps + 1))
    np.testing.assert_allclose(out[4:4 + e, 0], exact, rtol=1e-10)
    # continuous integral e^E h^(H+1) / (H+1); right-endpoint sum exceeds it by ~ H/(2 steps)
    analytic = e ** E * h ** (H + 1) / (H + 1)
    assert abs(out[5, 0] / analytic - 1) < (H + 1) / steps
    assert np.all(out[:4] == 0) and np.all(out[4 + e:] == 0)


def test_two_sided_signs_and_fixed_dh():
    # negative values are enhanced like positive ones on -x and keep their sign
    # (two-sided use, Smith & Nichols 2009); default E = 0.5, H = 2 are the
    # values recommended there
    x = np.zeros((9, 1)); x[1:3] = 2.0; x[5:8] = -1.0
    out = tfce(x, _chain(9), dh=0.5)
    # definition, dh = 0.5: positive cluster extent 2, heights 0.5..2; negative extent 3, 0.5..1
    pos = sum(2 ** 0.5 * (0.5 * k) ** 2 * 0.5 for k in range(1, 5))
    neg = sum(3 ** 0.5 * (0.5 * k) ** 2 * 0.5 for k in range(1, 3))
    np.testing.assert_allclose(out[1:3, 0], pos)
    np.testing.assert_allclose(out[5:8, 0], -neg)


def test_matches_per_level_ndimage_reference():
    """Plain reference: label each level with scipy.ndimage and add e^E h^H dh
    (the definition, Smith & Nichols 2009; E = 0.5, H = 2 as recommended there)."""
    rng = np.random.default_rng(0)
    shape, T = (5, 5, 4), 6
    grid = VolumeGrid.from_mask(np.ones(shape, bool), np.eye(4))
    v = ndimage.gaussian_filter(rng.standard_normal(shape + (T,)), 1.0) * 5
    v = np.maximum(v, 0)
    steps = 20
    dh = v.max() / steps
    ref = np.zeros_like(v)
    st = ndimage.generate_binary_structure(4, 1)
    for k in range(1, steps + 1):
        lab, n = ndimage.label(v >= k * dh - 1e-12, st)   # scipy.ndimage reference labelling
        sizes = np.bincount(lab.ravel())
        sizes[0] = 0
        ref += sizes[lab] ** 0.5 * (k * dh) ** 2 * dh * (lab > 0)
    out = tfce(grid.from_volume(v), grid.adjacency("face"), steps=steps, two_sided=False)
    np.testing.assert_allclose(grid.to_volume(out), ref, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("kw,match", [
    ({"E": 0}, "E"), ({"E": -0.5}, "E"), ({"H": 0}, "H"), ({"H": -2.0}, "H"),
    ({"E": float("nan")}, "E"), ({"H": float("inf")}, "H"),
    ({"steps": 0}, "steps"), ({"dh": 0.0}, "dh"), ({"dh": -1.0}, "dh")])
def test_rejects_bad_parameters(kw, match):
    with pytest.raises(ValueError, match=match):
        tfce(np.ones((2, 1)), _chain(2), **kw)
