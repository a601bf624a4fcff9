"""Tidy TSV tables of groupsrc.outputs, checked against the NIfTI maps written
beside them (re-read with nibabel) and against textbook formulas.

The TSV conventions checked (tab separated, header row, 'n/a' for missing)
are common practice for tidy tables (as in BIDS TSV files).
"""

from __future__ import annotations

import numpy as np
import nibabel as nib
import pandas as pd
import pytest
from scipy import stats

from groupsrc.outputs import COLUMNS
from groupsrc.outputs.tables import SURFACE_COLUMNS
from _outputs_fixture import AFFINE, DT, NT, T0, results_folder

NAMES = ["deviant_minus_standard", "group_difference"]


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    return results_folder(tmp_path_factory)


def read(path):
    return pd.read_csv(path, sep="\t", na_values=["n/a"], keep_default_na=False)


def maps(out, name):
    stat = np.asarray(nib.load(str(out / name / "statistic.nii.gz")).dataobj, float)
    lab = np.asarray(nib.load(str(out / name / "clusters.nii.gz")).dataobj).astype(int)
    return stat, lab


def world(ijk):
    return AFFINE[:3, :3] @ np.asarray(ijk, float) + AFFINE[:3, 3]


def ms(i):
    return (T0 + DT * i) * 1e3


@pytest.mark.parametrize("table", ["clusters.tsv", "peaks.tsv", "cluster_timecourses.tsv",
                                   "null_distribution.tsv", "cluster_atlas.tsv"])
def test_columns_are_documented(written, table):
    _, out = written
    for name in NAMES:
        frame = read(out / name / table)
        # every column is documented, in the documented order (the fixture has a
        # group column and an atlas, so no optional column is dropped; it is a
        # volume, so the surface-only columns are not written)
        assert list(frame.columns) == [c for c in COLUMNS[table]
                                       if c not in SURFACE_COLUMNS.get(table, ())]
        assert all(COLUMNS[table][c] for c in frame.columns)


def test_all_contrast_table_is_the_concatenation(written):
    _, out = written
    top = read(out / "clusters.tsv")
    parts = pd.concat([read(out / n / "clusters.tsv") for n in NAMES], ignore_index=True)
    pd.testing.assert_frame_equal(top, parts)
    assert set(top["contrast"]) == set(NAMES)


@pytest.mark.parametrize("name", NAMES)
def test_clusters_agree_with_label_map(written, name):
    _, out = written
    stat, lab = maps(out, name)
    table = read(out / name / "clusters.tsv")
    assert sorted(table["cluster"]) == sorted(set(np.unique(lab)) - {0})
    for r in table.itertuples():
        member = lab == r.cluster
        assert r.n_points == member.sum()
        assert r.n_sources == member.any(axis=3).sum()
        assert r.n_samples == member.any(axis=(0, 1, 2)).sum()
        times = np.flatnonzero(member.any(axis=(0, 1, 2)))
        assert r.t_start_ms == pytest.approx(ms(times[0]))
        assert r.t_end_ms == pytest.approx(ms(times[-1]))
        assert r.mass == pytest.approx(stat[member].sum(), rel=1e-5)
        # the peak: largest |statistic| among the cluster's points
        flat = np.where(member, np.abs(stat), -1)
        i, j, k, t = np.unravel_index(np.argmax(flat), flat.shape)
        np.testing.assert_allclose([r.peak_x_mm, r.peak_y_mm, r.peak_z_mm], world((i, j, k)),
                                   atol=1e-4)
        assert r.t_peak_ms == pytest.approx(ms(t))
        assert r.peak_stat == pytest.approx(stat[i, j, k, t], rel=1e-5)
        assert np.sign(r.peak_stat) == r.sign


