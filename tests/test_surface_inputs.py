"""`groupsrc check` on surface cohorts: clean, and copies broken in each listed way.

The acceptance rule for bad input (tests/test_check.py ``assert_refused``):
exit 1, no traceback, the culprit file / row / column named, every input file
byte-identical afterwards.  Expected counts in the clean case are read from
the fixture's files with nibabel (reference library), not from groupsrc.
The manifold rules are the definition of a closed triangulated 2-manifold
(every edge in two triangles; common practice).
"""

from __future__ import annotations

import shutil

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from _surface_fixture import (ATLAS_NAMES, N_T, make_surface_cohort, mesh, write_dtseries,
                              write_func, write_labels, write_mesh, write_shape)
from groupsrc.cli import main
from test_check import assert_refused


@pytest.fixture(scope="module")
def gifti_cohort(tmp_path_factory):
    return make_surface_cohort(tmp_path_factory.mktemp("sg") / "cohort", "gifti")


@pytest.fixture(scope="module")
def cifti_cohort(tmp_path_factory):
    return make_surface_cohort(tmp_path_factory.mktemp("sc") / "cohort", "cifti")


@pytest.fixture
def gcopy(gifti_cohort, tmp_path):
    shutil.copytree(gifti_cohort.parent, tmp_path / "c")
    return tmp_path / "c" / "analysis.toml"


@pytest.fixture
def ccopy(cifti_cohort, tmp_path):
    shutil.copytree(cifti_cohort.parent, tmp_path / "c")
    return tmp_path / "c" / "analysis.toml"


def _maps(analysis):
    return pd.read_csv(analysis.parent / "maps.tsv", sep="\t", dtype=str)


def _edit(analysis, old, new):
    text = analysis.read_text()
    assert old in text
    analysis.write_text(text.replace(old, new))


@pytest.mark.parametrize("fmt", ["gifti", "cifti"])
def test_clean_surface_cohort(fmt, gifti_cohort, cifti_cohort, capsys):
    analysis = gifti_cohort if fmt == "gifti" else cifti_cohort
    rc = main(["check", str(analysis)])
    text = capsys.readouterr().out
    assert rc == 0, text
    root = analysis.parent
    # expected counts from the files, read with nibabel
    mask = nib.load(str(root / "template" / "left.mask.shape.gii")).darrays[0].data
    n_left = int(np.count_nonzero(mask))
    n_right = nib.load(str(root / "template" / "right.surf.gii")).darrays[0].data.shape[0]
    n_lv = mask.shape[0]
    kind = "GIfTI" if fmt == "gifti" else "CIFTI-2"
    assert (f"  sources      : {n_left + n_right} vertices (left {n_left} of {n_lv}, right "
            f"{n_right} of {n_right}; maps as {kind})") in text.splitlines(), text
    assert f"  samples      : {N_T}, -8 to 12 ms every 4 ms" in text.splitlines(), text


def test_vertex_count_differs_from_mesh(gcopy, capsys):
    maps = _maps(gcopy)
    write_func(gcopy.parent / maps.path_left[2], np.zeros((150, N_T)), "left")
    assert_refused(gcopy, capsys, ["maps.tsv row 4 column 'path_left'",
                                   "has 150 values per sample; mesh_left has 162 vertices"])


def test_swapped_hemispheres(gcopy, capsys):
    maps = _maps(gcopy)
    maps.loc[3, ["path_left", "path_right"]] = maps.loc[3, ["path_right", "path_left"]].to_numpy()
    maps.to_csv(gcopy.parent / "maps.tsv", sep="\t", index=False)
    assert_refused(gcopy, capsys, ["maps.tsv row 5", "the hemispheres look swapped",
                                   "path_left has 642 values, as the right mesh",
                                   "swap the two files in this row"])


def test_file_of_the_other_hemisphere_by_its_mark(gcopy, capsys):
    maps = _maps(gcopy)
    data = nib.load(str(gcopy.parent / maps.path_left[0]))
    vals = np.column_stack([d.data for d in data.darrays])
    write_func(gcopy.parent / maps.path_left[0], vals, "right")     # marked CortexRight
    assert_refused(gcopy, capsys, ["maps.tsv row 2 column 'path_left'",
                                   "marks itself as the right hemisphere"])


def test_mesh_with_a_hole_is_refused_unless_declared_open(gcopy, capsys):
    v, f, _ = mesh("right")
    write_mesh(gcopy.parent / "template" / "right.surf.gii", v, f[1:], "right")
    assert_refused(gcopy, capsys, ["right.surf.gii (mesh_right)",
                                   "3 edge(s) belong to one triangle only",
                                   "set mesh_closed = false"])
    _edit(gcopy, "[model]", "mesh_closed = false\n[model]")
    assert main(["check", str(gcopy)]) == 0, capsys.readouterr().out


