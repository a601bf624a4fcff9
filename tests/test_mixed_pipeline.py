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
from conftest import DT, N_T, T0
from test_mixed_check import _model, _unbalanced


def _add_rare_effect(cohort, size=3.0):
    """Invented test input: +size in a small block of sources and samples of every
    'rare' map (so that rare_minus_frequent has a cluster to follow up)."""
    maps = pd.read_csv(cohort / "maps.tsv", sep="\t", dtype=str)
    for path in maps.path[maps.condition == "rare"]:
        img = nib.load(str(cohort / path))
        data = np.asanyarray(img.dataobj).copy()
        data[2:4, 2:4, 1:3, 3:6] += size
        nib.save(nib.Nifti1Image(data, img.affine, img.header), str(cohort / path))


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    root = tmp_path_factory.mktemp("mixedrun")
    analysis = _unbalanced(root / "c")
    _add_rare_effect(root / "c")
    # an intercept-only model, as the statsmodels references below fit (with its repeated
    # sessions the cohort would get a random condition slope by default)
    _model(analysis, "mixed = true\nrandom_slopes = []")
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
    checked = scored = 0
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
        z_ref = _score_z(y, X, g, L)
        if z_ref is not None:
            scored += 1
            np.testing.assert_allclose(z_img[voxel], z_ref, rtol=1e-4, atol=1e-5)
    assert checked >= 3 and scored >= 2


def _score_z(y, X, g, L):
    """The z map's value at one point: the contrast's t with the random-intercept variance
    held at a free statsmodels MixedLM REML fit of the model restricted to L b = 0
    (reference library), converted to the z of equal p (scipy) at the scoring
    Satterthwaite df of groupsrc (those df are checked in test_mixed_satterthwaite).
    None where either restricted fit puts the participant variance at or below zero
    (statsmodels holds it at zero there, groupsrc estimates it unconstrained)."""
    from statsmodels.regression.mixed_linear_model import MixedLM, MixedLMParams

    from groupsrc.stats.models.mixed.model import MixedCore, MixedDesign
    from groupsrc.stats.models.mixed.fit import fit_features
    from groupsrc.stats.models.mixed.kernel import MixedKernel
    Z = np.ones((len(y), 1))
    Nc = np.linalg.svd(L[None, :])[2][1:].T
    null, _ = statsmodels_reml(y, SimpleNamespace(X=X @ Nc, Z=Z, groups=g))
    Y = y[:, None].astype(np.float32)
    kernel = MixedKernel(fit_features(MixedCore(MixedDesign(X, Z, g)), Y), Y, L)
    if kernel.null_fit().code[0] != 0 or float(np.asarray(null.cov_re)[0, 0]) < 1e-4 * null.scale:
        return None
    free = MixedLMParams.from_components(np.ones(X.shape[1]), np.zeros((1, 1)))
    start = MixedLMParams.from_components(np.zeros(X.shape[1]),
                                          np.asarray(null.cov_re) / null.scale)
    t = float(np.squeeze(MixedLM(y, X, g, exog_re=Z).fit(
        reml=True, free=free, start_params=start, method=["bfgs"]).t_test(L[None, :]).tvalue))
    kernel.observed("two")
    return np.sign(t) * stats.norm.isf(stats.t.sf(abs(t), kernel._nu[0]))


def test_model_folder_and_report(results):
    cohort, out = results
    model = out / "model"
    for stem in ("sd_residual", "sd_intercept", "icc", "fit_code"):
        img = nib.load(str(model / f"{stem}.nii.gz"))
        assert img.shape[3] == 9
    icc = np.asanyarray(nib.load(str(model / "icc.nii.gz")).dataobj)
    code = np.asanyarray(nib.load(str(model / "fit_code.nii.gz")).dataobj)
    assert np.all((icc > -1) & (icc <= 1))
    # a random intercept only: the ICC is below zero exactly where the participant
    # variance is (the boundary fits, kept unconstrained)
    np.testing.assert_array_equal(icc < 0, (code == 1) & (icc != 0))
    summary = json.loads((model / "summary.json").read_text())
    # the counts from the cohort's own files (nibabel, pandas), not from groupsrc
    n_sources = int((_img(cohort / "mask.nii.gz") > 0).sum())
    maps = pd.read_csv(cohort / "maps.tsv", sep="\t")
    assert sum(summary["counts"].values()) == summary["n_features"] == n_sources * N_T
    assert summary["n_maps"] == len(maps)
    assert summary["n_participants"] == maps.participant_id.nunique()
    design = pd.read_csv(model / "design.tsv", sep="\t")
    assert len(design) == len(maps) and list(design.columns[:3]) == ["participant_id", "condition",
                                                              "session"]
    record = json.loads((out / "run.json").read_text())
    assert "model/icc.nii.gz" in record["output_files"]
    assert [c["model"] for c in record["contrasts"]] == ["mixed"] * 3
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "Mixed model" in html and "Fit codes" in html and "Satterthwaite" in html
    md = (out / "methods.md").read_text(encoding="utf-8")
    assert "linear mixed model was fitted by REML" in md
    assert "whole-participant sign flips" in md
    assert "whole-participant permutations within covariance layouts" in md
    assert "the variance components were held at the REML estimates of the model without" in md
    assert "Satterthwaite FE (1946)" in md and "Multi-level block permutation" in md
    table = pd.read_csv(out / "rare_minus_frequent" / "clusters.tsv", sep="\t")
    assert len(table) > 0 and set(table["stat_type"]) == {"z"}


