"""CIFTI-2 volume parts: voxels of subcortical structures as sources beside the cortex.

Outside references, named beside each check:
- CIFTI-2 specification (2014): a brain-model axis lists, per structure, the
  vertices of a surface or the voxel indices (i, j, k) of a volume part, with
  one volume shape and voxel -> world affine for all volume parts; label
  tables per map; series axis (start, step, unit); NIfTI-2 intents
  CONNECTIVITY_DENSE_SERIES 3002, _SCALARS 3006, _LABELS 3007.  Files are
  written and read with ``nibabel.cifti2`` (reference library);
- world coordinates of a voxel: affine @ (i, j, k, 1) (NIfTI-1 / CIFTI-2);
- connected components: ``scipy.sparse.csgraph.connected_components`` on a
  graph built here from the triangle lists (mesh edges) and, per structure,
  ``scipy.ndimage.generate_binary_structure(3, 1)`` (face neighbours), x
  adjacent samples (reference libraries; space-time clusters as in Maris &
  Oostenveld 2007);
- PNG signature (PNG specification, section 5.2).
Data are random numbers (and, for the end-to-end run, an effect added at one
structure's voxels); every expected value is computed from the written
files or the references above, not taken from groupsrc.
"""

from __future__ import annotations

import json
import shutil

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from nibabel import cifti2
from scipy import ndimage, sparse
from scipy.sparse.csgraph import connected_components

from _cifti_volume_fixture import (AFFINE, EFFECT_SAMPLES, LEFT_PART, RIGHT_PART, SHAPE,
                                   make_volume_cohort, part_voxels)
from groupsrc import formats
from groupsrc.cli import main
from groupsrc.formats import cifti
from groupsrc.formats.surface_maps import SurfaceMaps
from groupsrc.outputs import build_report
from groupsrc.sources import Hemisphere, SurfaceMesh, TimeAxis, VoxelParts
from groupsrc.sources.surface import icosphere
from groupsrc.stats.corrections.clusters import label_clusters
from test_check import assert_refused

TIME = TimeAxis(-0.05, 0.004, 5)


def _space():
    v, f = icosphere(2)
    left = Hemisphere.from_arrays("left", 40 * v - [45, 0, 0], f, mask=v[:, 0] < 0.7)
    right = Hemisphere.from_arrays("right", 40 * v + [45, 0, 0], f)
    parts = VoxelParts.from_parts(AFFINE, SHAPE, list(part_voxels().items()))
    return SurfaceMesh((left, right), maps_format="cifti", voxels=parts)


# ----------------------------------------------------------------------------
# result files: round trip through nibabel
# ----------------------------------------------------------------------------

def test_series_keep_volume_parts_data_and_time_axis(tmp_path):
    space = _space()
    x = np.random.default_rng(0).standard_normal((space.n_sources, TIME.n)).astype(np.float32)
    maps = SurfaceMaps(space, TIME)
    [path] = maps.statistic(tmp_path, "statistic", x, "t", (11.0,), "c")
    img = nib.load(str(path))                                    # nibabel.cifti2 reads it
    assert img.nifti_header["intent_code"] == 3002               # CONNECTIVITY_DENSE_SERIES
    series, models = img.header.get_axis(0), img.header.get_axis(1)
    assert (series.unit, series.size) == ("SECOND", TIME.n)
    assert series.start == pytest.approx(TIME.t0) and series.step == pytest.approx(TIME.dt)
    np.testing.assert_allclose(models.affine, AFFINE)            # one volume for all parts
    assert tuple(models.volume_shape) == SHAPE
    data = np.asarray(img.dataobj)
    seen, expected = [], part_voxels()
    for name, slc, bm in models.iter_structures():
        seen.append(name)
        if name in expected:
            assert bm.volume_mask.all()
            np.testing.assert_array_equal(bm.voxel, expected[name])
            rows = np.flatnonzero((space.labels().structure == name).to_numpy())
        else:
            h = space.hemisphere("left" if name.endswith("LEFT") else "right")
            assert bm.surface_mask.all() and bm.nvertices[name] == h.n_vertices
            np.testing.assert_array_equal(bm.vertex, h.sources)
            rows = np.arange(space.n_sources)[space.source_slice(h.name)]
        np.testing.assert_array_equal(data[:, slc].T, x[rows])
    assert seen == ["CIFTI_STRUCTURE_CORTEX_LEFT", "CIFTI_STRUCTURE_CORTEX_RIGHT", LEFT_PART,
                    RIGHT_PART]
    np.testing.assert_array_equal(maps.read(tmp_path, "statistic"), x)
    # the file read as an input gives the same parts, values and time axis
    h = formats.read_header(path)
    assert h.time_axis == TIME and list(h.voxels) == [LEFT_PART, RIGHT_PART]
    np.testing.assert_array_equal(space.from_vertices(cifti.read_data(h)), x)


