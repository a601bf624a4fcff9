"""The demo cohort builder: files, determinism, declared ground truth, safety.

The demo's numbers are invented; nothing here uses them as reference values.
The checks are of the builder's own promises (files, seeds, where it put the
effects) and of the noise model it documents; distances and fractions below
are this project's acceptance thresholds, not values from an outside source.
The maps pass through the forward model of Sarvas (1987, Phys Med Biol
32:11-22) and the minimum-norm weights of Hamalainen & Ilmoniemi (1994, Med
Biol Eng Comput 32:35-42), which tests/test_forward.py and
tests/test_inverse.py check against those sources.
"""

import json
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from groupsrc.cli import main
from groupsrc.formats.nifti import time_axis_from_header
from groupsrc.inputs.problems import InputError
from groupsrc.simulate import build_demo_cohort, demo_truth, scenario_settings
from groupsrc.simulate import build as bd, model as md, truth as tr

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

ROOT = Path(__file__).resolve().parents[1]
TRUTH_NAMES = ("condition_effect", "group_by_condition", "age_effect", "no_effect")


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    return build_demo_cohort(tmp_path_factory.mktemp("small") / "cohort", size="small")


@pytest.fixture(scope="module")
def default_truth():
    cfg = scenario_settings()
    model = md.DemoModel(cfg, "default")
    effects = tr.noise_free_effects(model)
    masks, info = tr.truth_masks(model, md.participants_table("default"), effects)
    return cfg, model, effects, masks, info


def test_shipped_settings_equal_the_demo_cohort_folder_copy():
    packaged = (ROOT / "groupsrc" / "data" / "demo_scenario.toml").read_bytes()
    assert (ROOT / "demo_cohort" / "scenario.toml").read_bytes() == packaged


def test_committed_participants_table_is_reproduced_exactly():
    got = bd.participants_tsv(md.participants_table("default"))
    assert got == (ROOT / "demo_cohort" / "participants.tsv").read_text(encoding="utf-8")
    df = pd.read_csv(ROOT / "demo_cohort" / "participants.tsv", sep="\t")
    assert list(df.columns) == ["participant_id", "group", "age", "sex"]
    assert (df.group.value_counts() == 20).all()
    assert df.participant_id.tolist() == [f"sub-{i:02d}" for i in range(1, 41)]
    assert df.age.between(20, 70).all()
    # stratified ages: both groups span the range alike
    assert abs(df.groupby("group").age.mean().diff().iloc[-1]) < 3


def test_small_cohort_files_are_valid(small):
    root = small.parent
    for name in ("participants.tsv", "maps.tsv", "mask.nii.gz", "analysis.toml",
                 "scenario.toml", "truth/truth.json"):
        assert (root / name).is_file(), name
    maps = pd.read_csv(root / "maps.tsv", sep="\t", dtype=str)
    parts = pd.read_csv(root / "participants.tsv", sep="\t")
    assert list(maps.columns) == ["participant_id", "condition", "session", "path"]
    assert set(maps.participant_id) == set(parts.participant_id)
    assert set(maps.session) == {"1", "2"}
    per = maps.groupby(["participant_id", "session"]).condition.apply(sorted)
    assert all(c == ["frequent", "rare"] for c in per)
    assert (parts.group.value_counts() == 8).all()

    cfg = scenario_settings()
    t = md.time_axis(cfg, "small")
    # header fields as the NIfTI-1 standard (nifti1.h) defines them, read back
    # through nibabel: sform/qform code 2 = aligned to another file, units mm/s
    mask_img = nib.load(str(root / "mask.nii.gz"))
    assert mask_img.get_data_dtype() == np.uint8 and mask_img.ndim == 3
    mask = np.asanyarray(mask_img.dataobj) > 0
    for rel in maps.path:
        assert rel.startswith("maps/") and rel.endswith(".nii.gz")
        img = nib.load(str(root / rel))
        hdr = img.header
        assert img.ndim == 4 and img.shape == mask.shape + (t.n,)
        assert img.get_data_dtype() == np.float32
        np.testing.assert_array_equal(img.affine, mask_img.affine)
        np.testing.assert_array_equal(img.get_qform(), img.get_sform())
        assert int(hdr["sform_code"]) == 2 and int(hdr["qform_code"]) == 2
        assert hdr.get_xyzt_units() == ("mm", "sec")
        assert time_axis_from_header(hdr).close_to(t)
    data = np.asanyarray(img.dataobj)
    assert np.all(np.isfinite(data)) and np.all(data[mask] >= 0) and np.all(data[~mask] == 0)
    assert data[mask].std() > 0
    for name in TRUTH_NAMES:
        timg = nib.load(str(root / "truth" / f"{name}.nii.gz"))
        assert timg.get_data_dtype() == np.uint8 and timg.shape == mask.shape
        np.testing.assert_array_equal(timg.affine, mask_img.affine)
        tm = np.asanyarray(timg.dataobj) > 0
        assert tm.any() and not (tm & ~mask).any()
    settings = tomllib.loads((root / "analysis.toml").read_text())
    assert settings["inference"]["resamples"] == 200
    assert [c["name"] for c in settings["contrasts"]] == [
        "rare_minus_frequent", "group_by_tone", "age_slope"]