def test_the_report_rebuilds_from_the_folder(results, capsys):
    _, out = results
    before = (out / "report.html").read_text(encoding="utf-8")
    assert main(["report", str(out)]) == 0
    assert (out / "report.html").read_text(encoding="utf-8") == before
    assert (out / "model" / "figures" / "fit_over_time.png").is_file()


# ----------------------------------------------------------------------------
# groupsrc followup
# ----------------------------------------------------------------------------

def _followup(results, tmp_path, *args):
    out = tmp_path / "fu"
    rc = main(["followup", str(results), "--out", str(out), *args])
    return rc, out


@pytest.mark.filterwarnings("ignore")
def test_followup_of_a_cluster_means_and_refit(results, tmp_path, capsys):
    """region_means.tsv against the maps and labels read with nibabel; the refit against
    statsmodels' formula interface on that table (reference library); the caution."""
    import statsmodels.formula.api as smf
    cohort, out = results
    rc, fu = _followup(out, tmp_path, "--contrast", "rare_minus_frequent", "--cluster", "1")
    assert rc == 0, capsys.readouterr()
    means = pd.read_csv(fu / "region_means.tsv", sep="\t")
    labels = _img(out / "rare_minus_frequent" / "clusters.nii.gz")
    maps = pd.read_csv(cohort / "maps.tsv", sep="\t", dtype=str)
    win = slice(0, labels.shape[3])                  # the analysed window is every sample
    expect = [np.asanyarray(nib.load(str(cohort / p)).dataobj)[..., win][labels == 1].mean()
              for p in maps.path]
    np.testing.assert_allclose(means["value"], expect, rtol=1e-5)
    assert list(means["participant_id"]) == list(maps.participant_id)
    assert {"condition", "session", "group", "age"} <= set(means.columns)
    coefs = pd.read_csv(fu / "coefficients.tsv", sep="\t")
    data = means.assign(rare=(means.condition == "rare").astype(float),
                        patient=(means.group == "patient").astype(float))
    ref = smf.mixedlm("value ~ rare * (patient + age)", data, groups=data["participant_id"]
                      ).fit(reml=True)
    fixed = coefs[coefs.kind == "fixed"].set_index("term")["estimate"]
    np.testing.assert_allclose(fixed["Intercept"], ref.fe_params["Intercept"], rtol=1e-4,
                               atol=1e-6)
    np.testing.assert_allclose(fixed["group[T.patient]:condition[T.rare]"],
                               ref.fe_params["rare:patient"], rtol=1e-4, atol=1e-6)
    assert set(coefs.circular) == {"yes"}
    regions = pd.read_csv(fu / "regions.tsv", sep="\t")
    assert regions.loc[0, "region"] == "rare_minus_frequent_cluster1"
    assert "Kriegeskorte" in regions.loc[0, "caution"]
    assert "Kriegeskorte et al. 2009" in (fu / "followup.md").read_text()


def test_followup_of_a_region_of_ones_own(results, tmp_path, capsys):
    cohort, out = results
    rc, fu = _followup(out, tmp_path, "--mask", str(cohort / "mask.nii.gz"),
                       "--window", "0", "0.012")
    assert rc == 0, capsys.readouterr()
    regions = pd.read_csv(fu / "regions.tsv", sep="\t")
    times = T0 + DT * np.arange(N_T)                 # the fixture's time axis (seconds)
    in_window = int(np.sum((times >= 0 - 1e-9) & (times <= 0.012 + 1e-9)))
    assert list(regions.origin) == ["mask"] and regions.loc[0, "n_samples"] == in_window
    assert set(pd.read_csv(fu / "coefficients.tsv", sep="\t").circular) == {"no"}
    contrasts = pd.read_csv(fu / "coefficients.tsv", sep="\t").query("kind == 'contrast'")
    assert len(contrasts) == 3
    # a second follow-up into the same folder needs --overwrite, and then replaces it
    rc, _ = _followup(out, tmp_path, "--mask", str(cohort / "mask.nii.gz"))
    assert rc == 1 and "add --overwrite" in capsys.readouterr().err
    rc, _ = _followup(out, tmp_path, "--mask", str(cohort / "mask.nii.gz"), "--overwrite")
    assert rc == 0
    assert pd.read_csv(fu / "regions.tsv", sep="\t").loc[0, "n_samples"] == N_T