def test_labels_scalars_and_the_saved_space(tmp_path):
    space = _space()
    labels = np.zeros((space.n_sources, TIME.n), np.int32)
    labels[space.voxel_slice.start:space.voxel_slice.start + 7, 1:3] = 4
    labels[:5, 0] = 1
    maps = SurfaceMaps(space, TIME)
    [path] = maps.labels(tmp_path, "clusters", labels, "c")
    img = nib.load(str(path))
    assert img.nifti_header["intent_code"] == 3007                # CONNECTIVITY_DENSE_LABELS
    assert img.header.get_axis(1) == cifti.brain_models(space)
    for table in img.header.get_axis(0).label:                    # one label table per map
        assert {k: v[0] for k, v in table.items()} == {0: "none", 1: "cluster 1", 4: "cluster 4"}
    np.testing.assert_array_equal(np.asarray(img.dataobj).T, labels)
    [spath] = maps.cluster_summary(tmp_path, "cluster_summary", labels.astype(float), labels,
                                   [4], "t", "c")
    simg = nib.load(str(spath))
    assert simg.nifti_header["intent_code"] == 3006               # DENSE_SCALARS
    np.testing.assert_allclose(simg.header.get_axis(1).affine, AFFINE)
    # the space files: meshes, masks, and every source's structure, read back for the report
    maps.write_space(tmp_path)
    struct = nib.load(str(tmp_path / "source_structures.dlabel.nii"))
    table = {k: v[0] for k, v in struct.header.get_axis(0).label[0].items()}
    names = [table[k] for k in np.asarray(struct.dataobj)[0]]
    models = struct.header.get_axis(1)
    assert names == [str(n) for n in models.name]                 # each source's own structure
    back = SurfaceMaps.read_space(tmp_path, TIME)
    assert back.format == "cifti" and back.space.voxels is not None
    assert back.space.voxels.names == (LEFT_PART, RIGHT_PART)
    np.testing.assert_array_equal(back.space.voxels.ijk, space.voxels.ijk)
    np.testing.assert_allclose(back.space.voxels.affine, AFFINE)
    np.testing.assert_array_equal(back.read(tmp_path, "clusters"), labels)


# ----------------------------------------------------------------------------
# clusters on the combined graph
# ----------------------------------------------------------------------------

def _reference_graph(space):
    """Mesh edges read off the triangle lists + per-structure ndimage face pairs."""
    rows, cols, start = [], [], 0
    for h in space.hemispheres:
        index = -np.ones(h.n_vertices, np.int64)
        index[h.sources] = start + np.arange(h.sources.size)
        e = np.concatenate([h.triangles[:, [0, 1]], h.triangles[:, [1, 2]],
                            h.triangles[:, [2, 0]]])
        e = e[(index[e] >= 0).all(axis=1)]
        rows.append(index[e[:, 0]])
        cols.append(index[e[:, 1]])
        start += h.sources.size
    struct = ndimage.generate_binary_structure(3, 1)             # 6-connectivity
    for name, ijk in part_voxels().items():
        index = -np.ones(SHAPE, np.int64)
        index[tuple(ijk.T)] = start + np.arange(len(ijk))
        for off in np.argwhere(struct) - 1:
            if not off.any():
                continue
            nb = ijk + off
            ok = ((nb >= 0) & (nb < SHAPE)).all(axis=1)
            b = index[tuple(nb[ok].T)]
            rows.append(index[tuple(ijk[ok][b >= 0].T)])
            cols.append(b[b >= 0])
        start += len(ijk)
    r, c = np.concatenate(rows), np.concatenate(cols)
    A = sparse.coo_matrix((np.ones(r.size), (r, c)), shape=(start, start))
    return ((A + A.T) > 0).astype(np.int8)


