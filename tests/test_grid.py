"""Template grid and time axis against outside references."""

import nibabel as nib
import numpy as np
import pytest
from nibabel.affines import apply_affine
from scipy import ndimage

from groupsrc.sources import TimeAxis, VolumeGrid
from groupsrc.formats.nifti import time_axis_from_header


def oblique_affine():
    rot = nib.eulerangles.euler2mat(0.3, -0.2, 0.1)
    aff = np.eye(4)
    aff[:3, :3] = rot @ np.diag([2.0, 3.0, 4.0])
    aff[:3, 3] = [-90.0, -126.0, -72.0]
    return aff


def test_world_coordinates_match_nibabel(tmp_path):
    # Reference: nibabel.affines.apply_affine (voxel -> world), and a NIfTI round trip
    rng = np.random.default_rng(1)
    mask = rng.random((7, 8, 9)) > 0.6
    aff = oblique_affine()
    img = nib.Nifti1Image(mask.astype(np.uint8), aff)
    nib.save(img, str(tmp_path / "m.nii.gz"))
    back = nib.load(str(tmp_path / "m.nii.gz"))
    g = VolumeGrid.from_mask(np.asanyarray(back.dataobj) > 0, back.affine)
    np.testing.assert_allclose(g.coords_mm, apply_affine(aff, np.argwhere(mask)), atol=1e-4)
    np.testing.assert_allclose(g.voxel_size, [2.0, 3.0, 4.0], rtol=1e-6)
    # to_volume / from_volume round trip and C-order numbering (numpy.nonzero)
    vals = rng.standard_normal(g.n_sources)
    vol = g.to_volume(vals)
    np.testing.assert_array_equal(vol[np.nonzero(mask)], vals)
    np.testing.assert_array_equal(g.from_volume(vol), vals)


@pytest.mark.parametrize("neighbors,count,conn", [("face", 6, 1), ("edge", 18, 2), ("vertex", 26, 3)])
def test_interior_neighbour_counts(neighbors, count, conn):
    # VolumeGrid geometry (common practice): an interior voxel has 6 / 18 / 26 neighbours;
    # scipy.ndimage.generate_binary_structure(3, c) holds the same offsets plus the centre.
    g = VolumeGrid.from_mask(np.ones((5, 5, 5), bool), np.eye(4))
    A = g.adjacency(neighbors)
    centre = int(np.ravel_multi_index((2, 2, 2), (5, 5, 5)))
    assert A[centre].nnz == count
    assert ndimage.generate_binary_structure(3, conn).sum() - 1 == count
    assert (A != A.T).nnz == 0 and A.diagonal().sum() == 0


def test_adjacency_matches_ndimage_structure():
    # scipy.ndimage: two voxels are neighbours iff their offset is in the structure element
    rng = np.random.default_rng(2)
    mask = rng.random((6, 5, 4)) > 0.3
    g = VolumeGrid.from_mask(mask, np.eye(4))
    for name, conn in (("face", 1), ("edge", 2), ("vertex", 3)):
        st = ndimage.generate_binary_structure(3, conn)
        A = g.adjacency(name).tocoo()
        got = set(zip(A.row.tolist(), A.col.tolist()))
        want = set()
        for a, ia in enumerate(g.ijk):
            for b, ib in enumerate(g.ijk):
                d = ib - ia
                if a != b and np.all(np.abs(d) <= 1) and st[tuple(d + 1)]:
                    want.add((a, b))
        assert got == want


@pytest.mark.parametrize("unit,scale", [("sec", 1.0), ("msec", 1e-3), ("usec", 1e-6)])
def test_time_axis_units_from_nifti_header(tmp_path, unit, scale):
    # NIfTI-1 standard (nifti1.h): xyzt_units bits 3-5 give the time unit
    # (8 = s, 16 = ms, 24 = us); pixdim[4] is the step and toffset the first time.
    img = nib.Nifti1Image(np.zeros((2, 2, 2, 5), np.float32), np.eye(4))
    img.header.set_xyzt_units("mm", unit)
    img.header.set_zooms((1, 1, 1, 4.0))
    img.header["toffset"] = -100.0
    nib.save(img, str(tmp_path / "t.nii"))
    hdr = nib.load(str(tmp_path / "t.nii")).header
    assert int(hdr["xyzt_units"]) & 0x38 == {"sec": 8, "msec": 16, "usec": 24}[unit]
    ta = time_axis_from_header(hdr)
    assert ta.n == 5
    assert ta.dt == pytest.approx(4.0 * scale)
    assert ta.t0 == pytest.approx(-100.0 * scale)


def test_time_window_and_subset():
    ta = TimeAxis(-0.1, 0.01, 71)
    idx = ta.window(0.0, 0.6)
    assert idx[0] == 10 and idx[-1] == 70
    sub = ta.subset(idx)
    assert sub.t0 == pytest.approx(0.0, abs=1e-12) and sub.n == 61
