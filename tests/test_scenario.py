"""The demo cohort builder: files, determinism, declared truth."""

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from groupsrc.simulate import build_demo_cohort, scenario_settings
from groupsrc.simulate.scenario import participants_table

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    return build_demo_cohort(tmp_path_factory.mktemp("small") / "cohort", size="small")


def test_shipped_settings_match_demo_cohort_folder():
    packaged = (ROOT / "groupsrc" / "data" / "demo_scenario.toml").read_text()
    assert (ROOT / "demo_cohort" / "scenario.toml").read_text() == packaged


def test_committed_participants_table_is_reproduced():
    cfg = scenario_settings()
    got = participants_table(cfg, "default", cfg["seed"])
    want = pd.read_csv(ROOT / "demo_cohort" / "participants.tsv", sep="\t")
    pd.testing.assert_frame_equal(got.reset_index(drop=True), want, check_dtype=False)
    assert (want.group.value_counts() == 20).all()


def test_small_cohort_files(small):
    root = small.parent
    maps = pd.read_csv(root / "maps.tsv", sep="\t", dtype=str)
    parts = pd.read_csv(root / "participants.tsv", sep="\t")
    assert set(maps.participant_id) == set(parts.participant_id)
    assert set(maps.condition) == {"rare", "frequent"}
    assert (maps.session == "2").any()  # some participants have two sessions
    ref = nib.load(str(root / maps.path[0]))
    for rel in maps.path:
        img = nib.load(str(root / rel))
        assert img.ndim == 4 and img.shape == ref.shape
        np.testing.assert_allclose(img.affine, ref.affine)
        assert img.header.get_xyzt_units() == ("mm", "sec")
    mask = nib.load(str(root / "mask.nii.gz"))
    np.testing.assert_allclose(mask.affine, ref.affine)


def test_reproducible_from_seed(small, tmp_path):
    again = build_demo_cohort(tmp_path / "again", size="small")
    maps = pd.read_csv(small.parent / "maps.tsv", sep="\t", dtype=str)
    for rel in maps.path[:6]:
        a = np.asanyarray(nib.load(str(small.parent / rel)).dataobj)
        b = np.asanyarray(nib.load(str(again.parent / rel)).dataobj)
        np.testing.assert_array_equal(a, b)
    other = build_demo_cohort(tmp_path / "other", size="small", seed=7)
    a = np.asanyarray(nib.load(str(small.parent / maps.path[0])).dataobj)
    b = np.asanyarray(nib.load(str(other.parent / maps.path[0])).dataobj)
    assert not np.array_equal(a, b)


def test_truth_regions_lie_at_the_declared_generators(small):
    root = small.parent
    info = json.loads((root / "truth" / "truth.json").read_text())
    mask = nib.load(str(root / "mask.nii.gz"))
    for name, eff in info["effects"].items():
        img = nib.load(str(root / "truth" / f"{name}.nii.gz"))
        ijk = np.argwhere(np.asanyarray(img.dataobj) > 0)
        xyz = ijk @ img.affine[:3, :3].T + img.affine[:3, 3]
        d = np.linalg.norm(xyz - np.array(eff["generator_mm"]), axis=1)
        # the generator lies in (within one 15 mm voxel diagonal of) its region
        assert d.min() <= 15.0 * np.sqrt(3) / 2 + 1e-6, name
    quiet = np.asanyarray(nib.load(str(root / "truth" / "no_effect.nii.gz")).dataobj) > 0
    for name in info["effects"]:
        eff = np.asanyarray(nib.load(str(root / "truth" / f"{name}.nii.gz")).dataobj) > 0
        assert not (quiet & eff).any()
    assert quiet.any()


def test_small_demo_checks_clean(small, capsys):
    from groupsrc.cli import main
    assert main(["check", str(small)]) == 0