def test_non_manifold_mesh_is_refused_even_when_open(gcopy, capsys):
    v, f, _ = mesh("left")
    extra = np.array([[f[0, 0], f[0, 1], 100]])        # a third triangle on one edge
    write_mesh(gcopy.parent / "template" / "left.surf.gii", v, np.r_[f, extra], "left")
    _edit(gcopy, "[model]", "mesh_closed = false\n[model]")
    assert_refused(gcopy, capsys, ["left.surf.gii (mesh_left)",
                                   "shared by more than two triangles"])


def test_hemispheres_with_different_samples(gcopy, capsys):
    maps = _maps(gcopy)
    write_func(gcopy.parent / maps.path_right[1], np.ones((642, N_T + 1)), "right")
    assert_refused(gcopy, capsys, ["maps.tsv row 3", "different numbers of samples",
                                   "left 6, right 7"])


def test_nan_at_a_source_but_not_outside_the_mask(gcopy, capsys):
    maps = _maps(gcopy)
    path = gcopy.parent / maps.path_left[5]
    vals = np.column_stack([d.data for d in nib.load(str(path)).darrays])
    outside = np.flatnonzero(nib.load(str(gcopy.parent / "template" / "left.mask.shape.gii"))
                             .darrays[0].data == 0)
    vals[outside[0], 2] = np.nan
    write_func(path, vals, "left")
    assert main(["check", str(gcopy)]) == 0, capsys.readouterr().out
    vals[0, 1] = np.nan
    write_func(path, vals, "left")
    assert_refused(gcopy, capsys, ["maps.tsv row 7", "1 NaN/Inf value(s) at sources"])


def test_gifti_needs_time_start_and_interval(gcopy, capsys):
    _edit(gcopy, "time_start = -0.008\n", "")
    assert_refused(gcopy, capsys, ["[cohort]", "time_start required: GIfTI maps carry no "
                                   "time axis"])


def test_neighbour_kind_of_a_volume_on_a_surface(gcopy, capsys):
    _edit(gcopy, "forming_p = 0.05", 'forming_p = 0.05\nneighbors = "face"')
    assert_refused(gcopy, capsys, ["[inference] neighbors",
                                   "'face' is not a neighbour kind of a surface source space",
                                   'use neighbors = "edge"'])


def test_mask_and_atlas_on_another_mesh(gcopy, capsys):
    write_shape(gcopy.parent / "template" / "left.mask.shape.gii", np.ones(642), "left")
    names = dict(ATLAS_NAMES)
    names[2] = "middle"
    v = mesh("right")[0]
    write_labels(gcopy.parent / "template" / "right.label.gii", np.where(v[:, 1] > 0, 1, 2),
                 names, "right")
    assert_refused(gcopy, capsys, ["left.mask.shape.gii (mask_left)",
                                   "has 642 values; mesh_left has 162 vertices",
                                   "right.label.gii (atlas_right)",
                                   "label 2 is 'middle' here but 'back'"])


def test_every_problem_at_once(gcopy, capsys):
    maps = _maps(gcopy)
    write_func(gcopy.parent / maps.path_left[2], np.zeros((150, N_T)), "left")
    write_func(gcopy.parent / maps.path_right[1], np.ones((642, N_T + 1)), "right")
    vals = np.random.default_rng(0).standard_normal((162, N_T))
    vals[0, 0] = np.inf
    write_func(gcopy.parent / maps.path_left[6], vals, "left")
    _edit(gcopy, "sampling_interval = 0.004\n", "")
    assert_refused(gcopy, capsys, ["row 4 column 'path_left'", "row 3",
                                   "different numbers of samples", "row 8",
                                   "NaN/Inf value(s) at sources", "sampling_interval required"])


def test_per_hemisphere_table_without_a_mesh(gcopy, capsys):
    _edit(gcopy, 'mesh_left = "template/left.surf.gii"\nmesh_right = "template/right.surf.gii"\n'
          'mask_left = "template/left.mask.shape.gii"\natlas_left = "template/left.label.gii"\n'
          'atlas_right = "template/right.label.gii"\n', "")
    assert_refused(gcopy, capsys, ["maps.tsv", "names one file per hemisphere",
                                   "give mesh_left / mesh_right"])