def _components(A, supra):
    S, T = supra.shape
    chain = sparse.diags([np.ones(T - 1), np.ones(T - 1)], [-1, 1], shape=(T, T))
    G = sparse.csr_matrix(sparse.kron(A, sparse.identity(T)) + sparse.kron(sparse.identity(S),
                                                                           chain))
    keep = np.flatnonzero(supra.ravel())
    n, lab = connected_components(G[keep][:, keep], directed=False)
    return n, keep, lab


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_clusters_equal_csgraph_components_on_mesh_and_voxels(seed):
    space = _space()
    rng = np.random.default_rng(seed)
    supra = rng.random((space.n_sources, 5)) < 0.4
    supra[space.voxel_slice] = rng.random((space.voxels.n_voxels, 5)) < 0.6
    lab, n = label_clusters(supra, space.adjacency())
    n_ref, keep, ref = _components(_reference_graph(space), supra)
    assert n == n_ref
    got = lab.ravel()[keep]
    assert np.all(got > 0) and np.all(lab.ravel()[~supra.ravel()] == 0)
    pairs = np.unique(np.column_stack([got, ref]), axis=0)
    assert len(pairs) == n == len(np.unique(pairs[:, 0])) == len(np.unique(pairs[:, 1]))


def test_touching_structures_stay_apart():
    """All voxels supra-threshold: each structure is one cluster, never the two joined."""
    space = _space()
    supra = np.zeros((space.n_sources, 2), bool)
    supra[space.voxel_slice] = True
    lab, n = label_clusters(supra, space.adjacency())
    assert n == 2
    per = {name: set(np.unique(lab[space.voxel_slice][space.voxels.part_slice(name)]))
           for name in space.voxels.names}
    assert all(len(v) == 1 for v in per.values()) and per[LEFT_PART] != per[RIGHT_PART]


# ----------------------------------------------------------------------------
# the command line: check and run on a cohort with an effect in one volume part
# ----------------------------------------------------------------------------

@pytest.fixture(scope="module")
def run(tmp_path_factory):
    root = tmp_path_factory.mktemp("cifti_vol")
    analysis = make_volume_cohort(root / "cohort", effect=5.0, effect_part=RIGHT_PART,
                                  atlas=False)
    out = root / "results"
    assert main(["run", str(analysis), "--out", str(out)]) == 0
    return analysis, out


def _written(out, stem, ext="dtseries"):
    img = nib.load(str(out / "rare_minus_frequent" / f"{stem}.{ext}.nii"))
    return np.asarray(img.dataobj).T, img.header.get_axis(1)


def test_check_lists_the_volume_parts(run, capsys):
    analysis, _ = run
    assert main(["check", str(analysis)]) == 0
    text = capsys.readouterr().out
    first = nib.load(str(analysis.parent / pd.read_csv(analysis.parent / "maps.tsv",
                                                       sep="\t").path[0]))
    parts = 0
    for name, _, bm in first.header.get_axis(1).iter_structures():    # counts via nibabel
        if bm.volume_mask.all():
            parts += 1
            assert f"  volume part  : {name} ({len(bm)} voxels)" in text.splitlines(), text
    assert parts == 2                                # the fixture's two volume parts


def test_result_maps_carry_the_inputs_brain_models(run):
    analysis, out = run
    first = analysis.parent / pd.read_csv(analysis.parent / "maps.tsv", sep="\t").path[0]
    models_in = nib.load(str(first)).header.get_axis(1)
    for stem, ext in (("statistic", "dtseries"), ("p_corrected", "dtseries"),
                      ("clusters", "dlabel"), ("cluster_summary", "dscalar")):
        _, models = _written(out, stem, ext)
        assert models == models_in, stem                      # nibabel: same brain models


