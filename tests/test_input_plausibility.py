"""Inputs that are readable but wrong: maps copied under other bytes, contrast names that
would break the outputs, meshes not in millimetres, CIFTI-2 files with other vertices,
transposed GIfTI arrays; and the plural of one source in follow-up texts.

Broken copies of the tiny cohorts must exit 1 (check and run), name the culprit, and
leave every input unchanged (test_check.assert_refused).  Files are written and read
with nibabel (reference library for NIfTI-1, GIfTI 1.0 and CIFTI-2).  Mesh extents:
a human hemisphere spans about 170 mm (common practice); the fixture mesh spans 80 mm.
"""

import gzip
import shutil

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from _surface_fixture import N_T, make_surface_cohort, mesh, write_dtseries, write_mesh
from conftest import copy_cohort
from groupsrc.cli import main
from test_check import assert_refused


@pytest.fixture
def cohort_copy(tiny_cohort, tmp_path):
    return copy_cohort(tiny_cohort, tmp_path / "broken")


@pytest.fixture(scope="module")
def gifti_cohort(tmp_path_factory):
    return make_surface_cohort(tmp_path_factory.mktemp("sg"), "gifti")


@pytest.fixture(scope="module")
def cifti_cohort(tmp_path_factory):
    return make_surface_cohort(tmp_path_factory.mktemp("sc"), "cifti")


def _copy(analysis, tmp_path):
    shutil.copytree(analysis.parent, tmp_path / "c")
    return tmp_path / "c" / "analysis.toml"


def _maps(analysis):
    return pd.read_csv(analysis.parent / "maps.tsv", sep="\t", dtype=str)


def _save_maps(analysis, maps):
    maps.to_csv(analysis.parent / "maps.tsv", sep="\t", index=False)


# ----------------------------------------------------------------------------
# the same map under other bytes
# ----------------------------------------------------------------------------

def test_a_map_saved_again_as_nii_is_a_duplicate(cohort_copy, tmp_path, capsys):
    root = cohort_copy.parent
    maps = _maps(cohort_copy)
    # row 4 of the sheet (index 2: sub-02 rare) becomes sub-01 rare's map saved as .nii
    img = nib.load(str(root / maps.path[0]))
    nib.save(nib.Nifti1Image(np.asarray(img.dataobj), img.affine, img.header),
             str(root / "maps" / "copy.nii"))
    maps.loc[2, "path"] = "maps/copy.nii"
    _save_maps(cohort_copy, maps)
    assert (root / "maps" / "copy.nii").read_bytes() != (root / maps.path[0]).read_bytes()
    assert_refused(cohort_copy, capsys, ["maps.tsv rows 2, 4", maps.path[0], "maps/copy.nii",
                                         "same data once decoded",
                                         "participant 'sub-01' condition 'rare'",
                                         "participant 'sub-02' condition 'rare'"],
                   out=tmp_path / "out")


def test_a_map_compressed_again_is_a_duplicate(cohort_copy, tmp_path, capsys):
    root = cohort_copy.parent
    maps = _maps(cohort_copy)
    raw = gzip.decompress((root / maps.path[1]).read_bytes())
    (root / "maps" / "again.nii.gz").write_bytes(gzip.compress(raw, compresslevel=9))
    maps.loc[5, "path"] = "maps/again.nii.gz"
    _save_maps(cohort_copy, maps)
    assert_refused(cohort_copy, capsys, ["maps.tsv rows 3, 7", "same data once decoded"],
                   out=tmp_path / "out")


