"""The lme4 fits of the dietox data, matched through the command line.

The dietox data (72 pigs weighed weekly, 11 or 12 weighings each) ship with
statsmodels' own tests (``statsmodels/regression/tests/results/dietox.csv``);
``statsmodels/regression/tests/test_lme.py`` (``test_dietox``,
``test_dietox_slopes``) quotes R lme4's fits of them:

* ``lmer(Weight ~ Time + (1 | Pig))`` -- REML and ML;
* ``lmer(Weight ~ Time + (1 + Time | Pig))`` -- REML.

Here the table becomes a cohort: each pig a participant, each weighing a map
(a 2-voxel NIfTI whose values are the weight and twice the weight), ``Time`` a
map covariate, and ``groupsrc check`` and ``groupsrc run`` fit the model from
an analysis file with ``mixed = true``.  The estimate and standard-error maps
of the contrasts ``weights = {Intercept = 1}`` and ``slope = "Time"`` and the
variance-component maps of ``model/`` must equal lme4's values: fixed effects
rtol 1e-5, standard errors rtol 1e-4, variance components rtol 1e-3 (the
issue's tolerances; lme4's values are quoted to 6-8 digits).  The second
voxel (2 x weight) must give twice the estimates and four times the
variances (scaling, analytic).
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import statsmodels

from groupsrc.cli import main

DIETOX = Path(statsmodels.__file__).parent / "regression" / "tests" / "results" / "dietox.csv"

#: R lme4 values quoted in statsmodels/regression/tests/test_lme.py
LME4 = {
    "intercept_reml": {"fixef": (15.723523, 6.942505), "se": (0.78805374, 0.03338727),
                       "scale": 11.36692, "cov_re": (40.39395,)},
    "intercept_ml": {"fixef": (15.723517, 6.942506), "se": (0.7829397, 0.0333661),
                     "scale": 11.35251, "cov_re": (39.82097,)},
    "slope_reml": {"fixef": (15.738650, 6.939014), "se": (0.5501253, 0.0798254),
                   "scale": 6.03745, "cov_re": (19.4934552, 0.2938323, 0.4160620)},
}

ANALYSIS = """\
title = "dietox: pig weights over time ({name})"
[cohort]
participants = "participants.tsv"
maps = "maps.tsv"
cache = "cache"
[model]
between = "1"
mixed = true
map_covariates = ["Time"]
{extra}
[[contrasts]]
name = "intercept"
weights = {{ Intercept = 1 }}
[[contrasts]]
name = "time_slope"
slope = "Time"
[inference]
correction = "none"
"""


@pytest.fixture(scope="module")
def cohort(tmp_path_factory):
    if not DIETOX.is_file():
        pytest.skip(f"statsmodels' test data are not installed ({DIETOX})")
    root = tmp_path_factory.mktemp("dietox")
    data = pd.read_csv(DIETOX)
    (root / "maps").mkdir()
    rows = []
    affine = np.diag([2.0, 2.0, 2.0, 1.0])
    for i, r in enumerate(data.itertuples(index=False)):
        vol = np.array([r.Weight, 2 * r.Weight], np.float32).reshape(2, 1, 1, 1)
        img = nib.Nifti1Image(vol, affine)
        img.header.set_xyzt_units("mm", "sec")
        img.header["descrip"] = f"dietox row {i + 1}".encode()   # two equal weighings differ
        name = f"maps/pig{r.Pig}_t{r.Time:02d}.nii.gz"
        nib.save(img, str(root / name))
        rows.append({"participant_id": f"pig-{r.Pig}", "Time": r.Time, "path": name})
    pd.DataFrame(rows).to_csv(root / "maps.tsv", sep="\t", index=False)
    pigs = data.drop_duplicates("Pig")
    pd.DataFrame({"participant_id": [f"pig-{p}" for p in pigs.Pig],
                  "Evit": pigs.Evit.astype(str), "Cu": pigs.Cu.astype(str)}).to_csv(
        root / "participants.tsv", sep="\t", index=False)
    return root


def _run(root, name, extra, capsys):
    analysis = root / f"{name}.toml"
    analysis.write_text(ANALYSIS.format(name=name, extra=extra))
    assert main(["check", str(analysis)]) == 0, capsys.readouterr()
    out = root / f"results_{name}"
    assert main(["run", str(analysis), "--out", str(out)]) == 0, capsys.readouterr()
    capsys.readouterr()
    return out


def _values(path):
    return np.asanyarray(nib.load(str(path)).dataobj).reshape(-1).astype(float)


@pytest.mark.parametrize("case,extra", [("intercept_reml", ""),
                                        ("intercept_ml", 'estimation = "ml"'),
                                        ("slope_reml", 'random_slopes = ["Time"]')])
def test_lme4_dietox_fits_through_the_command_line(cohort, capsys, case, extra):
    out = _run(cohort, case, extra, capsys)
    ref = LME4[case]
    for j, contrast in enumerate(("intercept", "time_slope")):
        est = _values(out / contrast / "estimate.nii.gz")
        se = _values(out / contrast / "std_error.nii.gz")
        np.testing.assert_allclose(est, np.array([1, 2]) * ref["fixef"][j], rtol=1e-5)
        np.testing.assert_allclose(se, np.array([1, 2]) * ref["se"][j], rtol=1e-4)
    model = out / "model"
    np.testing.assert_allclose(_values(model / "sd_residual.nii.gz") ** 2,
                               np.array([1, 4]) * ref["scale"], rtol=1e-3)
    sd0 = _values(model / "sd_intercept.nii.gz")
    np.testing.assert_allclose(sd0 ** 2, np.array([1, 4]) * ref["cov_re"][0], rtol=1e-3)
    if case == "slope_reml":
        sd1 = _values(model / "sd_time.nii.gz")
        corr = _values(model / "corr_intercept__time.nii.gz")
        np.testing.assert_allclose(sd1 ** 2, np.array([1, 4]) * ref["cov_re"][2], rtol=1e-3)
        np.testing.assert_allclose(corr * sd0 * sd1, np.array([1, 4]) * ref["cov_re"][1],
                                   rtol=1e-3)
    fit = pd.read_json(model / "summary.json", typ="series")
    data = pd.read_csv(DIETOX)                       # statsmodels' copy of the table
    assert fit["counts"]["converged"] == 2 and fit["n_maps"] == len(data)
    assert fit["n_participants"] == data["Pig"].nunique()
