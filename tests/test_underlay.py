"""The anatomical underlay: resampled from any grid with an affine, checked at the edge,
saved with the results and drawn under the volume figures.

Check values: trilinear interpolation reproduces an affine function of position
exactly (common practice: it is exact for polynomials of degree one in each
coordinate), so an image holding f(x, y, z) = 2x - y + 0.5z + 7 on an oblique, flipped
grid must resample to f at every display voxel inside the image.  The image is written
with nibabel, not through groupsrc.
"""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pytest

from conftest import make_cohort
from groupsrc.cli import main
from groupsrc.sources.underlay import display_grid, resample, underlay_for


def _f(xyz):
    return 2 * xyz[..., 0] - xyz[..., 1] + 0.5 * xyz[..., 2] + 7.0


def _oblique_affine():
    c, s = np.cos(0.3), np.sin(0.3)
    rot = np.array([[c, -s, 0], [s, c, 0], [0, 0, 1.0]])
    a = np.eye(4)
    a[:3, :3] = rot @ np.diag([-1.5, 2.0, 1.25])         # x flipped, unequal voxels
    a[:3, 3] = [40.0, -35.0, -30.0]
    return a


def test_resampling_reproduces_an_affine_function_exactly():
    affine = _oblique_affine()
    shape = (60, 50, 56)
    ijk = np.indices(shape).reshape(3, -1).T
    xyz = ijk @ affine[:3, :3].T + affine[:3, 3]
    image = _f(xyz).reshape(shape).astype(np.float32)
    dshape, daff = display_grid([-10, -10, -10], [10, 10, 10], [4.0, 4.0, 4.0], [1.0] * 3)
    out = resample(image, affine, dshape, daff)
    dijk = np.indices(dshape).reshape(3, -1).T
    dxyz = dijk @ daff[:3, :3].T + daff[:3, 3]
    # display voxels whose position lies well inside the image (trilinear needs 8 neighbours)
    inside = np.all((dxyz - affine[:3, 3]) @ np.linalg.inv(affine[:3, :3]).T
                    >= 0.5, axis=1)
    back = (dxyz - affine[:3, 3]) @ np.linalg.inv(affine[:3, :3]).T
    inside &= np.all(back <= np.array(shape) - 1.5, axis=1)
    assert inside.sum() > 1000
    np.testing.assert_allclose(out.reshape(-1)[inside], _f(dxyz[inside]), rtol=1e-5, atol=1e-3)
    # outside the image: background 0
    far = np.any(back < -1.0, axis=1) | np.any(back > np.array(shape), axis=1)
    assert far.any() and np.all(out.reshape(-1)[far] == 0)


def test_display_grid_is_axis_aligned_and_covers_the_box():
    shape, aff = display_grid([-20, -30, -10], [20, 30, 40], [10.0, 10.0, 10.0], [1.0] * 3)
    assert np.allclose(aff[:3, :3], np.diag([2.5, 2.5, 2.5]))       # template voxel / 4
    top = aff[:3, 3] + 2.5 * (np.array(shape) - 1)
    assert np.all(aff[:3, 3] <= [-20, -30, -10]) and np.all(top >= [20, 30, 40])
    u = underlay_for(np.ones((4, 4, 4)), np.eye(4), [0, 0, 0], [3, 3, 3], [1.0] * 3)
    assert u.values.dtype == np.float32 and u.values.max() == pytest.approx(1.0)


def _with_underlay(root, image, affine, name="t1.nii.gz"):
    analysis = make_cohort(root)
    nib.save(nib.Nifti1Image(image, affine), str(root / name))
    text = analysis.read_text().replace('mask = "mask.nii.gz"\n',
                                        f'mask = "mask.nii.gz"\nunderlay = "{name}"\n')
    analysis.write_text(text)
    return analysis


def test_run_with_an_underlay_saves_and_draws_it(tmp_path):
    # the tiny cohort's grid: 4 mm voxels from (-10, -12, -8) mm; the underlay on a 2 mm grid
    aff = np.diag([2.0, 2.0, 2.0, 1.0])
    aff[:3, 3] = [-20.0, -20.0, -20.0]
    img = np.zeros((30, 30, 30), np.float32)
    img[5:25, 5:25, 5:25] = 100.0
    analysis = _with_underlay(tmp_path / "c", img, aff)
    out = tmp_path / "out"
    text = analysis.read_text().replace("forming_p = 0.05", "forming_p = 0.3")
    analysis.write_text(text.replace('correction = "cluster-mass"', 'correction = "none"'))
    assert main(["run", str(analysis), "--out", str(out), "--quiet"]) == 0
    saved = nib.load(str(out / "underlay.nii.gz"))
    # display voxels: max(1 mm, template 4 mm / 4, the image's own 2 mm) = 2 mm
    assert np.allclose(np.diag(saved.affine)[:3], 2.0)
    assert float(np.asarray(saved.dataobj).max()) == pytest.approx(100.0)
    assert list(out.glob("*/figures/slices_cluster*.png"))
    import json
    rec = json.loads((out / "run.json").read_text())
    assert any(k.endswith("t1.nii.gz") for k in rec["inputs_sha256"])
    assert "underlay.nii.gz" in rec["output_files"]


@pytest.mark.parametrize("make, fragment", [
    (lambda: (np.zeros((5, 5, 5, 3), np.float32), np.eye(4)), "must be a 3D image"),
    (lambda: (np.ones((5, 5, 5), np.float32), np.diag([1, 1, 1, 1.0]) + np.diag([0, 0, 0, 0])
              + np.array([[0, 0, 0, 500], [0, 0, 0, 500], [0, 0, 0, 500], [0, 0, 0, 0]])),
     "does not reach the template's sources"),
    (lambda: (np.full((5, 5, 5), np.nan, np.float32), np.eye(4)), "no finite value"),
])
def test_bad_underlays_are_problems_naming_the_file(tmp_path, capsys, make, fragment):
    image, affine = make()
    analysis = _with_underlay(tmp_path / "c", image, affine)
    rc = main(["check", str(analysis)])
    err = capsys.readouterr().err
    assert rc == 1 and fragment in err and "t1.nii.gz" in err, err


def test_missing_underlay_and_wrong_suffix(tmp_path, capsys):
    analysis = make_cohort(tmp_path / "c")
    analysis.write_text(analysis.read_text().replace(
        'mask = "mask.nii.gz"\n', 'mask = "mask.nii.gz"\nunderlay = "absent.nii.gz"\n'))
    assert main(["check", str(analysis)]) == 1
    err = capsys.readouterr().err
    assert "absent.nii.gz" in err and "does not exist" in err
    analysis.write_text(analysis.read_text().replace("absent.nii.gz", "t1.png"))
    assert main(["check", str(analysis)]) == 1
    assert "must name a NIfTI file" in capsys.readouterr().err