def test_estimate_interval_is_t_based(written):
    analysis, out = written
    name = "deviant_minus_standard"
    df = analysis.contrasts[0].inference.df[0]
    stat = np.asarray(nib.load(str(out / name / "statistic.nii.gz")).dataobj, float)
    est = np.asarray(nib.load(str(out / name / "estimate.nii.gz")).dataobj, float)
    table = read(out / name / "clusters.tsv")
    for r in table.itertuples():
        ijk = np.round(np.linalg.solve(AFFINE[:3, :3], np.array(
            [r.peak_x_mm, r.peak_y_mm, r.peak_z_mm]) - AFFINE[:3, 3])).astype(int)
        t_idx = int(round((r.t_peak_ms / 1e3 - T0) / DT))
        e = est[tuple(ijk) + (t_idx,)]
        se = e / stat[tuple(ijk) + (t_idx,)]        # t = estimate / se
        q = stats.t.ppf(0.975, df)                   # textbook 95% t interval
        assert r.estimate_at_peak == pytest.approx(e, rel=1e-5)
        assert r.estimate_ci_low == pytest.approx(e - q * se, rel=1e-4)
        assert r.estimate_ci_high == pytest.approx(e + q * se, rel=1e-4)


def test_standardized_effect_interval_inverts_noncentral_t(written):
    analysis, out = written
    c = analysis.contrasts[0]
    df = c.inference.df[0]
    X = c.design.to_numpy()
    v = c.weights @ np.linalg.inv(X.T @ X) @ c.weights     # se = sigma sqrt(v)
    table = read(out / c.name / "clusters.tsv")
    for r in table.head(5).itertuples():
        t = r.peak_stat
        lo, hi = r.std_effect_ci_low / np.sqrt(v), r.std_effect_ci_high / np.sqrt(v)
        # definition of the 95% interval for the noncentrality delta:
        # P(T >= t | delta_low) = 0.025 and P(T <= t | delta_high) = 0.025
        assert stats.nct.sf(t, df, lo) == pytest.approx(0.025, abs=1e-4)
        assert stats.nct.cdf(t, df, hi) == pytest.approx(0.025, abs=1e-4)
        # Cohen's d = t sqrt(v) lies inside; Hedges' g = d (1 - 3 / (4 df - 1))
        d = t * np.sqrt(v)
        assert r.std_effect_ci_low < d < r.std_effect_ci_high
        assert r.std_effect_at_peak == pytest.approx(d * (1 - 3 / (4 * df - 1)), rel=1e-4)


def test_f_effect_interval_inverts_noncentral_f(written):
    analysis, out = written
    c = analysis.contrasts[1]
    df1, df2 = c.inference.df
    r = read(out / c.name / "clusters.tsv").iloc[0]
    assert np.isnan(r["estimate_at_peak"])
    eta = r["std_effect_at_peak"]
    assert eta == pytest.approx(r["peak_stat"] * df1 / (r["peak_stat"] * df1 + df2), rel=1e-4)
    # lambda = eta2 (df1 + df2 + 1) / (1 - eta2) (conversion from memory, Steiger-style)
    lam = lambda e: e * (df1 + df2 + 1) / (1 - e)  # noqa: E731
    assert stats.ncf.sf(r["peak_stat"], df1, df2, lam(r["std_effect_ci_low"])) == \
        pytest.approx(0.025, abs=1e-4)
    assert stats.ncf.cdf(r["peak_stat"], df1, df2, lam(r["std_effect_ci_high"])) == \
        pytest.approx(0.025, abs=1e-4)