def test_small_cohort_checks_clean(small):
    assert main(["check", str(small)]) == 0


def test_builds_are_reproducible_from_the_seed(small, tmp_path):
    again = build_demo_cohort(tmp_path / "again", size="small")
    files = sorted(p.relative_to(small.parent) for p in small.parent.rglob("*") if p.is_file())
    assert files == sorted(p.relative_to(again.parent) for p in again.parent.rglob("*")
                           if p.is_file())
    for rel in files:   # byte-equal, data arrays included (gzip without timestamp)
        assert (small.parent / rel).read_bytes() == (again.parent / rel).read_bytes(), rel
    other = build_demo_cohort(tmp_path / "other", size="small", seed=7)
    rel = "maps/sub-01_ses-1_cond-rare.nii.gz"
    a = np.asanyarray(nib.load(str(small.parent / rel)).dataobj)
    b = np.asanyarray(nib.load(str(other.parent / rel)).dataobj)
    assert not np.array_equal(a, b)


@pytest.mark.parametrize("effect", ["condition_effect", "group_by_condition", "age_effect"])
def test_noise_free_effects_peak_at_their_declared_locations(default_truth, effect):
    # The noise-free group-level effect (forward model + inverse, no noise) peaks
    # within 15 mm of the generator that carries it (10 mm grid), inside the
    # declared window, and the declared location lies in its truth region.
    cfg, model, effects, masks, info = default_truth
    declared = np.array(info[effect]["location_mm"])
    eff = effects[effect]
    s, t = np.unravel_index(np.abs(eff).argmax(), eff.shape)
    xyz = model.grid.coords_mm
    assert np.linalg.norm(xyz[s] - declared) <= 15.0
    lo, hi = info[effect]["window_s"]
    assert lo <= model.times[t] <= hi
    nearest = np.linalg.norm(xyz - declared, axis=1).argmin()
    assert masks[effect][nearest]


def test_group_effect_is_an_interaction_not_a_main_effect(default_truth):
    cfg, model, effects, masks, info = default_truth
    inter = np.abs(effects["group_by_condition"]).max()
    assert np.abs(effects["group_main_effect"]).max() < 0.05 * inter
    # and rare - frequent averaged over groups is ~0 where the interaction is
    where = masks["group_by_condition"]
    assert np.abs(effects["condition_effect"][where]).max() < 0.1 * inter


def test_common_response_is_strong_but_no_effect(default_truth):
    cfg, model, effects, masks, info = default_truth
    common = effects["common_response"]
    w = model.time.window(*cfg["truth"]["common_window_s"])
    peak = np.abs(common[:, w]).max(axis=1)
    strongest_effect = max(np.abs(effects[k]).max() for k in ("condition_effect",
                                                               "group_by_condition"))
    assert peak.max() > strongest_effect          # the largest response of all ...
    s = peak.argmax()
    assert masks["no_effect"][s]                  # ... lies in the no-effect region
    for k in ("condition_effect", "group_by_condition", "age_effect"):
        assert not (masks["no_effect"] & masks[k]).any()


def test_truth_files_agree_with_the_truth_computation(small):
    truth = demo_truth(small)
    assert set(truth["masks"]) == set(TRUTH_NAMES)
    info = truth["info"]
    assert info["size"] == "small" and info["seed"] == scenario_settings()["seed"]
    for name in TRUTH_NAMES[:3]:
        e = info["effects"][name]
        assert e["n_sources"] == int(truth["masks"][name].sum())
        assert len(e["window_s"]) == 2 and len(e["location_mm"]) == 3
    assert info["no_effect"]["n_sources"] == int(truth["masks"]["no_effect"].sum())