def test_a_gifti_map_encoded_otherwise_is_a_duplicate(gifti_cohort, tmp_path, capsys):
    analysis = _copy(gifti_cohort, tmp_path)
    root = analysis.parent
    maps = _maps(analysis)
    # row 3 (index 1) gets row 2's two files, re-encoded as uncompressed base64
    for hemi in ("left", "right"):
        img = nib.load(str(root / maps.loc[0, f"path_{hemi}"]))
        for d in img.darrays:
            d.encoding = "B64BIN"
        nib.save(img, str(root / "maps" / f"again.{hemi}.func.gii"))
        maps.loc[1, f"path_{hemi}"] = f"maps/again.{hemi}.func.gii"
    _save_maps(analysis, maps)
    assert_refused(analysis, capsys, ["maps.tsv rows 2, 3", "same data once decoded",
                                      "maps/again.left.func.gii + maps/again.right.func.gii"])


def test_distinct_maps_pass(tiny_cohort, capsys):
    assert main(["check", str(tiny_cohort)]) == 0
    assert "decoded" not in capsys.readouterr().out


# ----------------------------------------------------------------------------
# contrast names
# ----------------------------------------------------------------------------

def test_a_contrast_named_like_the_model_folder_is_refused(cohort_copy, tmp_path, capsys):
    body = cohort_copy.read_text().replace('name = "age_slope"', 'name = "Model"')
    cohort_copy.write_text(body)
    assert_refused(cohort_copy, capsys, ["contrast 'Model'", "a folder every results folder",
                                         "choose another name"], out=tmp_path / "out")


def test_the_reserved_folders_are_those_the_writer_makes():
    from groupsrc.inputs.settings import RESULT_FOLDERS
    from groupsrc.outputs import layout
    assert set(RESULT_FOLDERS) == {layout.MODEL_DIR}


def test_a_300_character_name_is_refused(cohort_copy, tmp_path, capsys):
    name = "x" * 300
    body = cohort_copy.read_text().replace('name = "age_slope"', f'name = "{name}"')
    cohort_copy.write_text(body)
    text = assert_refused(cohort_copy, capsys, ["name is 300 characters long; at most 64",
                                                "x" * 40 + "..."], out=tmp_path / "out")
    assert name not in text                      # the message stays readable


# ----------------------------------------------------------------------------
# meshes not in millimetres
# ----------------------------------------------------------------------------

@pytest.mark.parametrize("scale,guess", [(1000.0, "micrometres: divide them by 1000"),
                                         (0.001, "metres: multiply them by 1000")])
def test_a_mesh_in_other_units_is_refused(gifti_cohort, tmp_path, capsys, scale, guess):
    analysis = _copy(gifti_cohort, tmp_path)
    v, f, _ = mesh("left")
    span = float(np.max(np.ptp(v, axis=0)))
    assert 5 <= span <= 1000                       # the fixture's own mesh passes
    write_mesh(analysis.parent / "template" / "left.surf.gii", v * scale, f, "left")
    assert_refused(analysis, capsys, ["left.surf.gii (mesh_left)",
                                      f"span {span * scale:.4g} units", "implausible", guess])


# ----------------------------------------------------------------------------
# CIFTI-2 vertices, transposed GIfTI arrays
# ----------------------------------------------------------------------------

def test_a_cifti_file_with_other_vertices_of_the_same_count(cifti_cohort, tmp_path, capsys):
    from _surface_fixture import medial_mask
    analysis = _copy(cifti_cohort, tmp_path)
    maps = _maps(analysis)
    n_left = mesh("left")[0].shape[0]
    usual = medial_mask("left")
    other = np.zeros(n_left, bool)
    keep = np.flatnonzero(usual)[3:]                       # drop 3 of the usual vertices
    add = np.flatnonzero(~usual)[:3]                       # take 3 medial ones instead
    other[keep] = other[add] = True
    assert other.sum() == usual.sum()
    rng = np.random.default_rng(1)
    data = {h: rng.standard_normal((mesh(h)[0].shape[0], N_T)) for h in ("left", "right")}
    present = {"left": other, "right": np.ones(mesh("right")[0].shape[0], bool)}
    write_dtseries(analysis.parent / maps.path[2], data, present)
    missing = ", ".join(str(i) for i in np.flatnonzero(usual)[:3])
    extra = ", ".join(str(i) for i in add)
    assert_refused(analysis, capsys, [
        "maps.tsv row 4", f"holds {usual.sum()} left vertices, as most maps do, but not the "
        "same ones", f"3 of most maps' vertices are not in it (e.g. {missing})",
        f"it has 3 vertices most maps lack (e.g. {extra})"])