@pytest.mark.parametrize("name", NAMES)
def test_peaks_are_separated_local_maxima_inside_clusters(written, name):
    _, out = written
    stat, lab = maps(out, name)
    peaks = read(out / name / "peaks.tsv")
    clusters = read(out / name / "clusters.tsv")
    assert len(peaks) >= len(clusters)
    a = np.abs(stat)
    for k, sub in peaks.groupby("cluster"):
        xyz = sub[["x_mm", "y_mm", "z_mm"]].to_numpy()
        d = np.linalg.norm(xyz[:, None] - xyz[None], axis=2)
        assert np.all(d[np.triu_indices(len(sub), 1)] >= 20.0)
        # the first peak is the cluster's peak
        c = clusters[clusters["cluster"] == k].iloc[0]
        assert sub.iloc[0][["x_mm", "y_mm", "z_mm", "time_ms"]].tolist() == pytest.approx(
            [c.peak_x_mm, c.peak_y_mm, c.peak_z_mm, c.t_peak_ms])
        assert np.all(np.diff(np.abs(sub["statistic"].to_numpy())) <= 1e-9)
        for p in sub.itertuples():
            ijk = np.round(np.linalg.solve(AFFINE[:3, :3], np.array(
                [p.x_mm, p.y_mm, p.z_mm]) - AFFINE[:3, 3])).astype(int)
            t = int(round((p.time_ms / 1e3 - T0) / DT))
            pt = tuple(ijk) + (t,)
            assert lab[pt] == k
            assert p.statistic == pytest.approx(stat[pt], rel=1e-5)
            # local maximum among same-cluster face neighbours in space and time
            for axis in range(4):
                for step in (-1, 1):
                    q = list(pt)
                    q[axis] += step
                    if 0 <= q[axis] < lab.shape[axis] and lab[tuple(q)] == k:
                        assert a[pt] >= a[tuple(q)] - 1e-6


def test_timecourses_are_cluster_means_of_the_data(written):
    analysis, out = written
    c = analysis.contrasts[0]
    _, lab = maps(out, c.name)
    tc = read(out / c.name / "cluster_timecourses.tsv")
    n = len(c.participants)
    ks = sorted(tc["cluster"].unique())
    assert len(tc) == n * NT * len(ks)
    assert not tc.duplicated(["participant_id", "cluster", "time_ms"]).any()   # tidy
    assert set(tc["measure"]) == {c.name}
    groups = dict(zip(analysis.participants["participant_id"], analysis.participants["group"]))
    assert all(groups[p] == g for p, g in zip(tc["participant_id"], tc["group"]))
    grid = analysis.grid
    for k in ks[:3]:
        vox = (lab == k).any(axis=3)
        src = np.flatnonzero(grid.from_volume(vox))
        expect = c.data[:, src, :].astype(float).mean(axis=1)      # (n, T)
        sub = tc[tc["cluster"] == k].pivot(index="participant_id", columns="time_ms",
                                           values="value").loc[c.participants]
        np.testing.assert_allclose(sub.to_numpy(), expect, rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(sub.columns.to_numpy(), ms(np.arange(NT)))


def test_null_table_round_trip(written):
    analysis, out = written
    for c in analysis.contrasts:
        null = read(out / c.name / "null_distribution.tsv")
        assert list(null["resample"]) == list(range(c.inference.n_resamples))
        np.testing.assert_allclose(null["max_stat"], c.inference.null["max_stat"], rtol=1e-5)
        np.testing.assert_allclose(null["max_pos"], c.inference.null["max_pos"], rtol=1e-5)


def test_atlas_labels_and_shares(written):
    analysis, out = written
    atlas = analysis.settings["atlas"]
    volume = analysis.grid.to_volume(atlas["labels"])        # per-source labels -> voxels
    for name in NAMES:
        _, lab = maps(out, name)
        shares = read(out / name / "cluster_atlas.tsv")
        np.testing.assert_allclose(shares.groupby("cluster")["share"].sum(), 1.0)
        for k, sub in shares.groupby("cluster"):
            vox = (lab == k).any(axis=3)
            for r in sub.itertuples():
                assert r.n_sources == np.sum(vox & (volume == r.label))
        clusters = read(out / name / "clusters.tsv")
        for r in clusters.head(3).itertuples():
            ijk = np.round(np.linalg.solve(AFFINE[:3, :3], np.array(
                [r.peak_x_mm, r.peak_y_mm, r.peak_z_mm]) - AFFINE[:3, 3])).astype(int)
            assert r.atlas_label_at_peak == atlas["names"][int(volume[tuple(ijk)])]
