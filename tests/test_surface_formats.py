"""GIfTI and CIFTI-2 files written and read by groupsrc.formats, checked through nibabel.

Outside references, named beside each check:
- GIfTI Surface Data Format 1.0 (NIfTI DFWG): data arrays with NIfTI intent
  names, per-array and per-file metadata, one label table per file; read back
  with ``nibabel.gifti`` (reference library);
- nifti1.h intent codes: TTEST 3, FTEST 4, PVAL 22, ESTIMATE 1001, LABEL
  1002, POINTSET 1008, TRIANGLE 1009, TIME_SERIES 2001 (open standard);
- CIFTI-2 specification (2014): series axis (start, step, unit), brain-model
  axis (structure, vertex indices, surface vertex count), label tables per
  map, NIfTI-2 intents CONNECTIVITY_DENSE_SERIES 3002, _SCALARS 3006,
  _LABELS 3007; read back with ``nibabel.cifti2`` (reference library).
The data written are random numbers, compared with themselves after the trip.
"""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pytest
from nibabel import cifti2
from nibabel.gifti import GiftiDataArray, GiftiImage, GiftiMetaData

from groupsrc import formats
from groupsrc.formats import cifti, gifti
from groupsrc.formats.surface_maps import SurfaceMaps
from groupsrc.sources import Hemisphere, SurfaceMesh, TimeAxis
from groupsrc.sources.surface import icosphere

TIME = TimeAxis(-0.05, 0.004, 7)


def _space(fmt="gifti", hemis=("left", "right")):
    v, f = icosphere(2)
    parts = []
    for h in hemis:
        sign = -1 if h == "left" else 1
        parts.append(Hemisphere.from_arrays(h, 40 * v + [sign * 45, 0, 0], f,
                                            mask=sign * v[:, 0] > -0.7))
    return SurfaceMesh(tuple(parts), maps_format=fmt)


def _values(space, n_t=TIME.n, seed=0):
    return np.random.default_rng(seed).standard_normal((space.n_sources, n_t)).astype(np.float32)


# ----------------------------------------------------------------------------
# GIfTI
# ----------------------------------------------------------------------------

def test_gifti_statistic_round_trip(tmp_path):
    space = _space()
    x = _values(space)
    maps = SurfaceMaps(space, TIME)
    paths = maps.statistic(tmp_path, "statistic", x, "t", (17.0,), "c1")
    assert [p.name for p in paths] == ["statistic.left.func.gii", "statistic.right.func.gii"]
    for h, p in zip(space.names, paths):
        img = nib.load(str(p))                                   # nibabel.gifti reads it
        assert isinstance(img, GiftiImage) and len(img.darrays) == TIME.n
        for j, d in enumerate(img.darrays):
            assert d.intent == 3                                  # nifti1.h NIFTI_INTENT_TTEST
            assert float(d.meta["intent_p1"]) == 17.0             # GIfTI: intent parameters
            assert f"{TIME.times[j] * 1e3:.6g} ms" in d.meta["Name"]
        data = np.column_stack([d.data for d in img.darrays])
        np.testing.assert_array_equal(data, space.to_vertices(x, h))
        assert img.meta["AnatomicalStructurePrimary"] == gifti.STRUCTURES[h]
        assert gifti.read_time_axis(img) == TIME                 # our metadata, read back
    np.testing.assert_array_equal(maps.read(tmp_path, "statistic"), x)


def test_gifti_f_and_p_intents(tmp_path):
    space = _space(hemis=("left",))
    x = np.abs(_values(space))
    maps = SurfaceMaps(space, TIME)
    maps.statistic(tmp_path, "f", x, "F", (2.0, 30.0), "c")
    maps.p_values(tmp_path, "p", np.full_like(x, 0.5), "c", "corrected")
    maps.estimate(tmp_path, "e", x, "c", "estimate")
    f = nib.load(str(tmp_path / "f.left.func.gii"))
    assert {d.intent for d in f.darrays} == {4}                   # nifti1.h NIFTI_INTENT_FTEST
    assert (float(f.darrays[0].meta["intent_p1"]), float(f.darrays[0].meta["intent_p2"])) == (2, 30)
    p = nib.load(str(tmp_path / "p.left.func.gii"))
    assert {d.intent for d in p.darrays} == {22}                  # nifti1.h NIFTI_INTENT_PVAL
    outside = ~space.hemispheres[0].mask
    assert np.all(p.darrays[0].data[outside] == 1.0)              # nothing there: p = 1
    e = nib.load(str(tmp_path / "e.left.func.gii"))
    assert {d.intent for d in e.darrays} == {1001}                # nifti1.h NIFTI_INTENT_ESTIMATE


