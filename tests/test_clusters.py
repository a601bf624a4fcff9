"""Space x time connected components against scipy.ndimage.label.

The neighbourhood (same sample at neighbouring sources, or same source at
adjacent samples) is the space x time graph of Maris & Oostenveld 2007 (J
Neurosci Methods 164:177-190); on a full box grid it is scipy.ndimage's 4D
structuring element of connectivity 1 (generate_binary_structure(4, 1)).
"""

import numpy as np
import pytest
from scipy import ndimage

from groupsrc.stats.corrections.clusters import cluster_scores, label_clusters
from groupsrc.sources.volume import CONNECTIVITY, VolumeGrid


def _same_partition(a, b):
    """Two labelings describe the same components (labels may differ)."""
    assert np.array_equal(a > 0, b > 0)
    pairs = set(zip(a[a > 0].tolist(), b[b > 0].tolist()))
    assert len(pairs) == len(np.unique(a[a > 0])) == len(np.unique(b[b > 0]))


@pytest.mark.parametrize("neighbors", ["face", "edge", "vertex"])
def test_volume_labels_match_ndimage(neighbors):
    rng = np.random.default_rng(0)
    shape = (9, 8, 7)
    grid = VolumeGrid.from_mask(np.ones(shape, bool), np.eye(4))   # full box mask
    vol = ndimage.gaussian_filter(rng.standard_normal(shape), 1.0) > 0.1
    supra = grid.from_volume(vol)[:, None]                    # one sample
    lab, n = label_clusters(supra, grid.adjacency(neighbors))
    # scipy.ndimage reference: 3D structuring element of matching connectivity
    ref, n_ref = ndimage.label(vol, ndimage.generate_binary_structure(3, CONNECTIVITY[neighbors]))
    assert n == n_ref
    _same_partition(grid.to_volume(lab[:, 0]), ref)


def test_space_time_labels_match_ndimage_4d():
    rng = np.random.default_rng(1)
    shape, T = (7, 6, 5), 11
    grid = VolumeGrid.from_mask(np.ones(shape, bool), np.eye(4))
    vol4 = ndimage.gaussian_filter(rng.standard_normal(shape + (T,)), 1.0) > 0.15
    supra = grid.from_volume(vol4)                            # (S, T)
    lab, n = label_clusters(supra, grid.adjacency("face"))
    # scipy.ndimage reference: face connectivity in 4D (x, y, z, t)
    ref, n_ref = ndimage.label(vol4, ndimage.generate_binary_structure(4, 1))
    assert n == n_ref > 3
    _same_partition(grid.to_volume(lab), ref)


def test_masked_grid_breaks_clusters():
    # a voxel outside the mask separates the line: scipy.ndimage.label of the
    # in-mask voxels is the reference
    mask = np.ones((5, 1, 1), bool); mask[2] = False
    grid = VolumeGrid.from_mask(mask, np.eye(4))
    lab, n = label_clusters(np.ones((4, 1), bool), grid.adjacency("face"))
    ref, n_ref = ndimage.label(mask, ndimage.generate_binary_structure(3, 1))
    assert n == n_ref == 2
    _same_partition(grid.to_volume(lab[:, 0]), ref)


def test_mass_and_extent_match_ndimage_sum():
    rng = np.random.default_rng(2)
    shape, T = (6, 6, 6), 8
    grid = VolumeGrid.from_mask(np.ones(shape, bool), np.eye(4))
    st4 = ndimage.gaussian_filter(rng.standard_normal(shape + (T,)), 1.0) * 4
    stat = grid.from_volume(st4)
    thr = 1.0
    for sign in (1, -1):
        c = cluster_scores(stat, thr, grid.adjacency("face"), sign)
        # reference: ndimage.label of the signed supra set + ndimage.sum per label;
        # mass = sum of the statistic over the cluster, extent = its number of
        # points (Maris & Oostenveld 2007)
        ref, n_ref = ndimage.label(sign * st4 > thr, ndimage.generate_binary_structure(4, 1))
        ref_mass = ndimage.sum(st4, ref, np.arange(1, n_ref + 1))
        ref_ext = ndimage.sum(np.ones_like(st4), ref, np.arange(1, n_ref + 1))
        np.testing.assert_allclose(np.sort(c.mass), np.sort(ref_mass), rtol=1e-10)
        np.testing.assert_array_equal(np.sort(c.extent), np.sort(ref_ext))
        assert np.all(sign * c.mass > 0)


def test_empty_map():
    grid = VolumeGrid.from_mask(np.ones((3, 3, 3), bool), np.eye(4))
    lab, n = label_clusters(np.zeros((27, 4), bool), grid.adjacency("face"))
    assert n == 0 and not lab.any()
