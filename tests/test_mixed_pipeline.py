"""`groupsrc run` with mixed = true on an unbalanced cohort: the written maps against a
statsmodels MixedLM refit of the same maps (read back with nibabel), the files of
model/ and the report.

The contrasts' meaning (DESIGN.md, "Contrast meaning") as weight vectors over
the columns [1, rare, patient, patient:rare, age, age:rare], built here
independently of groupsrc and applied to statsmodels' fit:

* rare_minus_frequent, the condition effect averaged over the groups with
  equal weight at the mean age: [0, 1, 0, 1/2, 0, mean age];
* group_by_tone, patients minus controls of rare minus frequent: [0, 0, 0, 1, 0, 0];
* age_slope, per year of age, averaged over the conditions: [0, 0, 0, 0, 1, 1/2].
"""

from __future__ import annotations

import json
from types import SimpleNamespace

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from groupsrc.cli import main

from _mixed_data import statsmodels_reml
from test_mixed_check import _model, _unbalanced


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    root = tmp_path_factory.mktemp("mixedrun")
    analysis = _unbalanced(root / "c")
    _model(analysis, "mixed = true")
    body = analysis.read_text().replace('correction = "cluster-mass"', 'correction = "max-stat"')
    analysis.write_text(body)
    out = root / "out"
    assert main(["run", str(analysis), "--out", str(out)]) == 0
    return root / "c", out


def _maps_values(cohort, voxel):
    maps = pd.read_csv(cohort / "maps.tsv", sep="\t", dtype=str)
    y = np.array([np.asanyarray(nib.load(str(cohort / p)).dataobj)[voxel] for p in maps.path],
                 float)
    return maps, y


def _img(path):
    return np.asanyarray(nib.load(str(path)).dataobj)


@pytest.mark.parametrize("contrast", ["rare_minus_frequent", "group_by_tone", "age_slope"])
def test_estimates_equal_a_statsmodels_refit(results, contrast):
    cohort, out = results
    parts = pd.read_csv(cohort / "participants.tsv", sep="\t").set_index("participant_id")
    folder = out / contrast
    est_img, se_img = _img(folder / "estimate.nii.gz"), _img(folder / "std_error.nii.gz")
    t_img, df_img = _img(folder / "test_statistic.nii.gz"), _img(folder / "df.nii.gz")
    p_img = _img(folder / "p_uncorrected.nii.gz")
    z_img = nib.load(str(folder / "statistic.nii.gz"))
    assert z_img.header.get_intent()[0] == "z score"            # NIfTI-1 intent code 5
    z_img = np.asanyarray(z_img.dataobj)
    codes = np.asanyarray(nib.load(str(out / "model" / "fit_code.nii.gz")).dataobj)
    checked = 0
    for voxel in [(2, 2, 2, t) for t in range(9)] + [(3, 4, 1, 2), (1, 1, 3, 5)]:
        if codes[voxel] != 0:
            continue
        maps, y = _maps_values(cohort, voxel)
        rare = (maps.condition == "rare").to_numpy(float)
        pat = (parts.loc[maps.participant_id, "group"] == "patient").to_numpy(float)
        age = parts.loc[maps.participant_id, "age"].to_numpy(float)
        X = np.c_[np.ones_like(rare), rare, pat, pat * rare, age, age * rare]
        L = {"rare_minus_frequent": np.array([0, 1, 0, 0.5, 0, parts.age.mean()]),
             "group_by_tone": np.array([0, 0, 0, 1.0, 0, 0]),
             "age_slope": np.array([0, 0, 0, 0, 1, 0.5])}[contrast]
        g = pd.factorize(maps.participant_id)[0]
        fit, fixed = statsmodels_reml(y, SimpleNamespace(X=X, Z=np.ones((len(y), 1)), groups=g))
        if float(np.asarray(fit.cov_re)[0, 0]) < 1e-4 * fit.scale:
            continue                                    # boundary: statsmodels unreliable
        checked += 1
        est = float(L @ fit.fe_params)
        se = float(np.sqrt(L @ np.asarray(fixed.cov_params())[:6, :6] @ L))
        # float32 maps: relative tolerance 1e-4
        np.testing.assert_allclose(est_img[voxel], est, rtol=1e-4, atol=1e-5)
        np.testing.assert_allclose(se_img[voxel], se, rtol=1e-4)
        np.testing.assert_allclose(t_img[voxel], est / se, rtol=1e-4, atol=1e-5)
        nu = float(df_img[voxel])
        np.testing.assert_allclose(p_img[voxel], 2 * stats.t.sf(abs(est / se), nu), rtol=1e-4)
        np.testing.assert_allclose(z_img[voxel], np.sign(est) * stats.norm.isf(
            stats.t.sf(abs(est / se), nu)), rtol=1e-4, atol=1e-5)
    assert checked >= 3


def test_model_folder_and_report(results):
    cohort, out = results
    model = out / "model"
    for stem in ("sd_residual", "sd_intercept", "icc", "fit_code"):
        img = nib.load(str(model / f"{stem}.nii.gz"))
        assert img.shape[3] == 9
    icc = np.asanyarray(nib.load(str(model / "icc.nii.gz")).dataobj)
    assert np.all((icc >= 0) & (icc <= 1))
    summary = json.loads((model / "summary.json").read_text())
    assert sum(summary["counts"].values()) == summary["n_features"] == 60 * 9
    assert summary["n_maps"] == 28 and summary["n_participants"] == 8
    design = pd.read_csv(model / "design.tsv", sep="\t")
    assert len(design) == 28 and list(design.columns[:3]) == ["participant_id", "condition",
                                                              "session"]
    record = json.loads((out / "run.json").read_text())
    assert "model/icc.nii.gz" in record["output_files"]
    assert [c["model"] for c in record["contrasts"]] == ["mixed"] * 3
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "Mixed model" in html and "Fit codes" in html and "Satterthwaite" in html
    md = (out / "methods.md").read_text(encoding="utf-8")
    assert "linear mixed model was fitted by REML" in md
    assert "whole-participant sign flips" in md
    assert "whole-participant permutations within map layouts" in md
    assert "variance components of each source and sample were held" in md
    assert "Satterthwaite FE (1946)" in md and "Multi-level block permutation" in md
    table = pd.read_csv(out / "rare_minus_frequent" / "clusters.tsv", sep="\t")
    assert set(table["stat_type"]) <= {"z"}


def test_the_report_rebuilds_from_the_folder(results, capsys):
    _, out = results
    before = (out / "report.html").read_text(encoding="utf-8")
    assert main(["report", str(out)]) == 0
    assert (out / "report.html").read_text(encoding="utf-8") == before
    assert (out / "model" / "figures" / "fit_over_time.png").is_file()
