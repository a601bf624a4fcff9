"""NIfTI maps written by groupsrc.outputs, re-read with nibabel and as raw bytes.

Header facts are from the NIfTI-1 standard (nifti1.h); the byte offsets of
the 348-byte header are from memory of the nifti1_1 struct layout and are
cross-checked here against nibabel's reading of the same file.
"""

from __future__ import annotations

import gzip
import struct

import nibabel as nib
import numpy as np
import pytest

from _outputs_fixture import AFFINE, DT, NT, SHAPE, T0, results_folder

# nifti1.h constants
NIFTI_INTENT_TTEST = 3
NIFTI_INTENT_FTEST = 4
NIFTI_INTENT_PVAL = 22
NIFTI_INTENT_ESTIMATE = 1001
NIFTI_INTENT_LABEL = 1002
NIFTI_UNITS_MM = 2
NIFTI_UNITS_SEC = 8
NIFTI_XFORM_ALIGNED_ANAT = 2


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    return results_folder(tmp_path_factory)


def _raw_header(path):
    with gzip.open(path, "rb") as f:
        return f.read(348)


def _contrast(analysis, name):
    return next(c for c in analysis.contrasts if c.name == name)


def test_raw_header_fields(written):
    analysis, out = written
    raw = _raw_header(out / "deviant_minus_standard" / "statistic.nii.gz")
    # nifti1.h: sizeof_hdr = 348 at offset 0, magic "n+1\0" at 344 for single-file .nii
    assert struct.unpack("<i", raw[0:4])[0] == 348
    assert raw[344:348] == b"n+1\x00"
    # dim[0..4] at offset 40 (short[8])
    dim = struct.unpack("<8h", raw[40:56])
    assert dim[:5] == (4,) + SHAPE + (NT,)
    # intent_p1 at 56 (float), intent_code at 68 (short), datatype at 70 (16 = FLOAT32)
    df = _contrast(analysis, "deviant_minus_standard").inference.df[0]
    assert struct.unpack("<f", raw[56:60])[0] == pytest.approx(df)
    assert struct.unpack("<h", raw[68:70])[0] == NIFTI_INTENT_TTEST
    assert struct.unpack("<h", raw[70:72])[0] == 16
    # pixdim[4] at 76 + 4*4, xyzt_units at 123, toffset at 136
    assert struct.unpack("<f", raw[92:96])[0] == pytest.approx(DT)
    assert raw[123] == NIFTI_UNITS_MM | NIFTI_UNITS_SEC
    assert struct.unpack("<f", raw[136:140])[0] == pytest.approx(T0)
    # scl_slope, scl_inter at 112, 116: slope 0 (ignored) or 1 with intercept 0 = unscaled
    slope, inter = struct.unpack("<2f", raw[112:120])
    assert slope == 0 or (slope == 1 and inter == 0)
    # qform_code at 252, sform_code at 254
    assert struct.unpack("<2h", raw[252:256]) == (NIFTI_XFORM_ALIGNED_ANAT,) * 2


@pytest.mark.parametrize("fname", ["statistic", "estimate", "std_effect", "p_uncorrected",
                                   "p_corrected", "clusters"])
def test_space_and_time_axes(written, fname):
    _, out = written
    img = nib.load(str(out / "deviant_minus_standard" / f"{fname}.nii.gz"))
    hdr = img.header
    # NIfTI-1: both transforms carry the template affine, codes set (2 = aligned)
    assert int(hdr["sform_code"]) == NIFTI_XFORM_ALIGNED_ANAT
    assert int(hdr["qform_code"]) == NIFTI_XFORM_ALIGNED_ANAT
    np.testing.assert_allclose(img.get_sform(), AFFINE, atol=1e-5)
    np.testing.assert_allclose(img.get_qform(), AFFINE, atol=1e-4)
    # NIfTI-1 xyzt_units: spatial mm, time s; pixdim[4] = sampling interval; toffset = t0
    assert hdr.get_xyzt_units() == ("mm", "sec")
    assert img.shape == SHAPE + (NT,)
    assert float(hdr["pixdim"][4]) == pytest.approx(DT)
    assert float(hdr["toffset"]) == pytest.approx(T0)
    assert hdr.get_zooms()[:3] == pytest.approx((5.0, 5.0, 5.0))


def test_t_statistic_map(written):
    analysis, out = written
    c = _contrast(analysis, "deviant_minus_standard")
    img = nib.load(str(out / c.name / "statistic.nii.gz"))
    hdr = img.header
    code, params, name = hdr.get_intent()
    # nifti1.h: NIFTI_INTENT_TTEST = 3 with intent_p1 = degrees of freedom
    assert code == "t test"
    assert int(hdr["intent_code"]) == NIFTI_INTENT_TTEST
    assert params[0] == pytest.approx(c.inference.df[0])
    assert img.get_data_dtype() == np.float32
    data = np.asarray(img.dataobj)
    mask = analysis.grid.mask
    assert np.all(data[~mask] == 0)
    np.testing.assert_allclose(data[mask], c.inference.statistic.astype(np.float32), rtol=1e-6)
    assert c.name in hdr["descrip"].item().decode()
    # display range: symmetric around 0 for a signed statistic
    assert float(hdr["cal_min"]) == pytest.approx(-float(hdr["cal_max"]))
    assert 0 < float(hdr["cal_max"]) <= np.abs(c.inference.statistic).max() + 1e-6