def test_effect_in_the_volume_part_is_found_and_named(run):
    _, out = run
    table = pd.read_csv(out / "rare_minus_frequent" / "clusters.tsv", sep="\t")
    best = table.loc[table.p_corrected.idxmin()]
    assert best.p_corrected <= 0.05 and best.sign == 1
    assert best.peak_structure == RIGHT_PART and best.atlas_label_at_peak == RIGHT_PART
    assert pd.isna(best.peak_hemisphere) and pd.isna(best.peak_vertex)
    stat, models = _written(out, "statistic")
    labels, _ = _written(out, "clusters", "dlabel")
    names = np.asarray(models.name)
    ijk = (int(best.peak_i), int(best.peak_j), int(best.peak_k))
    col = int(np.flatnonzero((names == RIGHT_PART) & (models.voxel == ijk).all(axis=1))[0])
    world = AFFINE @ np.array([*ijk, 1.0])                        # affine @ (i, j, k, 1)
    assert [best.peak_x_mm, best.peak_y_mm, best.peak_z_mm] == pytest.approx(world[:3].tolist())
    window = json.loads((out / "analysis_summary.json").read_text())["window"]
    times = (window["t0_s"] + window["dt_s"] * np.arange(window["n"])) * 1e3
    t = int(np.argmin(np.abs(times - best.t_peak_ms)))
    assert best.peak_stat == pytest.approx(float(stat[col, t]), rel=1e-5)
    member = labels == int(best.cluster)
    assert set(names[member.any(axis=1)]) == {RIGHT_PART}          # wholly in that structure
    assert member[names == RIGHT_PART][:, EFFECT_SAMPLES].all()    # over the planted samples
    # peaks.tsv names the structure and voxel of the same peak
    peaks = pd.read_csv(out / "rare_minus_frequent" / "peaks.tsv", sep="\t")
    top = peaks[(peaks.cluster == best.cluster) & (peaks.peak == 1)].iloc[0]
    assert (top.structure, int(top.i), int(top.j), int(top.k)) == (RIGHT_PART, *ijk)
    # cortex peaks keep hemisphere and vertex, and name no structure
    cortex = table[table.peak_hemisphere.notna()]
    assert len(cortex) and cortex.peak_structure.isna().all() and cortex.peak_i.isna().all()


def test_written_clusters_equal_components_of_the_written_graph(run):
    _, out = run
    thr = json.loads((out / "rare_minus_frequent" / "summary.json").read_text())["threshold"]
    stat, models = _written(out, "statistic")
    labels, _ = _written(out, "clusters", "dlabel")
    rows, cols = [], []
    for name, slc, bm in models.iter_structures():
        if bm.surface_mask.all():
            hemi = "left" if name.endswith("LEFT") else "right"
            tri = nib.load(str(out / f"source_space.{hemi}.surf.gii")).agg_data(
                "NIFTI_INTENT_TRIANGLE")
            index = -np.ones(bm.nvertices[name], np.int64)
            index[bm.vertex] = slc.start + np.arange(len(bm))
            e = np.concatenate([tri[:, [0, 1]], tri[:, [1, 2]], tri[:, [2, 0]]])
            e = e[(index[e] >= 0).all(axis=1)]
            rows.append(index[e[:, 0]])
            cols.append(index[e[:, 1]])
        else:
            grid = -np.ones(tuple(models.volume_shape), np.int64)
            grid[tuple(bm.voxel.T)] = slc.start + np.arange(len(bm))
            for axis in range(3):                # face pairs (6-connectivity) within the part
                a = np.moveaxis(grid, axis, 0)
                pair = (a[:-1] >= 0) & (a[1:] >= 0)
                rows.append(a[:-1][pair])
                cols.append(a[1:][pair])
    r, c = np.concatenate(rows), np.concatenate(cols)
    S = stat.shape[0]
    A = sparse.coo_matrix((np.ones(r.size), (r, c)), shape=(S, S))
    A = ((A + A.T) > 0).astype(np.int8)
    for supra in (stat > thr, stat < -thr):
        n, keep, comp = _components(A, supra)
        got = labels.ravel()[keep]
        assert np.all(got > 0)
        pairs = np.unique(np.column_stack([got, comp]), axis=0)
        assert len(pairs) == n == len(np.unique(pairs[:, 0]))
    assert np.all(labels[np.abs(stat) <= thr] == 0)