def test_gifti_label_file_keeps_its_table(tmp_path):
    space = _space()
    labels = np.zeros((space.n_sources, TIME.n), np.int32)
    labels[:20, 2:5] = 1
    labels[-30:, 4] = 3
    maps = SurfaceMaps(space, TIME)
    paths = maps.labels(tmp_path, "clusters", labels, "c")
    assert [p.name for p in paths] == ["clusters.left.label.gii", "clusters.right.label.gii"]
    img = nib.load(str(paths[1]))
    assert {d.intent for d in img.darrays} == {1002}              # nifti1.h NIFTI_INTENT_LABEL
    table = img.labeltable.get_labels_as_dict()                   # GIfTI: one table per file
    assert table == {0: "none", 1: "cluster 1", 3: "cluster 3"}
    assert all(lab.alpha == (0.0 if lab.key == 0 else 1.0) for lab in img.labeltable.labels)
    np.testing.assert_array_equal(maps.read(tmp_path, "clusters"), labels)
    got, names, hemi = gifti.read_label_file(paths[1])            # the atlas reader
    assert names == table and hemi == "right"
    np.testing.assert_array_equal(got, space.to_vertices(labels[:, 0], "right"))


def test_gifti_mesh_and_space_round_trip(tmp_path):
    space = _space()
    maps = SurfaceMaps(space, TIME)
    maps.write_space(tmp_path)
    img = nib.load(str(tmp_path / "source_space.left.surf.gii"))
    coords = img.agg_data("NIFTI_INTENT_POINTSET")                # nibabel: intent 1008
    tri = img.agg_data("NIFTI_INTENT_TRIANGLE")                   # nibabel: intent 1009
    h = space.hemispheres[0]
    np.testing.assert_allclose(coords, h.vertices, atol=1e-4)
    np.testing.assert_array_equal(tri, h.triangles)
    back = SurfaceMaps.read_space(tmp_path, TIME)
    assert back.format == "gifti" and back.space.names == ("left", "right")
    for a, b in zip(back.space.hemispheres, space.hemispheres):
        np.testing.assert_array_equal(a.mask, b.mask)
        np.testing.assert_array_equal(a.triangles, b.triangles)


@pytest.mark.parametrize("layout", ["arrays", "matrix"])
def test_gifti_map_reader_reads_both_layouts(tmp_path, layout):
    """One array per sample, or one (vertices, samples) array (GIfTI standard allows both)."""
    x = np.random.default_rng(1).standard_normal((162, 5)).astype(np.float32)
    if layout == "arrays":
        arrays = [GiftiDataArray(x[:, j], intent="NIFTI_INTENT_TIME_SERIES",
                                 datatype="NIFTI_TYPE_FLOAT32") for j in range(5)]
    else:
        arrays = [GiftiDataArray(x, intent="NIFTI_INTENT_TIME_SERIES",
                                 datatype="NIFTI_TYPE_FLOAT32")]
    img = GiftiImage(darrays=arrays, meta=GiftiMetaData({"AnatomicalStructurePrimary": "CortexRight"}))
    path = tmp_path / f"{layout}.func.gii"
    nib.save(img, str(path))                                      # written by nibabel
    h = formats.read_header(path)
    assert (h.format, h.n_vertices, h.n_times, h.structure, h.layout) == (
        "gifti", 162, 5, "right", layout)
    assert h.time_axis is None                                    # GIfTI carries no time axis
    np.testing.assert_array_equal(gifti.read_data(h), x)


