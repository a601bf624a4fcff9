"""``groupsrc followup --mask`` on surface results: GIfTI masks per hemisphere, CIFTI-2 masks.

Outside reference: nibabel reads the input maps and numpy takes the mean over
the region's source x sample points, with the region worked out here from the
mask definitions and the cohort's own input files (its source mask, the
fixture's time axis), not from groupsrc.  The refusals are checked by the file
each one names.  Volume results and NIfTI masks are tested in
test_mixed_pipeline (where a GIfTI or CIFTI-2 mask on volume results is refused
too) and test_mixed_scale (a NIfTI mask on a surface).

The cohorts are the tiny random ones of _surface_fixture / _cifti_volume_fixture
(162-vertex left, 642-vertex right icosphere; the left hemisphere's medial cap
is no source); the random values are never check values.
"""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from nibabel import cifti2

from _cifti_volume_fixture import RIGHT_PART, make_volume_cohort, part_voxels
from _surface_fixture import (DT, N_T, STRUCTURE, T0, make_surface_cohort, medial_mask, mesh,
                              write_labels, write_mesh, write_shape)
from groupsrc.cli import main

#: the --window of the tests, and the samples it holds (fixture time axis T0 + DT * k)
WINDOW = (0.0, 0.008)
TIMES = T0 + DT * np.arange(N_T)
SAMPLES = np.flatnonzero((TIMES >= WINDOW[0] - 1e-9) & (TIMES <= WINDOW[1] + 1e-9))


def _run(root, fmt):
    if fmt == "gifti":
        analysis = make_surface_cohort(root / "cohort", "gifti")
    else:
        analysis = make_volume_cohort(root / "cohort")
    out = root / "results"
    assert main(["run", str(analysis), "--out", str(out), "--quiet"]) == 0
    return root / "cohort", out


@pytest.fixture(scope="module")
def gifti_run(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("fu_gifti"), "gifti")


@pytest.fixture(scope="module")
def cifti_run(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("fu_cifti"), "cifti")


def _followup(results, out, masks, *more):
    args = ["followup", str(results), "--out", str(out)]
    for m in masks:
        args += ["--mask", str(m)]
    return main(args + [str(a) for a in more])


def _gifti_data(path):
    """(V, T) of a GIfTI map, one data array per sample (nibabel)."""
    return np.column_stack([np.asarray(d.data, np.float64) for d in nib.load(str(path)).darrays])


# ----------------------------------------------------------------------------
# GIfTI results
# ----------------------------------------------------------------------------

def _each_problem_on_its_file_line(err, expect):
    """Every file of ``expect`` has a problem line naming it, with each fragment."""
    lines = err.splitlines()
    for name, fragments in expect.items():
        mine = [ln for ln in lines if f"{name}:" in ln]
        assert mine, (name, err)
        for f in fragments:
            assert any(f in ln for ln in mine), (name, f, err)

@pytest.mark.filterwarnings("ignore")
def test_gifti_masks_give_the_region_means_nibabel_reads(gifti_run, tmp_path, capsys):
    """Left: a shape file with no metadata, its hemisphere from '.left.' in the name,
    marking some medial-cap vertices (no sources: left out with a note).  Right: a label
    file named without a hemisphere, its hemisphere from AnatomicalStructurePrimary."""
    cohort, results = gifti_run
    unit = {h: mesh(h)[2] for h in ("left", "right")}
    mark = {"left": unit["left"][:, 1] > 0.3, "right": unit["right"][:, 2] < -0.2}
    write_shape(tmp_path / "patch.left.shape.gii", np.where(mark["left"], 2.5, 0.0))
    write_labels(tmp_path / "patch_r.label.gii", np.where(mark["right"], 7, 0),
                 {0: "none", 7: "patch"}, "right")
    # the sources: the cohort's own mask on the left (an input file), every vertex on the
    # right (no mask given there; the fixture's random maps are finite and nonzero)
    source = {"left": nib.load(str(cohort / "template" / "left.mask.shape.gii")).darrays[0].data
              > 0, "right": np.ones(unit["right"].shape[0], bool)}
    region = {h: mark[h] & source[h] for h in mark}
    left_out = int((mark["left"] & ~source["left"]).sum())
    assert left_out > 0 and all(region[h].any() for h in region)     # the test can bite

    fu = tmp_path / "fu"
    rc = _followup(results, fu, [tmp_path / "patch.left.shape.gii",
                                 tmp_path / "patch_r.label.gii"], "--window", *WINDOW)
    text = capsys.readouterr()
    assert rc == 0, text.err
    assert f"{left_out} marked vertices are not sources" in text.out
    maps = pd.read_csv(cohort / "maps.tsv", sep="\t")
    expect = []
    for _, row in maps.iterrows():
        vals = [_gifti_data(cohort / row[f"path_{h}"])[region[h]][:, SAMPLES].ravel()
                for h in ("left", "right")]
        expect.append(np.concatenate(vals).mean())
    means = pd.read_csv(fu / "region_means.tsv", sep="\t")
    assert list(means.participant_id) == list(maps.participant_id)
    np.testing.assert_allclose(means["value"], expect, rtol=1e-5, atol=1e-7)
    regions = pd.read_csv(fu / "regions.tsv", sep="\t")
    assert regions.loc[0, "n_sources"] == sum(int(r.sum()) for r in region.values())
    assert regions.loc[0, "n_samples"] == SAMPLES.size
    assert regions.loc[0, "origin"] == "mask"


