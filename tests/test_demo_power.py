"""Power and specificity on the demo cohort (default size), GLM and mixed model.

The demo cohort is simulated with known ground truth (groupsrc.simulate): a
condition effect, a group-by-condition effect, an age effect, and regions
with no effect.  Each true effect must be found at alpha 0.05 (a significant
cluster overlapping its truth mask), and no significant cluster may lie wholly
inside the no-effect region.  The truth masks are written by the simulator
from its noise-free maps, not by the statistics under test.
"""


import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from groupsrc.cli import main

TRUTH = {"rare_minus_frequent": "condition_effect",
         "group_by_tone": "group_by_condition",
         "age_slope": "age_effect",
         # the same effects tested by the mixed model on every map (issue 9): the cohort
         # has a participant without frequent-tone maps and uneven sessions
         "rare_minus_frequent_mixed": "condition_effect",
         "group_by_tone_mixed": "group_by_condition",
         "age_slope_mixed": "age_effect"}


@pytest.fixture(scope="module")
def demo_results(tmp_path_factory):
    root = tmp_path_factory.mktemp("demo")
    out = root / "results"
    rc = main(["demo", "--out", str(out), "--resamples", "500"])
    assert rc == 0
    return root / "results_cohort", out


def _vol(path):
    return np.asanyarray(nib.load(str(path)).dataobj)


@pytest.mark.parametrize("contrast", sorted(TRUTH))
def test_true_effect_is_found(demo_results, contrast):
    cohort, out = demo_results
    truth = _vol(cohort / "truth" / f"{TRUTH[contrast]}.nii.gz") > 0
    labels = _vol(out / contrast / "clusters.nii.gz")
    table = pd.read_csv(out / contrast / "clusters.tsv", sep="\t")
    sig = table.loc[table.p_corrected <= 0.05, "cluster"].to_numpy()
    assert sig.size, f"no significant cluster for {contrast}"
    hit = np.isin(labels, sig).any(axis=3) & truth
    assert hit.any(), f"no significant cluster of {contrast} overlaps its true region"


@pytest.mark.parametrize("contrast", sorted(TRUTH))
def test_no_cluster_wholly_in_no_effect_region(demo_results, contrast):
    cohort, out = demo_results
    null_region = _vol(cohort / "truth" / "no_effect.nii.gz") > 0
    labels = _vol(out / contrast / "clusters.nii.gz")
    table = pd.read_csv(out / contrast / "clusters.tsv", sep="\t")
    for k in table.loc[table.p_corrected <= 0.05, "cluster"]:
        where = (labels == k).any(axis=3)
        assert not np.all(null_region[where]), f"cluster {k} of {contrast} lies in a no-effect region"


@pytest.mark.parametrize("contrast", sorted(TRUTH))
def test_cluster_table_agrees_with_label_image(demo_results, contrast):
    """clusters.tsv against clusters.nii.gz and statistic.nii.gz of the demo:
    point counts, source counts, sample counts, time span and peak."""
    cohort, out = demo_results
    lab_img = nib.load(str(out / contrast / "clusters.nii.gz"))
    labels = np.asanyarray(lab_img.dataobj)
    stat = np.asanyarray(nib.load(str(out / contrast / "statistic.nii.gz")).dataobj)
    table = pd.read_csv(out / contrast / "clusters.tsv", sep="\t")
    hdr = lab_img.header
    t0_ms, dt_ms = float(hdr["toffset"]) * 1e3, float(hdr["pixdim"][4]) * 1e3  # units: s (xyzt_units)
    assert hdr.get_xyzt_units()[1] == "sec"
    for row in table.head(10).itertuples():
        where = labels == row.cluster
        assert where.sum() == row.n_points
        assert where.any(axis=3).sum() == row.n_sources
        samples = np.nonzero(where.any(axis=(0, 1, 2)))[0]
        assert samples.size == row.n_samples
        assert row.t_start_ms == pytest.approx(t0_ms + dt_ms * samples[0], abs=1e-3)
        assert row.t_end_ms == pytest.approx(t0_ms + dt_ms * samples[-1], abs=1e-3)
        masked = np.where(where, np.abs(stat), -np.inf)
        pk = np.unravel_index(np.argmax(masked), masked.shape)
        xyz = lab_img.affine[:3, :3] @ np.array(pk[:3]) + lab_img.affine[:3, 3]
        assert [row.peak_x_mm, row.peak_y_mm, row.peak_z_mm] == pytest.approx(xyz.tolist(), abs=1e-3)
        assert row.peak_stat == pytest.approx(float(stat[pk]), rel=1e-4)
        assert row.mass == pytest.approx(float(stat[where].sum()), rel=1e-3)


def test_report_shows_the_glm_and_the_mixed_model(demo_results):
    cohort, out = demo_results
    html = (out / "report.html").read_text(encoding="utf-8")
    for name in TRUTH:
        assert f'id="c-{name}"' in html
    assert "summary-statistic GLM" in html and "Fit codes" in html
    summary = pd.read_json(out / "analysis_summary.json", typ="series")
    maps = pd.read_csv(cohort / "maps.tsv", sep="\t")
    # the GLM contrasts leave out exactly the participants lacking a condition
    lacking = sorted(set(maps.participant_id) - set(
        maps[maps.condition == "frequent"].participant_id))
    assert lacking and summary["cohort"]["glm_excluded"] == lacking
    assert maps.session.max() == 3
