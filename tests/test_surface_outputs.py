"""A whole run on tiny surface cohorts: GIfTI / CIFTI-2 result files, tables, report.

Outside references, named beside each check:
- the result files are read back with nibabel (reference library) under the
  GIfTI 1.0 standard and the CIFTI-2 specification;
- clusters are recomputed from the written statistic and the written
  threshold with scipy.sparse.csgraph.connected_components on the graph of
  the written template mesh's triangle edges x adjacent samples (reference
  library; space-time clusters as in Maris & Oostenveld 2007);
- PNG signature and IHDR size (PNG specification, section 5.2 / 11.2.2).
The input data are random numbers; every expected value is computed from the
written files, not taken from groupsrc.
"""

from __future__ import annotations

import json
import shutil
import struct

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from scipy import sparse
from scipy.sparse.csgraph import connected_components

from _surface_fixture import make_surface_cohort
from groupsrc.cli import main
from groupsrc.inputs.problems import InputError
from groupsrc.outputs import build_report


@pytest.fixture(scope="module", params=["gifti", "cifti"])
def run(request, tmp_path_factory):
    root = tmp_path_factory.mktemp(f"surf_{request.param}")
    analysis = make_surface_cohort(root / "cohort", request.param)
    out = root / "results"
    assert main(["run", str(analysis), "--out", str(out)]) == 0
    return request.param, analysis, out


def _gifti_arrays(path):
    img = nib.load(str(path))
    return np.column_stack([d.data for d in img.darrays]), img


def _per_source(fmt, out, contrast, stem, label=False):
    """{hemisphere: (V, T) values} of a written map, read with nibabel."""
    if fmt == "gifti":
        ext = "label" if label else "func"
        return {h: _gifti_arrays(out / contrast / f"{stem}.{h}.{ext}.gii")[0]
                for h in ("left", "right")}
    ext = "dlabel" if label else "dtseries"
    img = nib.load(str(out / contrast / f"{stem}.{ext}.nii"))
    data = np.asarray(img.dataobj)
    per = {}
    for name, slc, bm in img.header.get_axis(1).iter_structures():
        h = "left" if name.endswith("LEFT") else "right"
        full = np.zeros((bm.nvertices[name], data.shape[0]), data.dtype)
        full[bm.vertex] = data[:, slc].T
        per[h] = full
    return per


def _mesh(out, h):
    img = nib.load(str(out / f"source_space.{h}.surf.gii"))
    mask = nib.load(str(out / f"source_mask.{h}.shape.gii")).darrays[0].data > 0
    return img.agg_data("NIFTI_INTENT_POINTSET"), img.agg_data("NIFTI_INTENT_TRIANGLE"), mask


def test_result_files_follow_the_input_format(run):
    fmt, _, out = run
    files = {p.name for p in (out / "rare_minus_frequent").iterdir()}
    if fmt == "gifti":
        assert {"statistic.left.func.gii", "statistic.right.func.gii", "clusters.left.label.gii",
                "p_corrected.right.func.gii", "std_error.left.func.gii"} <= files
        assert not any(n.endswith(".nii") or n.endswith(".nii.gz") for n in files)
        img = nib.load(str(out / "rare_minus_frequent" / "statistic.left.func.gii"))
        assert {d.intent for d in img.darrays} == {3}             # nifti1.h NIFTI_INTENT_TTEST
    else:
        assert {"statistic.dtseries.nii", "clusters.dlabel.nii", "p_corrected.dtseries.nii",
                "cluster_summary.dscalar.nii"} <= files
        img = nib.load(str(out / "rare_minus_frequent" / "statistic.dtseries.nii"))
        assert img.nifti_header["intent_code"] == 3002            # CIFTI-2 dense series
        series = img.header.get_axis(0)
        window = json.loads((out / "analysis_summary.json").read_text())["window"]
        assert series.start == pytest.approx(window["t0_s"])
        assert series.step == pytest.approx(window["dt_s"])


