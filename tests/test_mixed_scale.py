"""The mixed model with the surface source space, checkpoints and resume, and --memory.

* On a surface (GIfTI per hemisphere): the written estimate and standard error of a
  mixed-model contrast against a statsmodels MixedLM REML refit of the maps read back
  with nibabel (reference library), the z map's value against the restricted-model
  score (as in test_mixed_pipeline), its intent code NIFTI_INTENT_ZSCORE (NIfTI-1
  intent code 5, as the GIfTI standard stores it), and model/ written as GIfTI.
  A follow-up with a region of one's own (a NIfTI mask) is refused on a surface.
* A mixed-model run killed (SIGKILL) part-way through a contrast's resampling and
  resumed gives the uninterrupted run's files byte for byte (the project's own
  promise, DESIGN.md; no outside value).
* --memory with mixed-model contrasts is refused with a message (exit 1).
"""

from __future__ import annotations

import signal
from types import SimpleNamespace

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from _mixed_data import statsmodels_reml
from _surface_fixture import make_surface_cohort, medial_mask
from groupsrc.cli import main
from groupsrc.pipeline import checkpoint_folder
from test_mixed_check import _model, _unbalanced
from test_mixed_pipeline import _score_z
from test_scale_resume import _run, assert_same_results


@pytest.fixture(scope="module")
def surface_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("mixed_surface")
    analysis = make_surface_cohort(root / "cohort", "gifti")
    _model(analysis, "mixed = true")
    out = root / "results"
    assert main(["run", str(analysis), "--out", str(out), "--quiet"]) == 0
    return root / "cohort", out


def _gifti(path):
    img = nib.load(str(path))
    return np.column_stack([d.data for d in img.darrays]), img


@pytest.mark.filterwarnings("ignore")
def test_mixed_model_on_a_surface_against_statsmodels(surface_run):
    cohort, out = surface_run
    parts = pd.read_csv(cohort / "participants.tsv", sep="\t").set_index("participant_id")
    maps = pd.read_csv(cohort / "maps.tsv", sep="\t")
    folder = out / "rare_minus_frequent"
    est, _ = _gifti(folder / "estimate.left.func.gii")
    se, _ = _gifti(folder / "std_error.left.func.gii")
    z, zimg = _gifti(folder / "statistic.left.func.gii")
    assert zimg.darrays[0].intent == 5                      # NIFTI_INTENT_ZSCORE (nifti1.h)
    code, _ = _gifti(out / "model" / "fit_code.left.func.gii")
    Y = np.stack([_gifti(cohort / p)[0] for p in maps.path_left])       # (maps, V, T)
    rare = (maps.condition == "rare").to_numpy(float)
    pat = (parts.loc[maps.participant_id, "group"] == "patient").to_numpy(float)
    age = parts.loc[maps.participant_id, "age"].to_numpy(float)
    X = np.c_[np.ones_like(rare), rare, pat, pat * rare, age, age * rare]
    L = np.array([0, 1, 0, 0.5, 0, parts.age.mean()])
    g = pd.factorize(maps.participant_id)[0]
    checked = scored = 0
    inside = np.flatnonzero(medial_mask("left"))              # sources of the left file
    for v, t in zip(inside[[0, 5, 17, 40, 90, 120]], [1, 2, 3, 4, 5, 0]):
        if code[v, t] != 0:
            continue
        y = Y[:, v, t].astype(float)
        fit, fixed = statsmodels_reml(y, SimpleNamespace(X=X, Z=np.ones((len(y), 1)), groups=g))
        if float(np.asarray(fit.cov_re)[0, 0]) < 1e-4 * fit.scale:
            continue                                    # boundary: statsmodels unreliable
        checked += 1
        np.testing.assert_allclose(est[v, t], L @ fit.fe_params, rtol=1e-4, atol=1e-5)
        np.testing.assert_allclose(se[v, t], np.sqrt(L @ np.asarray(fixed.cov_params())[:6, :6]
                                                     @ L), rtol=1e-4)
        z_ref = _score_z(y, X, g, L)
        if z_ref is not None:
            scored += 1
            np.testing.assert_allclose(z[v, t], z_ref, rtol=1e-4, atol=1e-5)
    assert checked >= 2 and scored >= 1
    for stem in ("icc", "sd_residual", "sd_intercept", "fit_code"):
        for h in ("left", "right"):
            assert (out / "model" / f"{stem}.{h}.func.gii").is_file()


def test_followup_mask_on_a_surface_is_refused(surface_run, tmp_path, capsys):
    _, out = surface_run
    mask = tmp_path / "mask.nii.gz"
    nib.save(nib.Nifti1Image(np.ones((3, 3, 3), np.uint8), np.eye(4)), str(mask))
    assert main(["followup", str(out), "--mask", str(mask), "--out", str(tmp_path / "f")]) == 1
    err = capsys.readouterr().err
    assert "--mask" in err and "surface" in err and "Traceback" not in err
    assert not (tmp_path / "f").exists()


@pytest.fixture(scope="module")
def mixed_cohort(tmp_path_factory):
    root = tmp_path_factory.mktemp("mixed_resume")
    analysis = _unbalanced(root / "c")
    _model(analysis, "mixed = true")
    return analysis


def test_memory_bound_is_refused_with_the_mixed_model(mixed_cohort, tmp_path, capsys):
    out = tmp_path / "r"
    assert main(["run", str(mixed_cohort), "--out", str(out), "--memory", "2G",
                 "--quiet"]) == 1
    err = capsys.readouterr().err
    assert "--memory" in err and "mixed model" in err and "Traceback" not in err
    assert not out.exists()


def test_sigkill_then_resume_gives_the_uninterrupted_mixed_results(mixed_cohort, tmp_path):
    cache = tmp_path / "cache"
    ref, out = tmp_path / "ref", tmp_path / "out"
    base = ["run", str(mixed_cohort), "--resamples", "160", "--quiet"]
    r = _run(base + ["--out", str(ref)], cache=cache)
    assert r.returncode == 0, r.stderr
    killed = _run(base + ["--out", str(out)], {"KILL_AT": "4", "KILL_IN": "age_slope"},
                  cache=cache)
    assert killed.returncode == -signal.SIGKILL
    assert checkpoint_folder(out).is_dir() and not out.exists()
    resumed = _run(base + ["--out", str(out), "--resume"], wrapper=False, cache=cache)
    assert resumed.returncode == 0, resumed.stderr
    assert "resuming the interrupted run" in resumed.stderr
    assert_same_results(ref, out, "age_slope/null_distribution.tsv")


def test_surface_views_show_a_z_map_on_the_signed_scale():
    """The surface views colour a mixed model's z like a t (both signs; the project's
    own convention, groupsrc/outputs/surface_figures.py), not like an F."""
    from groupsrc.outputs import figures
    from groupsrc.outputs.surface_figures import surface_cmap
    assert surface_cmap("z")(0.0) == surface_cmap("t")(0.0) != surface_cmap("F")(0.0)
    assert figures._stat_range(np.array([-2.0, 1.0]), "z") == (-2.0, 2.0)