def test_surface_keys_need_their_mesh_and_volume_keys_are_refused(gcopy, capsys):
    _edit(gcopy, 'mesh_right = "template/right.surf.gii"\n', 'mask = "mask.nii.gz"\n')
    assert_refused(gcopy, capsys, ["[cohort] atlas_right", "is given without mesh_right",
                                   "[cohort] mask", "is a volume key",
                                   "column 'path_right'", "gives no mesh_right"])


def test_volume_analysis_given_a_gifti_map(tiny_cohort, capsys):
    root = tiny_cohort.parent
    maps = pd.read_csv(root / "maps.tsv", sep="\t", dtype=str)
    write_func(root / "maps" / "odd.func.gii", np.zeros((10, 9)))
    maps.loc[0, "path"] = "maps/odd.func.gii"
    maps.to_csv(root / "maps.tsv", sep="\t", index=False)
    assert_refused(tiny_cohort, capsys, ["maps.tsv row 2", "odd.func.gii",
                                         "is a GIfTI surface map, but the analysis file names "
                                         "no template mesh"])


def test_cifti_time_axis_and_vertices_must_agree(ccopy, capsys):
    maps = _maps(ccopy)
    rng = np.random.default_rng(5)
    data = {h: rng.standard_normal((mesh(h)[0].shape[0], N_T)) for h in ("left", "right")}
    full = {h: np.ones(mesh(h)[0].shape[0], bool) for h in ("left", "right")}
    from _surface_fixture import medial_mask
    present = {"left": medial_mask("left"), "right": full["right"]}
    write_dtseries(ccopy.parent / maps.path[1], data, present, t0=0.1)
    write_dtseries(ccopy.parent / maps.path[2], data, full)
    assert_refused(ccopy, capsys, ["maps.tsv row 3", "time axis (6 samples from 100 ms every "
                                   "4 ms) differs from most maps'", "maps.tsv row 4",
                                   "holds 162 left vertices, most maps 143: it has 19 "
                                   "vertices most maps lack"])


def test_gifti_file_in_a_cifti_table(ccopy, capsys):
    maps = _maps(ccopy)
    write_func(ccopy.parent / "maps" / "one.func.gii", np.zeros((162, N_T)), "left")
    maps.loc[0, "path"] = "maps/one.func.gii"
    maps.to_csv(ccopy.parent / "maps.tsv", sep="\t", index=False)
    assert_refused(ccopy, capsys, ["maps.tsv row 2", "is a GIfTI file (one hemisphere), not "
                                   "what this column holds", "path_left / path_right"])


@pytest.mark.parametrize("suffix,kind", [(".dscalar.nii", "dense scalar"),
                                         (".dlabel.nii", "dense label")])
def test_cifti_file_that_is_not_a_time_series(ccopy, capsys, suffix, kind):
    """File kinds by the name endings of the CIFTI-2 standard (common practice): a dense
    scalar or label file is refused before it is opened (never read as a NIfTI volume)."""
    maps = _maps(ccopy)
    src = ccopy.parent / maps.loc[0, "path"]
    shutil.copy(src, ccopy.parent / "maps" / f"one{suffix}")
    maps.loc[0, "path"] = f"maps/one{suffix}"
    maps.to_csv(ccopy.parent / "maps.tsv", sep="\t", index=False)
    assert_refused(ccopy, capsys, ["maps.tsv row 2", f"is a CIFTI-2 {kind} file",
                                   ".dtseries.nii"])


def test_volume_analysis_given_a_cifti_scalar_file(tiny_cohort, capsys, tmp_path):
    """The same refusal on a volume cohort, instead of a NIfTI reading error."""
    analysis = tmp_path / "c" / "analysis.toml"
    shutil.copytree(tiny_cohort.parent, analysis.parent)
    maps = pd.read_csv(analysis.parent / "maps.tsv", sep="\t")
    shutil.copy(analysis.parent / maps.loc[0, "path"], analysis.parent / "x.dscalar.nii")
    maps.loc[0, "path"] = "x.dscalar.nii"
    maps.to_csv(analysis.parent / "maps.tsv", sep="\t", index=False)
    assert_refused(analysis, capsys, ["x.dscalar.nii", "is a CIFTI-2 dense scalar file"])


def test_same_file_for_two_hemispheres(gcopy, capsys):
    maps = _maps(gcopy)
    maps.loc[4, "path_right"] = maps.loc[5, "path_right"]
    maps.to_csv(gcopy.parent / "maps.tsv", sep="\t", index=False)
    assert_refused(gcopy, capsys, ["row 6 column 'path_right', row 7 column 'path_right'",
                                   "the same file"])