def test_gifti_reader_names_what_is_not_a_map(tmp_path):
    v, f = icosphere(1)
    gifti.save(tmp_path / "m.surf.gii", gifti.mesh_image(v, f, "left"))
    with pytest.raises(ValueError, match="mesh file"):
        formats.read_header(tmp_path / "m.surf.gii")
    whole = gifti.map_image(np.ones((42, 3), np.float32), "left", "NIFTI_INTENT_NONE",
                            name="x").to_bytes()
    (tmp_path / "cut.func.gii").write_bytes(whole[: len(whole) // 2])     # truncated
    with pytest.raises(ValueError, match="cannot be read as GIfTI"):
        formats.read_header(tmp_path / "cut.func.gii")
    (tmp_path / "empty.func.gii").write_text("<GIFTI></GIFTI>")
    with pytest.raises(ValueError, match="no data array"):
        formats.read_header(tmp_path / "empty.func.gii")


# ----------------------------------------------------------------------------
# CIFTI-2
# ----------------------------------------------------------------------------

def test_suffix_dispatch_puts_dense_series_before_nifti():
    assert formats.format_for("a/sub-01.dtseries.nii") is cifti
    assert formats.format_for("a/sub-01.nii") is formats.nifti
    assert formats.format_for("a/sub-01.L.func.gii") is gifti


def test_cifti_series_round_trip(tmp_path):
    space = _space("cifti")
    x = _values(space)
    maps = SurfaceMaps(space, TIME)
    [path] = maps.statistic(tmp_path, "statistic", x, "t", (17.0,), "c1")
    assert path.name == "statistic.dtseries.nii"
    img = nib.load(str(path))                                     # nibabel.cifti2 reads it
    assert isinstance(img, cifti2.Cifti2Image)
    assert img.nifti_header["intent_code"] == 3002                # CONNECTIVITY_DENSE_SERIES
    series, models = img.header.get_axis(0), img.header.get_axis(1)
    assert series.unit == "SECOND" and series.size == TIME.n
    assert series.start == pytest.approx(TIME.t0) and series.step == pytest.approx(TIME.dt)
    for name, slc, bm in models.iter_structures():
        h = space.hemisphere("left" if name.endswith("LEFT") else "right")
        assert name == cifti.STRUCTURES[h.name]                   # CIFTI-2 structure names
        assert bm.nvertices[name] == h.n_vertices
        np.testing.assert_array_equal(bm.vertex, h.sources)
        np.testing.assert_array_equal(np.asarray(img.dataobj)[:, slc].T, x[space.source_slice(h.name)])
    meta = dict(img.header.matrix.metadata)
    assert meta["statistic"] == "t" and float(meta["intent_p1"]) == 17.0
    np.testing.assert_array_equal(maps.read(tmp_path, "statistic"), x)
    # and as an input: the reader gives the same time axis and values per vertex
    h = formats.read_header(path)
    assert h.time_axis == TIME and h.ignored == {}
    per = cifti.read_data(h)
    np.testing.assert_array_equal(space.from_vertices(per), x)
    assert np.isnan(per["left"][~space.hemispheres[0].mask]).all()


def test_cifti_labels_and_scalars(tmp_path):
    space = _space("cifti")
    labels = np.zeros((space.n_sources, TIME.n), np.int32)
    labels[5:9, 1:3] = 2
    maps = SurfaceMaps(space, TIME)
    [path] = maps.labels(tmp_path, "clusters", labels, "c")
    assert path.name == "clusters.dlabel.nii"
    img = nib.load(str(path))
    assert img.nifti_header["intent_code"] == 3007                # CONNECTIVITY_DENSE_LABELS
    axis = img.header.get_axis(0)
    assert len(axis) == TIME.n
    assert all({k: v[0] for k, v in t.items()} == {0: "none", 2: "cluster 2"} for t in axis.label)
    np.testing.assert_array_equal(maps.read(tmp_path, "clusters"), labels)
    stat = _values(space)
    [spath] = maps.cluster_summary(tmp_path, "cluster_summary", stat, labels, [2], "t", "c")
    assert nib.load(str(spath)).nifti_header["intent_code"] == 3006   # DENSE_SCALARS
    maps.write_space(tmp_path)
    back = SurfaceMaps.read_space(tmp_path, TIME)
    assert back.format == "cifti"
    np.testing.assert_array_equal(back.read(tmp_path, "clusters"), labels)


def test_cifti_reader_lists_parts_it_does_not_read(tmp_path):
    """A dense series with a volume part: the cortex is read, the volume listed as ignored."""
    bm = (cifti2.BrainModelAxis.from_surface(np.arange(0, 42, 2), 42, "CortexLeft")
          + cifti2.BrainModelAxis.from_mask(np.ones((2, 2, 2), bool), "thalamus_left", np.eye(4)))
    series = cifti2.SeriesAxis(0.0, 0.01, 3, "second")
    data = np.random.default_rng(2).standard_normal((3, len(bm))).astype(np.float32)
    img = cifti2.Cifti2Image(data, cifti2.Cifti2Header.from_axes((series, bm)))
    img.nifti_header.set_intent("NIFTI_INTENT_CONNECTIVITY_DENSE_SERIES")
    path = tmp_path / "x.dtseries.nii"
    img.to_filename(str(path))
    h = formats.read_header(path)
    assert list(h.parts) == ["left"] and h.parts["left"][0] == 42
    assert h.ignored == {"CIFTI_STRUCTURE_THALAMUS_LEFT": 8}
    per = cifti.read_data(h)
    np.testing.assert_array_equal(per["left"][::2], data[:, :21].T)
    assert np.isnan(per["left"][1::2]).all()