def test_figures_draw_a_volume_cluster_as_projections(run, tmp_path):
    _, out = run
    figdir = out / "rare_minus_frequent" / "figures"
    summary = json.loads((out / "rare_minus_frequent" / "summary.json").read_text())
    table = pd.read_csv(out / "rare_minus_frequent" / "clusters.tsv", sep="\t")
    for k in summary["reported_clusters"]:
        row = table[table.cluster == k].iloc[0]
        in_part = isinstance(row.peak_structure, str)
        assert (figdir / f"volume_parts_cluster{k:02d}.png").exists() == in_part
        assert (figdir / f"surface_cluster{k:02d}.png").exists() == (not in_part)
    png = (figdir / "volume_parts_cluster01.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"                         # PNG signature
    page = (out / "report.html").read_text(encoding="utf-8")
    assert RIGHT_PART in page and "CIFTI-2 volume parts" in page
    copy = tmp_path / "r"                                          # groupsrc report reads it back
    shutil.copytree(out, copy)
    (copy / "rare_minus_frequent" / "figures" / "volume_parts_cluster01.png").unlink()
    build_report(copy)
    assert (copy / "rare_minus_frequent" / "figures" / "volume_parts_cluster01.png").exists()


# ----------------------------------------------------------------------------
# validation: every file with the same brain models
# ----------------------------------------------------------------------------

@pytest.fixture(scope="module")
def cohort(tmp_path_factory):
    return make_volume_cohort(tmp_path_factory.mktemp("cifti_vol_bad") / "cohort")


@pytest.fixture
def ccopy(cohort, tmp_path):
    shutil.copytree(cohort.parent, tmp_path / "c")
    return tmp_path / "c" / "analysis.toml"


def _rewrite(analysis, row, change):
    """Rewrite the map of maps-table data row ``row`` (0-based) through ``change(parts,
    affine, data)``, which returns the new (parts, affine, data)."""
    from _cifti_volume_fixture import brain_models
    path = analysis.parent / pd.read_csv(analysis.parent / "maps.tsv", sep="\t").path[row]
    img = nib.load(str(path))
    data = np.asarray(img.dataobj)
    models = img.header.get_axis(1)
    present, parts, values = {}, {}, {}
    for name, slc, bm in models.iter_structures():
        if bm.surface_mask.all():
            h = "left" if name.endswith("LEFT") else "right"
            present[h] = np.zeros(bm.nvertices[name], bool)
            present[h][bm.vertex] = True
            values[h] = data[:, slc]
        else:
            parts[name] = np.asarray(bm.voxel)
            values[name] = data[:, slc]
    parts, affine, values = change(parts, np.asarray(models.affine), values)
    axis = brain_models(present, parts, affine)
    cols = [values["left"], values["right"]] + [values[n] for n in parts]
    new = cifti2.Cifti2Image(np.concatenate(cols, axis=1),
                             cifti2.Cifti2Header.from_axes((img.header.get_axis(0), axis)))
    new.nifti_header.set_intent("NIFTI_INTENT_CONNECTIVITY_DENSE_SERIES")
    new.to_filename(str(path))
    return path


def test_brain_model_mismatches_are_named_by_file_and_structure(ccopy, capsys, tmp_path):
    def fewer_voxels(parts, affine, values):
        parts[RIGHT_PART], values[RIGHT_PART] = parts[RIGHT_PART][1:], values[RIGHT_PART][:, 1:]
        return parts, affine, values

    def no_left_part(parts, affine, values):
        del parts[LEFT_PART], values[LEFT_PART]
        return parts, affine, values

    def shifted(parts, affine, values):
        moved = affine.copy()
        moved[0, 3] += 6
        return parts, moved, values

    def extra_part(parts, affine, values):
        ijk = np.argwhere(np.ones(SHAPE, bool))
        parts[EXTRA] = ijk[(ijk[:, 0] >= 3) & (ijk[:, 1] == 4)]        # voxels no part holds
        values[EXTRA] = np.ones((values["left"].shape[0], len(parts[EXTRA])), np.float32)
        return parts, affine, values

    EXTRA = "CIFTI_STRUCTURE_CEREBELLUM_LEFT"
    a = _rewrite(ccopy, 1, fewer_voxels)
    b = _rewrite(ccopy, 4, no_left_part)
    c = _rewrite(ccopy, 6, shifted)
    d = _rewrite(ccopy, 9, extra_part)
    text = assert_refused(ccopy, capsys, [
        f"maps.tsv row 3 ({a})", f"its volume part {RIGHT_PART} holds other voxels",
        f"maps.tsv row 6 ({b})", f"lacks the volume part {LEFT_PART}",
        f"maps.tsv row 8 ({c})", "lie in another volume", "origin differs by up to 6 mm",
        f"maps.tsv row 11 ({d})", f"holds a volume part {EXTRA} ({3 * SHAPE[2]} voxels) that most maps do not",
        "write every map with the same brain models"], out=tmp_path / "out")
    assert text.count("->") >= 4


def test_loaded_data_match_the_files_voxel_by_voxel(cohort):
    """Each source's values in Y are the file's column of the same structure and voxel
    (or vertex), read with nibabel."""
    from groupsrc.inputs.cohort import load_cohort
    from groupsrc.inputs.settings import read_settings
    settings, problems = read_settings(cohort)
    assert not problems
    coh = load_cohort(settings, progress=False)
    lab = coh.grid.labels()
    for m in (0, 5):
        img = nib.load(str(cohort.parent / coh.maps.path[m]))
        data = np.asarray(img.dataobj)
        column = {}
        for name, slc, bm in img.header.get_axis(1).iter_structures():
            for j in range(len(bm)):
                key = ((name, tuple(bm.voxel[j])) if bm.volume_mask[j] else
                       ("left" if name.endswith("LEFT") else "right", int(bm.vertex[j])))
                column[key] = slc.start + j
        cols = [column[(r.structure, (r.i, r.j, r.k)) if r.structure else (r.hemisphere, r.vertex)]
                for r in lab.itertuples()]
        np.testing.assert_allclose(coh.raw(m), data[:, cols].T, rtol=1e-6,
                                   atol=1e-6 * coh.units.scale)     # inputs/units.py
    again = load_cohort(settings, progress=False)             # from the loading cache
    assert again.cache_hit and again.grid.voxels.names == coh.grid.voxels.names
    np.testing.assert_array_equal(np.asarray(again.Y), np.asarray(coh.Y))


def test_nan_at_a_voxel_names_the_structure(ccopy, capsys):
    def nan(parts, affine, values):
        values[LEFT_PART] = values[LEFT_PART].copy()
        values[LEFT_PART][2, 5] = np.nan
        return parts, affine, values

    _rewrite(ccopy, 2, nan)
    assert_refused(ccopy, capsys, ["maps.tsv row 4", "1 NaN/Inf value(s) at sources (1 in "
                                   f"{LEFT_PART})", "every voxel a volume part lists is a source"])


def test_a_voxel_in_two_parts_is_named(ccopy, capsys):
    """CIFTI-2 specification: each brain-model element is one grayordinate, so one voxel
    listed under two structures (or outside the volume) cannot be read as sources."""
    def overlap(parts, affine, values):
        parts[LEFT_PART] = np.vstack([parts[LEFT_PART], parts[RIGHT_PART][:1]])
        values[LEFT_PART] = np.hstack([values[LEFT_PART], values[RIGHT_PART][:, :1]])
        return parts, affine, values

    def outside(parts, affine, values):
        parts[RIGHT_PART] = parts[RIGHT_PART].copy()
        parts[RIGHT_PART][0] = [SHAPE[0], 0, 0]
        return parts, affine, values

    a = _rewrite(ccopy, 0, overlap)
    b = _rewrite(ccopy, 3, outside)
    assert_refused(ccopy, capsys, [
        f"maps.tsv row 2 ({a}): its volume parts cannot be used: a voxel belongs to more "
        "than one volume part",
        f"maps.tsv row 5 ({b}): its volume parts cannot be used: structure {RIGHT_PART} has "
        "voxel indices outside the volume"])
