"""A tiny CIFTI-2 cohort whose files hold two cortex surfaces and volume parts.

Written with nibabel directly (not through groupsrc's writers), on the meshes
of ``_surface_fixture`` (subdivided icosahedra of 162 and 642 vertices).  The
volume parts are two structures in one 6 x 5 x 4 volume of 3 mm voxels with a
flipped x axis; the two structures touch along a face (i = 2 | i = 3), so the
rule that voxels of different structures are never joined has something to
bite on.  The data are random numbers; an optional effect of a given size is
added to the "rare" maps at every voxel of one structure for a few samples.
Random numbers and the planted effect exist to exercise the pipeline, never
as check values.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from nibabel import cifti2

from _surface_fixture import (ANALYSIS, N_T, DT, T0, STRUCTURE, medial_mask, mesh, write_mesh,
                              write_shape)

SHAPE = (6, 5, 4)
AFFINE = np.array([[-3.0, 0, 0, 8], [0, 3.0, 0, -20], [0, 0, 3.0, -10], [0, 0, 0, 1]])
LEFT_PART = "CIFTI_STRUCTURE_THALAMUS_LEFT"
RIGHT_PART = "CIFTI_STRUCTURE_THALAMUS_RIGHT"
#: samples of the planted effect
EFFECT_SAMPLES = slice(2, 5)


def part_voxels() -> dict:
    """{structure: (n, 3) voxel indices}, each in C order of (i, j, k): the left part
    at i >= 3 (x < 0: the x axis is flipped) without its last row of j, the right
    part at i < 3 without one edge row of voxels."""
    ijk = np.argwhere(np.ones(SHAPE, bool))
    right = ijk[(ijk[:, 0] < 3) & ~((ijk[:, 1] == 4) & (ijk[:, 2] == 3))]
    return {LEFT_PART: ijk[(ijk[:, 0] >= 3) & (ijk[:, 1] < 4)], RIGHT_PART: right}


def brain_models(present, parts, affine=AFFINE, shape=SHAPE):
    axis = None
    for hemi in ("left", "right"):
        part = cifti2.BrainModelAxis.from_surface(np.flatnonzero(present[hemi]),
                                                  present[hemi].size, STRUCTURE[hemi])
        axis = part if axis is None else axis + part
    for name, ijk in parts.items():
        axis = axis + cifti2.BrainModelAxis(name=[name] * len(ijk), voxel=ijk, affine=affine,
                                            volume_shape=shape)
    return axis


def write_series(path, per_hemi, present, per_part, parts, affine=AFFINE, shape=SHAPE):
    """Cortex values {hemi: (V, T)} at the present vertices, then each part's (n, T)."""
    cols = [per_hemi[h][present[h]] for h in ("left", "right")] + [per_part[n] for n in parts]
    data = np.concatenate(cols).T.astype(np.float32)
    series = cifti2.SeriesAxis(T0, DT, data.shape[0], "second")
    img = cifti2.Cifti2Image(data, cifti2.Cifti2Header.from_axes(
        (series, brain_models(present, parts, affine, shape))))
    img.nifti_header.set_intent("NIFTI_INTENT_CONNECTIVITY_DENSE_SERIES")
    img.to_filename(str(path))


def make_volume_cohort(root: Path, effect=0.0, effect_part=RIGHT_PART, n_per_group=4,
                       seed=0, atlas=True) -> Path:
    """participants.tsv, maps.tsv, template/, maps/*.dtseries.nii, analysis.toml."""
    rng = np.random.default_rng(seed)
    root = Path(root)
    (root / "maps").mkdir(parents=True, exist_ok=True)
    (root / "template").mkdir(exist_ok=True)
    for hemi in ("left", "right"):
        v, f, _ = mesh(hemi)
        write_mesh(root / "template" / f"{hemi}.surf.gii", v, f, hemi)
    write_shape(root / "template" / "left.mask.shape.gii", medial_mask("left").astype(float),
                "left")
    if atlas:
        from _surface_fixture import ATLAS_NAMES, write_labels
        for hemi in ("left", "right"):
            v = mesh(hemi)[0]
            write_labels(root / "template" / f"{hemi}.label.gii", np.where(v[:, 1] > 0, 1, 2),
                         ATLAS_NAMES, hemi)
    ids = [f"sub-{i + 1:02d}" for i in range(2 * n_per_group)]
    groups = ["control"] * n_per_group + ["patient"] * n_per_group
    pd.DataFrame({"participant_id": ids, "group": groups,
                  "age": rng.integers(20, 70, size=len(ids))}).to_csv(
        root / "participants.tsv", sep="\t", index=False)
    present = {"left": medial_mask("left"), "right": np.ones(mesh("right")[0].shape[0], bool)}
    parts = part_voxels()
    rows = []
    for pid in ids:
        for cond in ("rare", "frequent"):
            hemis = {h: rng.standard_normal((mesh(h)[0].shape[0], N_T)).astype(np.float32)
                     for h in ("left", "right")}
            vox = {n: rng.standard_normal((len(ijk), N_T)).astype(np.float32)
                   for n, ijk in parts.items()}
            if cond == "rare" and effect:
                vox[effect_part][:, EFFECT_SAMPLES] += effect
            name = f"maps/{pid}_cond-{cond}.dtseries.nii"
            write_series(root / name, hemis, present, vox, parts)
            rows.append({"participant_id": pid, "condition": cond, "path": name})
    pd.DataFrame(rows).to_csv(root / "maps.tsv", sep="\t", index=False)
    text = ANALYSIS.format(time="")
    if not atlas:
        text = text.replace('atlas_left = "template/left.label.gii"\n', "").replace(
            'atlas_right = "template/right.label.gii"\n', "")
    (root / "analysis.toml").write_text(text)
    return root / "analysis.toml"
