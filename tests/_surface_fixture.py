"""A tiny synthetic surface cohort on disk (GIfTI per hemisphere, or CIFTI-2).

Written with nibabel directly (not through groupsrc's writers).  The data are
random numbers: they exist so that tables, headers and broken copies can be
exercised, never as check values.  The meshes are subdivided icosahedra of
different sizes for the two hemispheres (162 and 642 vertices), so that a
file of one hemisphere put in the other's column is told by its count.
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
from nibabel import cifti2
from nibabel.gifti import (GiftiDataArray, GiftiImage, GiftiLabel, GiftiLabelTable,
                           GiftiMetaData)

from groupsrc.sources.surface import icosphere

N_T = 6
DT = 0.004
T0 = -0.008
ORDER = {"left": 2, "right": 3}
STRUCTURE = {"left": "CortexLeft", "right": "CortexRight"}


def mesh(hemi):
    v, f = icosphere(ORDER[hemi])
    sign = -1.0 if hemi == "left" else 1.0
    return 40 * v + [sign * 45, 0, 0], f, v


def medial_mask(hemi):
    """Sources: all but a cap on the side facing the other hemisphere."""
    _, _, unit = mesh(hemi)
    sign = -1.0 if hemi == "left" else 1.0
    return sign * unit[:, 0] > -0.8


def _meta(d):
    return GiftiMetaData({k: str(v) for k, v in d.items()})


def write_mesh(path, vertices, triangles, hemi=None):
    arrays = [GiftiDataArray(np.asarray(vertices, np.float32), intent="NIFTI_INTENT_POINTSET",
                             datatype="NIFTI_TYPE_FLOAT32"),
              GiftiDataArray(np.asarray(triangles, np.int32), intent="NIFTI_INTENT_TRIANGLE",
                             datatype="NIFTI_TYPE_INT32")]
    meta = {"AnatomicalStructurePrimary": STRUCTURE[hemi]} if hemi else {}
    nib.save(GiftiImage(darrays=arrays, meta=_meta(meta)), str(path))


def write_func(path, data, hemi=None):
    """(V, T) data as one GIfTI array per sample."""
    data = np.asarray(data, np.float32)
    arrays = [GiftiDataArray(np.ascontiguousarray(data[:, j]), intent="NIFTI_INTENT_TIME_SERIES",
                             datatype="NIFTI_TYPE_FLOAT32") for j in range(data.shape[1])]
    meta = {"AnatomicalStructurePrimary": STRUCTURE[hemi]} if hemi else {}
    nib.save(GiftiImage(darrays=arrays, meta=_meta(meta)), str(path))


def write_shape(path, values, hemi=None):
    arr = GiftiDataArray(np.asarray(values, np.float32), intent="NIFTI_INTENT_SHAPE",
                         datatype="NIFTI_TYPE_FLOAT32")
    meta = {"AnatomicalStructurePrimary": STRUCTURE[hemi]} if hemi else {}
    nib.save(GiftiImage(darrays=[arr], meta=_meta(meta)), str(path))


def write_labels(path, values, names, hemi=None):
    table = GiftiLabelTable()
    for k, name in names.items():
        lab = GiftiLabel(key=k, red=0.5, green=0.5, blue=0.5, alpha=1.0)
        lab.label = name
        table.labels.append(lab)
    arr = GiftiDataArray(np.asarray(values, np.int32), intent="NIFTI_INTENT_LABEL",
                         datatype="NIFTI_TYPE_INT32")
    meta = {"AnatomicalStructurePrimary": STRUCTURE[hemi]} if hemi else {}
    nib.save(GiftiImage(darrays=[arr], meta=_meta(meta), labeltable=table), str(path))


def write_dtseries(path, per_hemi, present, t0=T0, dt=DT):
    """{hemi: (V, T)} values at the ``present`` vertices as a CIFTI-2 dense time series."""
    axis = None
    cols = []
    for hemi in ("left", "right"):
        if hemi not in per_hemi:
            continue
        n = per_hemi[hemi].shape[0]
        part = cifti2.BrainModelAxis.from_surface(np.flatnonzero(present[hemi]), n, STRUCTURE[hemi])
        axis = part if axis is None else axis + part
        cols.append(per_hemi[hemi][present[hemi]])
    data = np.concatenate(cols).T.astype(np.float32)
    series = cifti2.SeriesAxis(t0, dt, data.shape[0], "second")
    img = cifti2.Cifti2Image(data, cifti2.Cifti2Header.from_axes((series, axis)))
    img.nifti_header.set_intent("NIFTI_INTENT_CONNECTIVITY_DENSE_SERIES")
    img.to_filename(str(path))


ANALYSIS = """\
title = "tiny surface cohort"
[cohort]
participants = "participants.tsv"
maps = "maps.tsv"
mesh_left = "template/left.surf.gii"
mesh_right = "template/right.surf.gii"
mask_left = "template/left.mask.shape.gii"
atlas_left = "template/left.label.gii"
atlas_right = "template/right.label.gii"
{time}
[model]
between = "group + age"
within = "condition"
[[contrasts]]
name = "rare_minus_frequent"
within = {{ rare = 1, frequent = -1 }}
[[contrasts]]
name = "group_by_tone"
within = {{ rare = 1, frequent = -1 }}
compare = {{ group = ["patient", "control"] }}
[inference]
correction = "cluster-mass"
resamples = 40
seed = 3
forming_p = 0.05
"""

ATLAS_NAMES = {0: "unknown", 1: "front", 2: "back"}


def make_surface_cohort(root: Path, fmt="gifti", n_per_group=4, seed=0) -> Path:
    """participants.tsv, maps.tsv, template/ (meshes, mask, atlas), maps/, analysis.toml."""
    rng = np.random.default_rng(seed)
    root = Path(root)
    (root / "maps").mkdir(parents=True, exist_ok=True)
    (root / "template").mkdir(exist_ok=True)
    for hemi in ("left", "right"):
        v, f, _ = mesh(hemi)
        write_mesh(root / "template" / f"{hemi}.surf.gii", v, f, hemi)
        write_labels(root / "template" / f"{hemi}.label.gii", np.where(v[:, 1] > 0, 1, 2),
                     ATLAS_NAMES, hemi)
    write_shape(root / "template" / "left.mask.shape.gii", medial_mask("left").astype(float),
                "left")
    ids = [f"sub-{i + 1:02d}" for i in range(2 * n_per_group)]
    groups = ["control"] * n_per_group + ["patient"] * n_per_group
    pd.DataFrame({"participant_id": ids, "group": groups,
                  "age": rng.integers(20, 70, size=len(ids))}).to_csv(
        root / "participants.tsv", sep="\t", index=False)
    present = {"left": medial_mask("left"), "right": np.ones(mesh("right")[0].shape[0], bool)}
    rows = []
    for pid in ids:
        for cond in ("rare", "frequent"):
            data = {h: rng.standard_normal((mesh(h)[0].shape[0], N_T)).astype(np.float32)
                    for h in ("left", "right")}
            stem = f"{pid}_cond-{cond}"
            if fmt == "gifti":
                row = {"participant_id": pid, "condition": cond}
                for hemi in ("left", "right"):
                    name = f"maps/{stem}.{hemi}.func.gii"
                    write_func(root / name, data[hemi], hemi)
                    row[f"path_{hemi}"] = name
            else:
                name = f"maps/{stem}.dtseries.nii"
                write_dtseries(root / name, data, present)
                row = {"participant_id": pid, "condition": cond, "path": name}
            rows.append(row)
    pd.DataFrame(rows).to_csv(root / "maps.tsv", sep="\t", index=False)
    time = f"time_start = {T0}\nsampling_interval = {DT}" if fmt == "gifti" else ""
    (root / "analysis.toml").write_text(ANALYSIS.format(time=time))
    return root / "analysis.toml"