def test_clusters_equal_csgraph_components_on_the_written_mesh(run):
    fmt, _, out = run
    summary = json.loads((out / "rare_minus_frequent" / "summary.json").read_text())
    thr = summary["threshold"]
    stat = _per_source(fmt, out, "rare_minus_frequent", "statistic")
    labels = _per_source(fmt, out, "rare_minus_frequent", "clusters", label=True)
    for h in ("left", "right"):
        _, tri, mask = _mesh(out, h)
        src = np.flatnonzero(mask)
        index = -np.ones(mask.size, np.int64)
        index[src] = np.arange(src.size)
        e = np.concatenate([tri[:, [0, 1]], tri[:, [1, 2]], tri[:, [2, 0]]])
        e = e[(index[e] >= 0).all(axis=1)]
        S, T = src.size, stat[h].shape[1]
        A = sparse.coo_matrix((np.ones(len(e)), (index[e[:, 0]], index[e[:, 1]])), shape=(S, S))
        A = ((A + A.T) > 0).astype(np.int8)
        chain = sparse.diags([np.ones(T - 1), np.ones(T - 1)], [-1, 1], shape=(T, T))
        G = sparse.csr_matrix(sparse.kron(A, sparse.identity(T)) + sparse.kron(
            sparse.identity(S), chain))
        s = stat[h][src]
        lab = labels[h][src]
        for supra in (s > thr, s < -thr):            # clusters of one sign each (two tails)
            keep = np.flatnonzero(supra.ravel())
            n, comp = connected_components(G[keep][:, keep], directed=False)
            got = lab.ravel()[keep]
            assert np.all(got > 0)
            pairs = np.unique(np.column_stack([got, comp]), axis=0)
            assert len(pairs) == n == len(np.unique(pairs[:, 0]))   # one-to-one
        assert np.all(lab[np.abs(s) <= thr] == 0)
        assert np.all(labels[h][~mask] == 0)


def test_tables_name_hemisphere_vertex_and_coordinates(run):
    fmt, _, out = run
    table = pd.read_csv(out / "rare_minus_frequent" / "clusters.tsv", sep="\t")
    peaks = pd.read_csv(out / "rare_minus_frequent" / "peaks.tsv", sep="\t")
    assert len(table) and len(peaks)
    stat = _per_source(fmt, out, "rare_minus_frequent", "statistic")
    labels = _per_source(fmt, out, "rare_minus_frequent", "clusters", label=True)
    coords = {h: _mesh(out, h)[0] for h in ("left", "right")}
    window = json.loads((out / "analysis_summary.json").read_text())["window"]
    times = window["t0_s"] * 1e3 + window["dt_s"] * 1e3 * np.arange(window["n"])
    for row in table.itertuples():
        h, v = row.peak_hemisphere, int(row.peak_vertex)
        assert [row.peak_x_mm, row.peak_y_mm, row.peak_z_mm] == pytest.approx(
            coords[h][v].tolist(), abs=1e-3)
        t = int(np.argmin(np.abs(times - row.t_peak_ms)))
        assert row.peak_stat == pytest.approx(float(stat[h][v, t]), rel=1e-5)
        assert labels[h][v, t] == row.cluster
        # the peak is the largest |statistic| of the cluster over both hemispheres
        best = max(np.abs(np.where(labels[k] == row.cluster, stat[k], 0)).max()
                   for k in ("left", "right"))
        assert abs(row.peak_stat) == pytest.approx(best, rel=1e-5)
        n_points = sum(int((labels[k] == row.cluster).sum()) for k in ("left", "right"))
        assert n_points == row.n_points
    for row in peaks.itertuples():
        assert [row.x_mm, row.y_mm, row.z_mm] == pytest.approx(
            coords[row.hemisphere][int(row.vertex)].tolist(), abs=1e-3)
    # atlas names from the GIfTI label files at the peak vertex
    for row in table.itertuples():
        img = nib.load(str(out.parent / "cohort" / "template" / f"{row.peak_hemisphere}.label.gii"))
        key = int(img.darrays[0].data[int(row.peak_vertex)])
        assert row.atlas_label_at_peak == img.labeltable.get_labels_as_dict()[key]


def _png_size(data):
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"   # PNG specification
    return struct.unpack(">II", data[16:24])


def test_report_shows_the_surface_views(run):
    _, _, out = run
    page = (out / "report.html").read_text(encoding="utf-8")
    figs = sorted((out / "rare_minus_frequent" / "figures").glob("surface_*.png"))
    assert figs, "no surface figure"
    w, h = _png_size(figs[0].read_bytes())
    assert abs(w - 180 / 25.4 * 150) <= 2 and h > 300          # 180 mm at 150 dpi
    assert "lateral and medial views of each hemisphere" in page
    assert "template surface" in page and "left hemisphere" in page
    svg = figs[0].with_suffix(".svg").read_text()
    assert "<image" in svg                                    # the mesh layer is rasterised


def test_report_rebuilds_and_names_a_missing_map(run, tmp_path):
    fmt, _, out = run
    copy = tmp_path / "r"
    shutil.copytree(out, copy)
    before = (copy / "report.html").stat().st_size
    build_report(copy)
    assert (copy / "report.html").stat().st_size > 0.9 * before
    gone = ("rare_minus_frequent/statistic.right.func.gii" if fmt == "gifti"
            else "rare_minus_frequent/statistic.dtseries.nii")
    (copy / gone).unlink()
    (copy / "source_mask.left.shape.gii").unlink()
    with pytest.raises(InputError) as err:
        build_report(copy)
    text = str(err.value)
    assert gone in text and "source_mask.left.shape.gii" in text