def _garbage(path):
    path.write_bytes(b"<?xml version='1.0'?><GIFTI><DataArray")
    return path


def test_bad_masks_on_gifti_results_are_all_named(gifti_run, tmp_path, capsys):
    """Every bad file in one call: each problem on the line that names its file."""
    _, results = gifti_run
    n_left, n_right = mesh("left")[0].shape[0], mesh("right")[0].shape[0]
    cap = ~medial_mask("left")                                       # no source there
    t = tmp_path
    write_shape(t / "nameless.shape.gii", np.ones(n_left))           # no hemisphere at all
    write_shape(t / "big.left.shape.gii", np.ones(n_right))          # right's vertex count
    write_shape(t / "cap.left.shape.gii", cap.astype(float))         # marks no source
    write_shape(t / "zeros.right.shape.gii", np.zeros(n_right))      # marks nothing
    write_shape(t / "mixed.left.shape.gii", np.ones(n_right), "right")   # name vs metadata
    write_shape(t / "a.right.shape.gii", np.ones(n_right))           # right twice: a, b
    write_shape(t / "b.right.shape.gii", np.ones(n_right))
    nib.save(nib.Nifti1Image(np.ones((3, 3, 3), np.uint8), np.eye(4)), str(t / "vol.nii.gz"))
    write_mesh(t / "mesh.left.surf.gii", *mesh("left")[:2], "left")   # a mesh, not values
    masks = ["mesh.left.surf.gii", "nameless.shape.gii", "big.left.shape.gii", "cap.left.shape.gii",
             "zeros.right.shape.gii", "mixed.left.shape.gii", "a.right.shape.gii",
             "b.right.shape.gii", "vol.nii.gz", _garbage(t / "broken.left.shape.gii").name,
             "missing.left.shape.gii"]
    rc = _followup(results, t / "fu", [t / m for m in masks])
    err = capsys.readouterr().err
    assert rc == 1 and "Traceback" not in err and not (t / "fu").exists()
    expect = {"mesh.left.surf.gii": ["is a mesh file"],
              "nameless.shape.gii": ["which hemisphere", "REGION.left.shape.gii"],
              "big.left.shape.gii": [f"{n_right} values", f"{n_left} vertices"],
              "cap.left.shape.gii": ["none of them a source", "source_mask.left.shape.gii"],
              "zeros.right.shape.gii": ["marks no vertex", "nonzero"],
              "mixed.left.shape.gii": ["says right", "name says left"],
              "b.right.shape.gii": ["right hemisphere again", "a.right.shape.gii"],
              "vol.nii.gz": ["NIfTI", "surface", "dscalar"],
              "broken.left.shape.gii": ["cannot be read as GIfTI"],
              "missing.left.shape.gii": ["not found"]}
    _each_problem_on_its_file_line(err, expect)
    assert f"{len(expect)} problems found" in err


# ----------------------------------------------------------------------------
# CIFTI-2 results (two cortex surfaces and two volume parts)
# ----------------------------------------------------------------------------

def _scalar_file(path, models, values, rows=1):
    img = cifti2.Cifti2Image(np.tile(np.asarray(values, np.float32), (rows, 1)),
                             cifti2.Cifti2Header.from_axes(
                                 (cifti2.ScalarAxis([f"m{i}" for i in range(rows)]), models)))
    img.to_filename(str(path))
    return path