def test_noise_has_the_documented_covariance_and_smoothness():
    # Empirical covariance of many noise draws matches the model's covariance of
    # an averaged response (brain + white, each / epochs), and the brain part is
    # AR(1) with the documented coefficient at 100 Hz.
    cfg = scenario_settings()
    model = md.DemoModel(cfg, "default")
    rng = np.random.default_rng(0)
    draws = np.concatenate([model.noise(rng) for _ in range(60)], axis=1)   # (m, 60 T)
    emp = np.cov(draws)
    np.testing.assert_allclose(np.trace(emp), np.trace(model.noise_covariance), rtol=0.05)
    nz = cfg["noise"]
    expected_var = ((nz["brain_noise_ft"] ** 2 + nz["sensor_noise_ft"] ** 2)
                    * 1e-30 / nz["epochs"])
    assert np.mean(np.diag(model.noise_covariance)) == pytest.approx(expected_var, rel=1e-9)
    # lag-1 autocorrelation of the (dominant) brain part: an AR(1) process's
    # lag-1 autocorrelation is its coefficient (common practice), diluted by the
    # share of white noise in the total variance
    x = np.stack([model.noise(rng) for _ in range(200)])                 # (k, m, T)
    lag1 = (x[:, :, 1:] * x[:, :, :-1]).mean() / (x ** 2).mean()
    share = nz["brain_noise_ft"] ** 2 / (nz["brain_noise_ft"] ** 2 + nz["sensor_noise_ft"] ** 2)
    assert lag1 == pytest.approx(share * nz["brain_noise_ar"], abs=0.03)


def test_refuses_a_folder_it_did_not_build(tmp_path):
    target = tmp_path / "mine"
    target.mkdir()
    (target / "participants.tsv").write_text("precious\n")
    with pytest.raises(InputError, match="not empty"):
        build_demo_cohort(target, size="small")
    assert (target / "participants.tsv").read_text() == "precious\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mine"]   # no staging left


def test_rebuild_replaces_its_own_files_and_keeps_others(small, tmp_path):
    target = tmp_path / "c"
    build_demo_cohort(target, size="small", seed=3)
    (target / "results").mkdir()
    (target / "results" / "run.json").write_text("{}")
    (target / "maps" / "stale.nii.gz").write_bytes(b"x")
    build_demo_cohort(target, size="small")
    assert (target / "results" / "run.json").read_text() == "{}"
    assert not (target / "maps" / "stale.nii.gz").exists()
    rel = "maps/sub-01_ses-1_cond-rare.nii.gz"
    assert (target / rel).read_bytes() == (small.parent / rel).read_bytes()
    assert json.loads((target / "truth" / "truth.json").read_text())["seed"] == 20261201


def test_unknown_size_is_refused(tmp_path):
    with pytest.raises(ValueError, match="size"):
        build_demo_cohort(tmp_path / "x", size="huge")
    assert not (tmp_path / "x").exists()


def test_default_size_simulates_one_float32_map_per_row():
    # (timings are never asserted in tests; the demo's run time is in the README)
    sim = md.simulate("default")
    assert len(sim.data) == len(sim.maps) and sim.data[0].dtype == np.float32


def test_simulate_modules_keep_the_one_way_data_flow():
    # The package's own layout rule (DESIGN: data flow one way; NIfTI only
    # through groupsrc.formats): no simulate module imports nibabel, and the
    # array modules never import the file-writing one.
    import ast
    folder = ROOT / "groupsrc" / "simulate"
    order = ["settings", "forward", "inverse", "model", "truth", "build"]
    for path in folder.glob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        imported = set()
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                imported |= {a.name for a in node.names}
            elif isinstance(node, ast.ImportFrom):
                dots = "." * node.level
                if node.module:
                    imported.add(dots + node.module)
                    imported |= {f"{dots}{node.module}.{a.name}" for a in node.names}
                else:
                    imported |= {dots + a.name for a in node.names}
        assert not any(m.split(".")[0] == "nibabel" for m in imported), path.name
        if path.stem in order:
            later = order[order.index(path.stem) + 1:]
            assert not any(m in (f".{x}" for x in later) for m in imported), path.name
