"""Shared fixtures: a tiny synthetic cohort on disk for loading and validation tests.

The data are random numbers (no check value is taken from them); they exist
so that tables, headers and broken copies can be exercised.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

AFFINE = np.array([[4.0, 0, 0, -10], [0, 4.0, 0, -12], [0, 0, 4.0, -8], [0, 0, 0, 1]])
SHAPE = (6, 7, 5)
N_T = 9
DT = 0.004
T0 = -0.008


def write_map(path, data, affine=AFFINE, dt=DT, t0=T0, tunit="sec"):
    img = nib.Nifti1Image(np.asarray(data, dtype=np.float32), affine)
    img.header.set_xyzt_units("mm", tunit)
    scale = 1e3 if tunit == "msec" else 1.0
    zooms = list(img.header.get_zooms()[:3]) + [dt * scale] if np.ndim(data) == 4 else None
    if zooms:
        img.header.set_zooms(zooms)
        img.header["toffset"] = t0 * scale
    img.set_sform(affine, code=2)
    img.set_qform(affine, code=2)
    nib.save(img, str(path))


def make_cohort(root: Path, n_per_group=4, conditions=("rare", "frequent"), sessions=None,
                seed=0, with_mask=True) -> Path:
    """Write participants.tsv, maps.tsv, maps/*.nii.gz, mask.nii.gz, analysis.toml."""
    rng = np.random.default_rng(seed)
    root = Path(root)
    (root / "maps").mkdir(parents=True, exist_ok=True)
    ids = [f"sub-{i + 1:02d}" for i in range(2 * n_per_group)]
    groups = ["control"] * n_per_group + ["patient"] * n_per_group
    ages = rng.integers(20, 70, size=len(ids))
    pd.DataFrame({"participant_id": ids, "group": groups, "age": ages}).to_csv(
        root / "participants.tsv", sep="\t", index=False)
    mask = np.zeros(SHAPE, np.uint8)
    mask[1:5, 1:6, 1:4] = 1
    if with_mask:
        write_mask(root / "mask.nii.gz", mask)
    rows = []
    for pid in ids:
        for cond in conditions:
            for ses in (sessions or [None]):
                name = f"{pid}_cond-{cond}" + (f"_ses-{ses}" if ses else "") + ".nii.gz"
                data = rng.standard_normal(SHAPE + (N_T,)).astype(np.float32)
                data[mask == 0] = 0.0
                write_map(root / "maps" / name, data)
                row = {"participant_id": pid, "condition": cond, "path": f"maps/{name}"}
                if ses:
                    row["session"] = ses
                rows.append(row)
    pd.DataFrame(rows).to_csv(root / "maps.tsv", sep="\t", index=False)
    (root / "analysis.toml").write_text(ANALYSIS)
    return root / "analysis.toml"


def write_mask(path, mask, affine=AFFINE):
    img = nib.Nifti1Image(np.asarray(mask, dtype=np.uint8), affine)
    img.set_sform(affine, code=2)
    img.set_qform(affine, code=2)
    nib.save(img, str(path))


ANALYSIS = """\
title = "tiny test cohort"
[cohort]
participants = "participants.tsv"
maps = "maps.tsv"
mask = "mask.nii.gz"
[model]
between = "group + age"
within = "condition"
[[contrasts]]
name = "rare_minus_frequent"
within = { rare = 1, frequent = -1 }
[[contrasts]]
name = "group_by_tone"
within = { rare = 1, frequent = -1 }
compare = { group = ["patient", "control"] }
[[contrasts]]
name = "age_slope"
slope = "age"
[inference]
correction = "cluster-mass"
resamples = 50
seed = 3
forming_p = 0.05
"""


@pytest.fixture(autouse=True)
def _private_cache(tmp_path_factory, monkeypatch):
    """Keep every test's loading cache out of the user's home."""
    monkeypatch.setenv("GROUPSRC_CACHE_DIR", str(tmp_path_factory.mktemp("cache")))


@pytest.fixture
def tiny_cohort(tmp_path):
    return make_cohort(tmp_path / "cohort")


def copy_cohort(src_analysis: Path, dst: Path) -> Path:
    shutil.copytree(src_analysis.parent, dst)
    return dst / src_analysis.name