def test_f_statistic_map(written):
    analysis, out = written
    c = _contrast(analysis, "group_difference")
    img = nib.load(str(out / c.name / "statistic.nii.gz"))
    code, params, _ = img.header.get_intent()
    # nifti1.h: NIFTI_INTENT_FTEST = 4, intent_p1 = numerator df, intent_p2 = denominator df
    assert int(img.header["intent_code"]) == NIFTI_INTENT_FTEST
    assert params[:2] == pytest.approx(c.inference.df)
    assert float(img.header["cal_min"]) == 0.0
    # the F contrast has no single estimate: no estimate map is written
    assert not (out / c.name / "estimate.nii.gz").exists()
    eff = nib.load(str(out / c.name / "std_effect.nii.gz"))
    assert int(eff.header["intent_code"]) == NIFTI_INTENT_ESTIMATE
    v = analysis.grid.from_volume(np.asarray(eff.dataobj))
    # partial eta squared = SS_effect / (SS_effect + SS_residual), with SS_effect the
    # drop in residual sum of squares when the group column is removed
    # (textbook definition; statsmodels OLS as the reference fit)
    import statsmodels.api as sm
    rng = np.random.default_rng(0)
    X = c.design.to_numpy()
    for s_, t_ in zip(rng.integers(0, v.shape[0], 6), rng.integers(0, v.shape[1], 6)):
        y = c.data[:, s_, t_].astype(float)
        full, reduced = sm.OLS(y, X).fit(), sm.OLS(y, X[:, :1]).fit()
        ss_eff = reduced.ssr - full.ssr
        assert v[s_, t_] == pytest.approx(ss_eff / (ss_eff + full.ssr), rel=1e-5)


@pytest.mark.parametrize("which", ["p_uncorrected", "p_corrected"])
def test_p_maps(written, which):
    analysis, out = written
    c = _contrast(analysis, "deviant_minus_standard")
    img = nib.load(str(out / c.name / f"{which}.nii.gz"))
    # nifti1.h: NIFTI_INTENT_PVAL = 22
    assert int(img.header["intent_code"]) == NIFTI_INTENT_PVAL
    assert img.get_data_dtype() == np.float32
    assert (float(img.header["cal_min"]), float(img.header["cal_max"])) == (0.0, 1.0)
    data = np.asarray(img.dataobj)
    mask = analysis.grid.mask
    assert np.all(data[~mask] == 1.0)
    assert data.min() >= 0 and data.max() <= 1
    ref = getattr(c.inference, which)
    np.testing.assert_allclose(data[mask], ref.astype(np.float32), rtol=1e-6)


def test_estimate_map(written):
    analysis, out = written
    c = _contrast(analysis, "deviant_minus_standard")
    img = nib.load(str(out / c.name / "estimate.nii.gz"))
    # nifti1.h: NIFTI_INTENT_ESTIMATE = 1001
    assert int(img.header["intent_code"]) == NIFTI_INTENT_ESTIMATE
    data = np.asarray(img.dataobj)
    np.testing.assert_allclose(data[analysis.grid.mask], c.inference.estimate.astype(np.float32),
                               rtol=1e-6)
    assert np.all(data[~analysis.grid.mask] == 0)


@pytest.mark.parametrize("name", ["deviant_minus_standard", "group_difference"])
def test_cluster_label_map(written, name):
    analysis, out = written
    c = _contrast(analysis, name)
    img = nib.load(str(out / name / "clusters.nii.gz"))
    # nifti1.h: NIFTI_INTENT_LABEL = 1002; integer storage
    assert int(img.header["intent_code"]) == NIFTI_INTENT_LABEL
    assert img.get_data_dtype() in (np.int16, np.int32)
    lab = np.asarray(img.dataobj)
    assert lab.shape == SHAPE + (NT,)
    assert np.all(lab[~analysis.grid.mask] == 0)
    np.testing.assert_array_equal(lab[analysis.grid.mask], c.inference.cluster_labels)
    assert set(np.unique(lab)) - {0} == set(c.inference.clusters["cluster"])


def test_cluster_summary_is_3d_peak_over_span(written):
    analysis, out = written
    c = _contrast(analysis, "deviant_minus_standard")
    img = nib.load(str(out / c.name / "cluster_summary.nii.gz"))
    assert img.shape == SHAPE                     # 3D so slice viewers overlay it
    np.testing.assert_allclose(img.get_sform(), AFFINE, atol=1e-5)
    assert img.get_data_dtype() == np.float32
    summ = np.asarray(img.dataobj)
    # recompute from the 4D maps: largest-|stat| value over the samples where the
    # voxel lies in a cluster with corrected p <= alpha (here clusters 1 and 2)
    stat = np.asarray(nib.load(str(out / c.name / "statistic.nii.gz")).dataobj)
    lab = np.asarray(nib.load(str(out / c.name / "clusters.nii.gz")).dataobj)
    sig = c.inference.clusters.loc[c.inference.clusters["p_corrected"] <= 0.05, "cluster"]
    member = np.isin(lab, sig.to_numpy())
    masked = np.where(member, stat, 0)
    idx = np.abs(masked).argmax(axis=3)
    expect = np.take_along_axis(masked, idx[..., None], 3)[..., 0]
    np.testing.assert_allclose(summ, expect, rtol=1e-6)
    assert np.any(summ > 0) and np.any(summ < 0)   # one positive and one negative cluster
