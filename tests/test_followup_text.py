"""groupsrc followup read as a reviewer reads it: the test that selected a cluster is
not reported on it (circularity; Kriegeskorte et al. 2009, Nat Neurosci 12:535-540),
contrasts come as t with Satterthwaite df and a 95% interval, and followup.md shows the
intervals.

Check values: the t-interval est +- t(0.975, df) se and p = 2 P(T > |t|) are computed
here with scipy (reference library) from the table's own estimate, SE and df; the
contrast estimate agrees with statsmodels' MixedLM fit on region_means.tsv (reference
library; REML estimates of the fixed effects under one model).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from test_mixed_pipeline import _followup, results  # noqa: F401  (module fixture)


def test_the_selecting_contrast_is_circular_and_the_others_are_t_with_df(results, tmp_path,
                                                                          capsys):
    import statsmodels.formula.api as smf
    cohort, out = results
    rc, fu = _followup(out, tmp_path, "--contrast", "rare_minus_frequent", "--cluster", "1")
    assert rc == 0, capsys.readouterr()
    coefs = pd.read_csv(fu / "coefficients.tsv", sep="\t")
    con = coefs[coefs.kind == "contrast"].set_index("term")
    own = con.loc["contrast rare_minus_frequent"]
    assert np.isnan(own["t"]) and np.isnan(own["df"]) and np.isnan(own["p"])
    assert own["note"].startswith("circular, not reported")
    assert np.isfinite(own["estimate"]) and np.isfinite(own["ci_low"])   # described, not tested
    other = con.loc["contrast group_by_tone"]
    assert np.isfinite(other["t"]) and other["df"] > 0 and pd.isna(other["note"])  # n/a
    q = stats.t.ppf(0.975, other["df"])
    np.testing.assert_allclose([other["ci_low"], other["ci_high"]],
                               [other["estimate"] - q * other["std_error"],
                                other["estimate"] + q * other["std_error"]], rtol=1e-5)
    np.testing.assert_allclose(other["p"], 2 * stats.t.sf(abs(other["t"]), other["df"]),
                               rtol=1e-5)
    np.testing.assert_allclose(other["t"], other["estimate"] / other["std_error"], rtol=1e-5)
    # the estimate is a REML fit like statsmodels' on the same means (the optimizers may
    # stop at slightly different variance components near a boundary: within its CI)
    means = pd.read_csv(fu / "region_means.tsv", sep="\t")
    data = means.assign(rare=(means.condition == "rare").astype(float),
                        patient=(means.group == "patient").astype(float))
    ref = smf.mixedlm("value ~ rare * (patient + age)", data, groups=data["participant_id"]
                      ).fit(reml=True)
    assert abs(other["estimate"] - ref.fe_params["rare:patient"]) < 1.96 * ref.bse_fe[
        "rare:patient"]
    md = (fu / "followup.md").read_text()
    assert "circular, not reported" in md
    row = [line for line in md.splitlines() if line.startswith("| contrast group_by_tone")][0]
    assert f"t({other['df']:.3g})" in row and "[" in row


def test_a_within_contrast_on_balanced_pairs_is_the_paired_t(tmp_path, capsys):
    """Balanced pairs, no covariates, a clear participant variance: the mixed model's t
    of rare minus frequent on the region means is the paired t (scipy.stats.ttest_rel)
    and its Satterthwaite df are n - 1 (Satterthwaite 1946; analytic for this design)."""
    import nibabel as nib
    from conftest import make_cohort
    from groupsrc.cli import main
    analysis = make_cohort(tmp_path / "c")
    rng = np.random.default_rng(5)                   # invented test input
    maps = pd.read_csv(tmp_path / "c" / "maps.tsv", sep="\t", dtype=str)
    offset = {p: rng.normal(0, 3.0) for p in maps.participant_id.unique()}
    for p, path in zip(maps.participant_id, maps.path):
        img = nib.load(str(tmp_path / "c" / path))
        data = np.asanyarray(img.dataobj) + np.float32(offset[p])
        nib.save(nib.Nifti1Image(data, img.affine, img.header), str(tmp_path / "c" / path))
    text = analysis.read_text()
    head = text.split("[[contrasts]]")[0].replace('between = "group + age"', 'between = "1"')
    head = head.replace('within = "condition"\n', 'within = "condition"\nmixed = true\n')
    analysis.write_text(head + '[[contrasts]]\nname = "rare_minus_frequent"\n'
                        'within = { rare = 1, frequent = -1 }\n'
                        + text[text.index("[inference]"):].replace("resamples = 50",
                                                                 "resamples = 20"))
    out = tmp_path / "out"
    assert main(["run", str(analysis), "--out", str(out), "--quiet"]) == 0
    fu = tmp_path / "fu"
    assert main(["followup", str(out), "--mask", str(tmp_path / "c" / "mask.nii.gz"),
                 "--out", str(fu)]) == 0, capsys.readouterr()
    means = pd.read_csv(fu / "region_means.tsv", sep="\t")
    wide = means.pivot(index="participant_id", columns="condition", values="value")
    ref = stats.ttest_rel(wide["rare"], wide["frequent"])
    row = pd.read_csv(fu / "coefficients.tsv", sep="\t").set_index("term").loc[
        "contrast rare_minus_frequent"]
    np.testing.assert_allclose(row["t"], ref.statistic, rtol=1e-4)
    np.testing.assert_allclose(row["df"], len(wide) - 1, rtol=1e-4)
    np.testing.assert_allclose(row["p"], ref.pvalue, rtol=1e-3)