@pytest.mark.filterwarnings("ignore")
def test_cifti_mask_gives_the_region_means_nibabel_reads(cifti_run, tmp_path, capsys):
    """A dense scalar file on brain models of its own: every vertex of both meshes (the
    left medial cap is no source: left out with a note) and the right part's voxels in
    reverse order (matched by voxel index, not by position)."""
    cohort, results = cifti_run
    n = {h: mesh(h)[0].shape[0] for h in ("left", "right")}
    unit = {h: mesh(h)[2] for h in ("left", "right")}
    vox = part_voxels()[RIGHT_PART][::-1]
    models = (cifti2.BrainModelAxis.from_surface(np.arange(n["left"]), n["left"],
                                                 STRUCTURE["left"])
              + cifti2.BrainModelAxis.from_surface(np.arange(n["right"]), n["right"],
                                                   STRUCTURE["right"]))
    first = nib.load(str(cohort / pd.read_csv(cohort / "maps.tsv", sep="\t").path[0]))
    affine, shape = first.header.get_axis(1).affine, first.header.get_axis(1).volume_shape
    models = models + cifti2.BrainModelAxis(name=[RIGHT_PART] * len(vox), voxel=vox,
                                            affine=affine, volume_shape=shape)
    mark_v = {"left": unit["left"][:, 1] > 0.2, "right": unit["right"][:, 1] > 0.6}
    mark_x = vox[:, 2] < 2                                       # voxels with k < 2
    _scalar_file(tmp_path / "roi.dscalar.nii", models,
                 np.r_[mark_v["left"], mark_v["right"], mark_x].astype(float))
    source = {"left": medial_mask("left"), "right": np.ones(n["right"], bool)}  # the cohort's
    region_v = {h: mark_v[h] & source[h] for h in mark_v}
    region_x = {tuple(ijk) for ijk in vox[mark_x]}
    left_out = int((mark_v["left"] & ~source["left"]).sum())
    assert left_out > 0 and region_x and all(r.any() for r in region_v.values())

    fu = tmp_path / "fu"
    rc = _followup(results, fu, [tmp_path / "roi.dscalar.nii"], "--window", *WINDOW)
    text = capsys.readouterr()
    assert rc == 0, text.err
    assert f"{left_out} marked vertices or voxels are not sources" in text.out
    maps = pd.read_csv(cohort / "maps.tsv", sep="\t")
    cortex = {cifti2.BrainModelAxis.to_cifti_brain_structure_name(STRUCTURE[h]): h
              for h in ("left", "right")}
    expect = []
    for p in maps.path:
        img = nib.load(str(cohort / p))
        data = np.asarray(img.dataobj, np.float64)[SAMPLES]          # (samples, columns)
        cols = []
        for name, slc, bm in img.header.get_axis(1).iter_structures():
            if name in cortex:
                cols += list(slc.start + np.flatnonzero(region_v[cortex[name]][bm.vertex]))
            elif name == RIGHT_PART:
                cols += [slc.start + j for j, ijk in enumerate(bm.voxel)
                         if tuple(ijk) in region_x]
        expect.append(data[:, cols].mean())
    means = pd.read_csv(fu / "region_means.tsv", sep="\t")
    np.testing.assert_allclose(means["value"], expect, rtol=1e-5, atol=1e-7)
    regions = pd.read_csv(fu / "regions.tsv", sep="\t")
    assert regions.loc[0, "n_sources"] == sum(int(r.sum()) for r in region_v.values()) \
        + len(region_x)


def test_bad_cifti_masks_are_all_named(cifti_run, tmp_path, capsys):
    cohort, results = cifti_run
    n_left = mesh("left")[0].shape[0]
    left = cifti2.BrainModelAxis.from_surface(np.arange(n_left), n_left, STRUCTURE["left"])
    wrong = cifti2.BrainModelAxis.from_surface(np.arange(n_left), n_left + 1, STRUCTURE["left"])
    t = tmp_path
    _scalar_file(t / "two.dscalar.nii", left, np.ones(n_left), rows=2)
    _scalar_file(t / "count.dscalar.nii", wrong, np.ones(n_left))
    _scalar_file(t / "cap.dscalar.nii", left, (~medial_mask("left")).astype(float))
    (t / "broken.dlabel.nii").write_bytes(b"\0" * 100)
    rc = _followup(results, t / "fu", [t / m for m in ("two.dscalar.nii", "count.dscalar.nii",
                                                       "cap.dscalar.nii", "broken.dlabel.nii")])
    err = capsys.readouterr().err
    assert rc == 1 and "Traceback" not in err and not (t / "fu").exists()
    expect = {"two.dscalar.nii": ["holds 2 maps"],
              "count.dscalar.nii": [f"{n_left + 1} vertices", f"{n_left}"],
              "cap.dscalar.nii": ["none of them a source"],
              "broken.dlabel.nii": ["cannot be read as CIFTI-2"]}
    _each_problem_on_its_file_line(err, expect)