@pytest.mark.parametrize("layout", ["matrix", "arrays"])
def test_a_transposed_gifti_map_gets_a_hint(gifti_cohort, tmp_path, capsys, layout):
    from nibabel.gifti import GiftiDataArray, GiftiImage
    analysis = _copy(gifti_cohort, tmp_path)
    root = analysis.parent
    maps = _maps(analysis)
    n = mesh("left")[0].shape[0]
    data = np.zeros((N_T, n), np.float32)                   # samples x vertices
    if layout == "matrix":
        arrays = [GiftiDataArray(data, intent="NIFTI_INTENT_TIME_SERIES",
                                 datatype="NIFTI_TYPE_FLOAT32")]
        hint = f"its one data array is {N_T} x {n}: it looks transposed"
    else:
        arrays = [GiftiDataArray(np.ascontiguousarray(data[:, j]),
                                 intent="NIFTI_INTENT_TIME_SERIES",
                                 datatype="NIFTI_TYPE_FLOAT32") for j in range(n)]
        hint = f"it holds {n} data arrays of {N_T} values: one array per vertex"
    nib.save(GiftiImage(darrays=arrays), str(root / maps.path_left[1]))
    assert_refused(analysis, capsys, ["maps.tsv row 3 column 'path_left'",
                                      f"has {N_T} values per sample", hint])


# ----------------------------------------------------------------------------
# follow-up texts
# ----------------------------------------------------------------------------

def test_a_region_of_one_source_says_one_source(tiny_cohort, tmp_path):
    out = tmp_path / "res"
    assert main(["run", str(tiny_cohort), "--out", str(out), "--resamples", "20",
                 "--quiet"]) == 0
    mask = nib.load(str(out / "source_mask.nii.gz"))
    one = np.zeros(mask.shape, np.uint8)
    one[tuple(np.argwhere(np.asarray(mask.dataobj) > 0)[0])] = 1
    nib.save(nib.Nifti1Image(one, mask.affine), str(tmp_path / "one.nii.gz"))
    assert main(["followup", str(out), "--mask", str(tmp_path / "one.nii.gz"),
                 "--out", str(tmp_path / "fu")]) == 0
    regions = pd.read_csv(tmp_path / "fu" / "regions.tsv", sep="\t")
    text = regions.loc[regions["origin"] == "mask", "description"].iloc[0]
    assert "1 source," in text and "1 sources" not in text, text


def test_empty_maps_are_named_as_such(cohort_copy, tmp_path, capsys):
    root = cohort_copy.parent
    maps = _maps(cohort_copy)
    for k in (0, 3):
        img = nib.load(str(root / maps.path[k]))
        empty = nib.Nifti1Image(np.zeros(img.shape, np.float32), img.affine, img.header)
        empty.header["descrip"] = f"map {k}".encode()        # the files' bytes differ
        nib.save(empty, str(root / maps.path[k]))
    assert_refused(cohort_copy, capsys, ["maps.tsv rows 2, 5", "every value 0: an empty "
                                         "estimate?"], out=tmp_path / "out")


def test_tiny_maps_are_not_compared_by_content(tmp_path, capsys):
    """A handful of values can coincide by chance (as equal weighings do in the dietox
    test); such maps are not compared by content, only by file."""
    from groupsrc.inputs.cohort import MIN_CONTENT_POINTS, same_content
    small = np.zeros((3, 2, 1), np.float32)
    assert small[0].size < MIN_CONTENT_POINTS and same_content(small) == []
    big = np.zeros((3, 8, 8), np.float32)
    big[2] += 1
    assert same_content(big) == [[0, 1]]