@pytest.mark.parametrize("args,fragments", [
    (["--contrast", "rare_minus"], ["--contrast rare_minus", "rare_minus_frequent"]),
    (["--contrast", "age_slope", "--cluster", "999"], ["--cluster 999", "has no cluster 999"]),
    (["--cluster", "1"], ["--cluster", "needs --contrast"]),
    (["--mask", "MAP", "--window", "0", "0.01"], ["3D", "mask"]),
    (["--mask", "MASK", "--window", "2", "3"], ["--window 2 3", "holds no sample"]),
    (["--mask", "region.left.shape.gii"], ["--mask", "region.left.shape.gii", "GIfTI",
                                           "volume grid", "source_mask.nii.gz"]),
    (["--mask", "region.dscalar.nii"], ["--mask", "region.dscalar.nii", "CIFTI-2",
                                        "volume grid"]),
    (["--mask", "MASK", "--mask", "MASK"], ["mask.nii.gz", "is given twice"]),
])
def test_followup_problems_are_named(results, tmp_path, capsys, args, fragments):
    cohort, out = results
    maps = pd.read_csv(cohort / "maps.tsv", sep="\t", dtype=str)
    for name in ("region.left.shape.gii", "region.dscalar.nii"):   # refused by their kind
        (tmp_path / name).write_bytes(b"")
    args = [str(cohort / maps.path[0]) if a == "MAP" else str(cohort / "mask.nii.gz")
            if a == "MASK" else str(tmp_path / a) if a.startswith("region.") else a
            for a in args]
    rc, fu = _followup(out, tmp_path, *args)
    text = capsys.readouterr().err
    assert rc == 1 and "Traceback" not in text
    for f in fragments:
        assert f in text, text
    assert not fu.exists()


def test_followup_never_writes_into_the_results_or_over_a_foreign_folder(results, tmp_path,
                                                                          capsys):
    cohort, out = results
    assert main(["followup", str(out), "--out", str(out / "fu")]) == 1
    assert "inside the results folder" in capsys.readouterr().err
    other = tmp_path / "notes"
    other.mkdir()
    (other / "mine.txt").write_text("keep me")
    assert main(["followup", str(out), "--mask", str(cohort / "mask.nii.gz"),
                 "--out", str(other), "--overwrite"]) == 1
    assert "not written by 'groupsrc followup'" in capsys.readouterr().err
    assert (other / "mine.txt").read_text() == "keep me"


def test_followup_refuses_inputs_changed_since_the_run(results, tmp_path, capsys):
    import shutil
    cohort, out = results
    copy = tmp_path / "c"
    shutil.copytree(cohort, copy)
    record = json.loads((out / "run.json").read_text())
    res = tmp_path / "res"
    shutil.copytree(out, res)
    # the copy's run record points at the copied analysis file; then one map changes
    record["analysis_file"] = str(copy / "analysis.toml")
    record["inputs_sha256"] = {k.replace(str(cohort), str(copy)): v
                               for k, v in record["inputs_sha256"].items()}
    (res / "run.json").write_text(json.dumps(record))
    maps = pd.read_csv(copy / "maps.tsv", sep="\t", dtype=str)
    img = nib.load(str(copy / maps.path[3]))
    nib.save(nib.Nifti1Image(np.asanyarray(img.dataobj) + 1, img.affine, img.header),
             str(copy / maps.path[3]))
    rc = main(["followup", str(res), "--mask", str(copy / "mask.nii.gz")])
    text = capsys.readouterr().err
    assert rc == 1 and maps.path[3] in text and "changed since the run" in text


def test_the_full_models_own_z_is_written_beside_the_score_z(results):
    """z_full_model: the written t through the written df, as the z of equal one-sided
    tail probability (scipy.stats t and normal tails)."""
    _, out = results
    folder = out / "rare_minus_frequent"
    t, df = _img(folder / "test_statistic.nii.gz"), _img(folder / "df.nii.gz")
    zf = _img(folder / "z_full_model.nii.gz")
    mask = _img(out / "source_mask.nii.gz") > 0
    tt, dd = t[mask].astype(float), df[mask].astype(float)
    ref = np.sign(tt) * stats.norm.isf(stats.t.sf(np.abs(tt), dd))
    np.testing.assert_allclose(zf[mask], ref, rtol=1e-4, atol=1e-4)
    assert not np.allclose(zf[mask], _img(folder / "statistic.nii.gz")[mask])   # not the score
