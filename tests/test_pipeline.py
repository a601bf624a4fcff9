"""End to end on the tiny fixture cohort: the run contract of the command line."""

import json

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from conftest import copy_cohort
from groupsrc.cli import main


@pytest.fixture
def ran(tiny_cohort, tmp_path):
    out = tmp_path / "res"
    rc = main(["run", str(tiny_cohort), "--out", str(out)])
    assert rc == 0
    return tiny_cohort, out


def test_run_writes_the_results_folder(ran):
    analysis, out = ran
    for name in ("run.json", "methods.md", "report.html", "clusters.tsv"):
        assert (out / name).is_file(), name
    for c in ("rare_minus_frequent", "group_by_tone", "age_slope"):
        for f in ("statistic.nii.gz", "estimate.nii.gz", "std_error.nii.gz", "std_effect.nii.gz",
                  "p_uncorrected.nii.gz", "p_corrected.nii.gz", "clusters.nii.gz",
                  "clusters.tsv", "peaks.tsv", "null_distribution.tsv",
                  "cluster_timecourses.tsv"):
            assert (out / c / f).is_file(), f"{c}/{f}"
    # the rearrangement set is recorded: identity first, as many rows as resamples
    rr = pd.read_csv(out / "rare_minus_frequent" / "rearrangements.tsv.gz", sep="\t")
    assert len(rr) == 50 and (rr.iloc[0, 1:] == 1).all()
    assert set(np.unique(rr.iloc[:, 1:].to_numpy())) <= {-1, 1}
    pr = pd.read_csv(out / "age_slope" / "rearrangements.tsv.gz", sep="\t")
    assert (pr.iloc[0, 1:].to_numpy() == np.array(pr.columns[1:])).all()
    assert all(sorted(row) == sorted(pr.columns[1:]) for row in pr.iloc[:, 1:].to_numpy())
    rec = json.loads((out / "run.json").read_text())
    assert rec["seed"] == 3 and rec["settings"]["inference"]["resamples"] == 50
    assert all(len(h) == 64 for h in rec["inputs_sha256"].values())


def test_statistic_map_is_paired_t_of_the_inputs(ran):
    """The written t map of rare - frequent equals the t of the equal-weight mean
    of the within differences in an OLS fit with centred coding, computed here
    plainly with numpy from the raw NIfTI files (the textbook OLS t formula,
    common practice; test_design.py checks the same quantity against statsmodels)."""
    analysis, out = ran
    maps = pd.read_csv(analysis.parent / "maps.tsv", sep="\t")
    mask = np.asanyarray(nib.load(str(analysis.parent / "mask.nii.gz")).dataobj) > 0
    diffs = []
    for pid, grp in maps.groupby("participant_id", sort=False):
        d = {r.condition: np.asanyarray(nib.load(str(analysis.parent / r.path)).dataobj)
             for r in grp.itertuples()}
        diffs.append(d["rare"] - d["frequent"])
    diffs = np.stack(diffs)[:, mask]
    parts = pd.read_csv(analysis.parent / "participants.tsv", sep="\t")
    # reference: OLS by numpy lstsq on [1, patient, age - mean] -> t of the equal-weight mean
    X = np.column_stack([np.ones(len(parts)), (parts.group == "patient") - 0.5,
                         parts.age - parts.age.mean()])
    n, p = X.shape
    Yf = diffs.reshape(n, -1).astype(np.float64)
    beta, *_ = np.linalg.lstsq(X, Yf, rcond=None)
    res = Yf - X @ beta
    s2 = (res ** 2).sum(0) / (n - p)
    t_ref = beta[0] / np.sqrt(s2 * np.linalg.inv(X.T @ X)[0, 0])
    img = nib.load(str(out / "rare_minus_frequent" / "statistic.nii.gz"))
    t_map = np.asanyarray(img.dataobj)[mask].reshape(-1)
    np.testing.assert_allclose(t_map, t_ref, rtol=1e-4, atol=1e-5)


def test_existing_results_are_not_overwritten(ran, capsys):
    analysis, out = ran
    before = (out / "run.json").read_bytes()
    rc = main(["run", str(analysis), "--out", str(out)])
    assert rc == 1
    assert "--overwrite" in capsys.readouterr().err
    assert (out / "run.json").read_bytes() == before
    assert main(["run", str(analysis), "--out", str(out), "--overwrite", "--seed", "4"]) == 0
    assert json.loads((out / "run.json").read_text())["seed"] == 4


def test_same_seed_same_p_whatever_workers(tiny_cohort, tmp_path):
    outs = []
    for w in ("1", "2"):
        out = tmp_path / f"w{w}"
        assert main(["run", str(tiny_cohort), "--out", str(out), "--workers", w]) == 0
        outs.append(out)
    for c in ("rare_minus_frequent", "group_by_tone", "age_slope"):
        a, b = (np.asanyarray(nib.load(str(o / c / "p_corrected.nii.gz")).dataobj) for o in outs)
        np.testing.assert_array_equal(a, b)


def test_report_on_a_non_results_folder_exits_1(tmp_path, capsys):
    assert main(["report", str(tmp_path)]) == 1
    assert "no run.json" in capsys.readouterr().err


def test_run_with_bad_input_exits_1_and_writes_nothing(tiny_cohort, tmp_path, capsys):
    a = copy_cohort(tiny_cohort, tmp_path / "bad")
    (a.parent / "maps.tsv").write_text("participant_id\tcondition\n")
    out = tmp_path / "never"
    assert main(["run", str(a), "--out", str(out)]) == 1
    assert "required column missing" in capsys.readouterr().err
    assert not out.exists() or not any(out.iterdir())


def test_estimate_and_std_error_maps_equal_statsmodels(ran):
    """estimate.nii.gz and std_error.nii.gz of the within contrast: the contrast's effect
    and standard error from statsmodels OLS t_test (reference library) fitted to the
    participants' within differences on the design the run wrote (design.tsv)."""
    import statsmodels.api as sm
    analysis, out = ran
    c = "rare_minus_frequent"
    summary = json.loads((out / c / "summary.json").read_text())
    design = pd.read_csv(out / c / "design.tsv", sep="\t").set_index("participant_id")
    maps = pd.read_csv(analysis.parent / "maps.tsv", sep="\t")
    mask = np.asanyarray(nib.load(str(analysis.parent / "mask.nii.gz")).dataobj) > 0
    diff = {}
    for pid, grp in maps.groupby("participant_id"):
        d = {r.condition: np.asanyarray(nib.load(str(analysis.parent / r.path)).dataobj)
             for r in grp.itertuples()}
        diff[pid] = (d["rare"].astype(float) - d["frequent"])[mask].reshape(-1)
    Y = np.stack([diff[p] for p in design.index])
    est = np.asanyarray(nib.load(str(out / c / "estimate.nii.gz")).dataobj)[mask].reshape(-1)
    se = np.asanyarray(nib.load(str(out / c / "std_error.nii.gz")).dataobj)[mask].reshape(-1)
    assert int(nib.load(str(out / c / "std_error.nii.gz")).header["intent_code"]) == 1001
    rng = np.random.default_rng(0)
    for j in rng.choice(Y.shape[1], 8, replace=False):
        ref = sm.OLS(Y[:, j], design.to_numpy()).fit().t_test(summary["weights"])
        assert est[j] == pytest.approx(float(np.squeeze(ref.effect)), rel=1e-4, abs=1e-6)
        assert se[j] == pytest.approx(float(np.squeeze(ref.sd)), rel=1e-4)
