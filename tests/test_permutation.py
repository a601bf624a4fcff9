"""The inference engine against brute force, scipy and statsmodels.

Conventions checked here and their sources:
* FWER-corrected p from the maximum statistic over all features, one
  maximum per rearrangement (common practice; Maris & Oostenveld 2007, J
  Neurosci Methods 164:177-190, for cluster mass and extent over space x time);
* p = (b + 1) / (m + 1): the identity counted among the rearrangements
  (Phipson & Smyth 2010, Stat Appl Genet Mol Biol 9:39); with every
  rearrangement enumerated, p is the share of all of them reaching the
  observed value (exact test);
* numbers of distinct rearrangements: 2^n sign vectors, C(a + b, a) two-group
  relabellings, products of k! over blocks (combinatorics, common practice).
"""

import itertools

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import ndimage, sparse, stats
from statsmodels.stats.multitest import multipletests

from groupsrc.sources import VolumeGrid
from groupsrc.stats.corrections.scorers import TfceOptions
from groupsrc.stats.inference import run_inference

STRUCT4 = ndimage.generate_binary_structure(4, 1)


def _small_problem(n=7, shape=(4, 3, 2), T=5, effect=0.8, seed=0):
    rng = np.random.default_rng(seed)
    grid = VolumeGrid.from_mask(np.ones(shape, bool), np.eye(4))
    vol = rng.standard_normal((n,) + shape + (T,))
    vol = ndimage.gaussian_filter(vol, (0, 0.8, 0.8, 0.8, 0.8))
    vol[:, :2, :, :, 1:4] += effect
    Y = np.stack([grid.from_volume(v) for v in vol]).astype(np.float32)
    return grid, Y


def _t1(y):
    """One-sample t along axis 0: mean / (sd / sqrt(n)), the textbook formula
    (Student 1908; common practice)."""
    n = y.shape[0]
    return y.mean(0) / (y.std(0, ddof=1) / np.sqrt(n))


def _max_cluster_mass(tvol, thr):
    best = 0.0
    for sign in (1, -1):
        lab, n = ndimage.label(sign * tvol > thr, STRUCT4)   # scipy.ndimage reference labelling
        if n:
            best = max(best, np.abs(ndimage.sum(tvol, lab, np.arange(1, n + 1))).max())
    return best


def _max_cluster_extent(tvol, thr):
    """Largest number of points of any supra-threshold component, either sign."""
    best = 0
    for sign in (1, -1):
        lab, n = ndimage.label(sign * tvol > thr, STRUCT4)   # scipy.ndimage reference labelling
        if n:
            best = max(best, int(np.bincount(lab.ravel())[1:].max()))
    return best


def test_exact_sign_flip_max_stat_and_cluster_mass_equal_brute_force():
    grid, Y = _small_problem()
    n = Y.shape[0]
    adj = grid.adjacency("face")
    X = np.ones((n, 1))
    thr = stats.t.isf(0.05 / 2, n - 1)
    # brute force: all 2**7 = 128 sign vectors (combinatorics), plain float64
    # numpy + ndimage; p = share of the 128 maxima reaching the observed value,
    # identity included (Phipson & Smyth 2010)
    y64 = Y.astype(np.float64)
    t_obs = _t1(y64)
    max_t, max_mass = [], []
    for signs in itertools.product([1, -1], repeat=n):
        t = _t1(np.array(signs)[:, None, None] * y64)
        max_t.append(np.abs(t).max())
        max_mass.append(_max_cluster_mass(grid.to_volume(t), thr))
    max_t, max_mass = np.array(max_t), np.array(max_mass)
    p_max_ref = (max_t[None, None, :] >= np.abs(t_obs)[..., None] * (1 - 1e-9)).mean(-1)

    r = run_inference(Y, X, [1.0], adj, scheme="sign-flip", correction="max-stat",
                      n_resamples=500, seed=0)
    assert r.exact and r.n_resamples == 128
    np.testing.assert_allclose(r.statistic, t_obs, rtol=1e-5)  # textbook t
    np.testing.assert_allclose(r.p_corrected, p_max_ref)
    np.testing.assert_allclose(np.sort(r.null.max_stat), np.sort(max_t), rtol=1e-5)

    r = run_inference(Y, X, [1.0], adj, scheme="sign-flip", correction="cluster-mass",
                      n_resamples=128, seed=0, forming_p=0.05)
    assert r.exact and r.threshold == pytest.approx(thr)
    tvol = grid.to_volume(t_obs)
    ref_p = np.ones(tvol.shape)
    for sign in (1, -1):
        lab, k = ndimage.label(sign * tvol > thr, STRUCT4)
        for c in range(1, k + 1):
            mass = abs(tvol[lab == c].sum())
            ref_p[lab == c] = np.mean(max_mass >= mass * (1 - 1e-9))
    assert len(r.clusters) > 0
    np.testing.assert_allclose(grid.to_volume(r.p_corrected), ref_p)
    # labels: 1..K in table order, sorted by p then |mass| descending
    # (groupsrc's own documented table layout, not an outside fact); extent and
    # mass per label are their definitions (Maris & Oostenveld 2007)
    tab = r.clusters
    assert list(tab.cluster) == list(range(1, len(tab) + 1))
    key = list(zip(tab.p_corrected, -tab.mass.abs()))
    assert key == sorted(key)
    for _, row in tab.iterrows():
        sel = r.cluster_labels == row.cluster
        assert sel.sum() == row.extent
        assert r.statistic[sel].sum() == pytest.approx(row.mass, rel=1e-6)
    assert np.all(r.p_corrected[r.cluster_labels == 0] == 1.0)


def test_exact_sign_flip_cluster_extent_equals_brute_force():
    # Cluster extent (number of space x time points of a component; Maris &
    # Oostenveld 2007) over all 2**7 = 128 sign vectors, labelled with
    # scipy.ndimage.label in 4D; p = share of maxima >= the observed extent,
    # the identity included (Phipson & Smyth 2010).
    grid, Y = _small_problem(effect=1.2, seed=1)
    n = Y.shape[0]
    adj = grid.adjacency("face")
    thr = stats.t.isf(0.05 / 2, n - 1)
    y64 = Y.astype(np.float64)
    max_ext = np.array([_max_cluster_extent(grid.to_volume(_t1(np.array(s)[:, None, None] * y64)),
                                            thr)
                        for s in itertools.product([1, -1], repeat=n)])
    r = run_inference(Y, np.ones((n, 1)), [1.0], adj, scheme="sign-flip",
                      correction="cluster-extent", n_resamples=128, seed=0, forming_p=0.05)
    assert r.exact
    tvol = grid.to_volume(_t1(y64))
    ref_p = np.ones(tvol.shape)
    sizes = []
    for sign in (1, -1):
        lab, k = ndimage.label(sign * tvol > thr, STRUCT4)
        for c in range(1, k + 1):
            ext = int((lab == c).sum())
            sizes.append(ext)
            ref_p[lab == c] = np.mean(max_ext >= ext)
    # the check needs clusters of different sizes and p-values strictly
    # between the smallest possible (1/128) and 1
    assert len(set(sizes)) > 1 and np.any((ref_p > 1 / 128) & (ref_p < 1))
    np.testing.assert_allclose(grid.to_volume(r.p_corrected), ref_p)
    np.testing.assert_array_equal(np.sort(np.maximum(r.null.max_pos, -r.null.max_neg)),
                                  np.sort(max_ext))
    assert sorted(r.clusters.extent) == sorted(sizes)


@pytest.mark.parametrize("offset", [0.0, 3.0, 500.0])   # 500: large mean, residual-copy path
def test_exact_two_sample_permutation_equals_combinations(offset):
    rng = np.random.default_rng(5)
    grid = VolumeGrid.from_mask(np.ones((3, 2, 1), bool), np.eye(4))
    Y = rng.standard_normal((8, 6, 3)).astype(np.float32)
    Y[:4] += 0.7
    Y += np.float32(offset)
    X = np.zeros((8, 2)); X[:4, 0] = 1; X[4:, 1] = 1
    r = run_inference(Y, X, [1.0, -1.0], grid.adjacency("face"), scheme="permutation",
                      correction="max-stat", n_resamples=1000, seed=2)
    assert r.exact and r.n_resamples == 70          # C(8, 4) relabellings (combinatorics)
    # brute force over the 70 group-1 member sets with scipy.stats.ttest_ind;
    # p = share of the 70 maxima, identity included (Phipson & Smyth 2010)
    y = Y.astype(float)
    maxima = []
    for g1 in itertools.combinations(range(8), 4):
        g2 = [i for i in range(8) if i not in g1]
        maxima.append(np.abs(stats.ttest_ind(y[list(g1)], y[g2], axis=0).statistic).max())
    t_obs = stats.ttest_ind(y[:4], y[4:], axis=0).statistic
    ref = (np.array(maxima)[None, None] >= np.abs(t_obs)[..., None] * (1 - 1e-9)).mean(-1)
    np.testing.assert_allclose(r.p_corrected, ref)


@pytest.mark.parametrize("tails,alt", [("two", "two-sided"), ("greater", "greater"),
                                       ("less", "less")])
def test_single_feature_sign_flip_equals_scipy_permutation_test(tails, alt):
    rng = np.random.default_rng(11)
    x = rng.standard_normal(9) + 0.4
    Y = x[:, None, None].astype(np.float32)
    r = run_inference(Y, np.ones((9, 1)), [1.0], sparse.csr_matrix((1, 1)),
                      scheme="sign-flip", correction="max-stat", n_resamples=512, seed=0,
                      tails=tails)
    # scipy.stats.permutation_test, exact sign flips of one sample ('samples')
    ref = stats.permutation_test((x.astype(np.float32).astype(float),),
                                 lambda a: stats.ttest_1samp(a, 0).statistic,
                                 permutation_type="samples", n_resamples=np.inf,
                                 alternative=alt)
    assert r.exact
    assert r.p_corrected[0, 0] == pytest.approx(ref.pvalue, abs=1e-12)


@pytest.mark.parametrize("tails,alt", [("greater", "greater"), ("less", "less")])
def test_single_feature_two_sample_equals_scipy_permutation_test(tails, alt):
    rng = np.random.default_rng(12)
    a, b = rng.standard_normal(5) + 0.5, rng.standard_normal(4)
    a, b = a.astype(np.float32).astype(float), b.astype(np.float32).astype(float)
    Y = np.r_[a, b][:, None, None].astype(np.float32)
    X = np.zeros((9, 2)); X[:5, 0] = 1; X[5:, 1] = 1
    r = run_inference(Y, X, [1.0, -1.0], sparse.csr_matrix((1, 1)), scheme="permutation",
                      correction="max-stat", n_resamples=1000, seed=0, tails=tails)
    # scipy.stats.permutation_test, exact relabelling of independent samples
    ref = stats.permutation_test((a, b), lambda u, v: stats.ttest_ind(u, v).statistic,
                                 permutation_type="independent", n_resamples=np.inf,
                                 alternative=alt)
    assert r.exact and r.n_resamples == 126    # C(9, 4) (combinatorics)
    assert r.p_corrected[0, 0] == pytest.approx(ref.pvalue, abs=1e-12)


def test_student_sleep_data():
    # Cushny & Peebles sleep data as analysed by Student (1908, Biometrika 6:1-25):
    # paired differences in hours of extra sleep (values from memory).
    d = np.array([1.2, 2.4, 1.3, 1.3, 0.0, 1.0, 1.8, 0.8, 4.6, 1.4])
    r = run_inference(d[:, None, None].astype(np.float32), np.ones((10, 1)), [1.0],
                      sparse.csr_matrix((1, 1)), scheme="sign-flip",
                      correction="max-stat", n_resamples=5000, seed=1)
    assert r.exact and r.n_resamples == 1024    # 2**10 sign vectors (combinatorics)
    assert r.df == (9,)                          # n - 1 (Student 1908)
    assert r.statistic[0, 0] == pytest.approx(4.06, abs=0.01)      # t about 4.06 (from memory)
    assert r.p_uncorrected[0, 0] == pytest.approx(0.00283, abs=2e-5)  # two-sided, from memory
    ref = stats.permutation_test((d,), lambda a: stats.ttest_1samp(a, 0).statistic,
                                 permutation_type="samples", n_resamples=np.inf)
    assert r.p_corrected[0, 0] == pytest.approx(ref.pvalue, abs=1e-12)  # scipy exact
    # Hedges-corrected d = mean / sd * (1 - 3 / (4 * 9 - 1)) (Hedges 1981)
    assert r.std_effect[0, 0] == pytest.approx(d.mean() / d.std(ddof=1) * (1 - 3 / 35),
                                               rel=1e-5)


# (batch_size, n_jobs, backend) against the reference (64, 1, "threads"):
# batches smaller, larger and not multiples of the product block, the
# pipelined thread mode and joblib process workers ("loky")
SPLITS = [(1, 1, "threads"), (7, 1, "threads"), (150, 1, "threads"), (1, 2, "threads"),
          (7, 2, "threads"), (64, 2, "threads"), (7, 2, "processes"), (150, 2, "processes")]


def _assert_same_null(r, ref, what):
    for col in ("max_stat", "max_pos", "max_neg"):
        np.testing.assert_array_equal(r.null[col].to_numpy(), ref.null[col].to_numpy(),
                                      err_msg=f"{what}: null.{col}")
    np.testing.assert_array_equal(r.p_corrected, ref.p_corrected, err_msg=what)


@pytest.mark.parametrize("correction", ["cluster-mass", "tfce", "max-stat"])
def test_seed_determinism_across_batches_and_jobs(correction):
    # The promise (DESIGN.md): a seed gives the same result, bit for bit,
    # whatever the batch size, worker count or backend.
    grid, Y = _small_problem(n=12, shape=(5, 4, 3), T=8, effect=0.5, seed=3)
    adj = grid.adjacency("face")
    kw = dict(scheme="sign-flip", correction=correction, n_resamples=150, seed=42)
    ref = run_inference(Y, np.ones((12, 1)), [1.0], adj, batch_size=64, n_jobs=1, **kw)
    assert not ref.exact
    for bs, nj, backend in SPLITS:
        r = run_inference(Y, np.ones((12, 1)), [1.0], adj, batch_size=bs, n_jobs=nj,
                          backend=backend, **kw)
        _assert_same_null(r, ref, f"batch {bs}, {nj} jobs, {backend}")
    other = run_inference(Y, np.ones((12, 1)), [1.0], adj, seed=43,
                          **{k: v for k, v in kw.items() if k != "seed"})
    assert not np.array_equal(other.null.max_stat, ref.null.max_stat)


def test_seed_determinism_freedman_lane_and_f():
    # Same promise on the Freedman-Lane path (residual copy, several product
    # rows per resample) with an F contrast and a wider map (two feature chunks).
    rng = np.random.default_rng(4)
    n = 15
    grid = VolumeGrid.from_mask(np.ones((6, 5, 4), bool), np.eye(4))
    lev = np.repeat([0, 1, 2], 5)
    age = rng.uniform(20, 60, n) + 5 * lev
    X = np.c_[lev == 0, lev == 1, lev == 2, age].astype(float)
    Y = rng.standard_normal((n, grid.n_sources, 40)).astype(np.float32)
    Y += (0.05 * age)[:, None, None].astype(np.float32)
    C = np.array([[1.0, -1, 0, 0], [0, 1, -1, 0]])
    kw = dict(scheme="permutation", correction="cluster-mass", n_resamples=100, seed=7)
    ref = run_inference(Y, X, C, grid.adjacency("face"), batch_size=64, **kw)
    assert ref.resampling.freedman_lane and ref.kind == "F"
    for bs, nj, backend in [(1, 1, "threads"), (9, 2, "threads"), (33, 2, "processes")]:
        r = run_inference(Y, X, C, grid.adjacency("face"), batch_size=bs, n_jobs=nj,
                          backend=backend, **kw)
        _assert_same_null(r, ref, f"batch {bs}, {nj} jobs, {backend}")


def test_freedman_lane_observed_equals_statsmodels_and_is_calibrated():
    rng = np.random.default_rng(8)
    n = 20
    grid = VolumeGrid.from_mask(np.ones((2, 2, 1), bool), np.eye(4))
    adj = grid.adjacency("face")
    g = np.repeat([0.0, 1.0], n // 2)
    age = rng.uniform(20, 70, n) + 10 * g                 # nuisance correlated with group
    X = np.c_[1 - g, g, age]
    c = np.array([1.0, -1.0, 0.0])
    Y = (rng.standard_normal((n, 4, 3)) + 0.05 * age[:, None, None]).astype(np.float32)
    r = run_inference(Y, X, c, adj, scheme="permutation", correction="max-stat",
                      n_resamples=200, seed=1)
    assert "Freedman-Lane" in r.scheme
    for j in range(4):
        ref = sm.OLS(Y[:, j, 0].astype(float), X).fit().t_test(c)   # statsmodels reference
        assert r.statistic[j, 0] == pytest.approx(ref.tvalue[0, 0], rel=1e-5)
        assert r.estimate[j, 0] == pytest.approx(ref.effect[0], rel=1e-5)
    # short calibration: no group effect, strong age effect; single feature,
    # 200 datasets x 100 resamples.  Freedman-Lane holds the nominal level
    # closely (Winkler et al. 2014, NeuroImage 92:381-397), so rejections at 0.05 are about
    # Binomial(200, 0.05): 95% interval [4, 17] (scipy.stats.binom.interval)
    lo, hi = stats.binom.interval(0.95, 200, 0.05)
    hits = 0
    for k in range(200):
        y = (rng.standard_normal(n) + 0.2 * age)[:, None, None].astype(np.float32)
        rk = run_inference(y, X, c, sparse.csr_matrix((1, 1)), scheme="permutation",
                           correction="max-stat", n_resamples=100, seed=k)
        hits += rk.p_corrected[0, 0] <= 0.05
    assert lo <= hits <= hi


def test_sign_flip_with_covariate_uses_freedman_lane():
    rng = np.random.default_rng(9)
    n = 14
    cov = rng.standard_normal(n)
    X = np.c_[np.ones(n), cov]
    Y = (rng.standard_normal((n, 3, 2)) + 1.0 + cov[:, None, None]).astype(np.float32)
    r = run_inference(Y, X, [1.0, 0.0], sparse.csr_matrix((3, 3)), scheme="sign-flip",
                      correction="max-stat", n_resamples=100, seed=0)
    assert r.scheme == "sign-flip / Freedman-Lane"
    ref = sm.OLS(Y[:, 0, 0].astype(float), X).fit().t_test([1.0, 0.0])  # statsmodels
    assert r.statistic[0, 0] == pytest.approx(ref.tvalue[0, 0], rel=1e-5)


def test_plain_two_group_is_not_labelled_freedman_lane():
    Y = np.random.default_rng(0).standard_normal((10, 2, 2)).astype(np.float32)
    X = np.zeros((10, 2)); X[:5, 0] = 1; X[5:, 1] = 1
    r = run_inference(Y, X, [1, -1], sparse.csr_matrix((2, 2)), scheme="permutation",
                      correction="max-stat", n_resamples=50, seed=0)
    assert r.scheme == "permutation"


def test_fdr_and_none():
    grid, Y = _small_problem(n=10, seed=4)
    adj = grid.adjacency("face")
    r = run_inference(Y, np.ones((10, 1)), [1.0], adj, correction="fdr")
    ref = multipletests(r.p_uncorrected.ravel(), method="fdr_bh")[1]  # statsmodels
    np.testing.assert_allclose(r.p_corrected.ravel(), ref, rtol=1e-10)
    tt = stats.ttest_1samp(Y.astype(float), 0, axis=0)                # scipy reference
    np.testing.assert_allclose(r.p_uncorrected, tt.pvalue, rtol=1e-4)
    assert r.n_resamples == 0
    for _, row in r.clusters.iterrows():
        sel = r.cluster_labels == row.cluster
        assert row.p_corrected == pytest.approx(r.p_corrected[sel].min())
        assert np.all(r.p_corrected[sel] <= 0.05)
    n = run_inference(Y, np.ones((10, 1)), [1.0], adj, correction="none")
    assert n.p_corrected is None


def test_f_contrast_cluster_path():
    rng = np.random.default_rng(6)
    grid = VolumeGrid.from_mask(np.ones((3, 3, 2), bool), np.eye(4))
    lev = np.repeat([0, 1, 2], 6)
    X = np.c_[lev == 0, lev == 1, lev == 2].astype(float)
    Y = rng.standard_normal((18, 18, 6)).astype(np.float32)
    Y[lev == 2, :6, 2:5] += 1.5
    C = np.array([[1.0, 0, -1], [0, 1, -1]])
    r = run_inference(Y, X, C, grid.adjacency("face"), scheme="permutation",
                      correction="cluster-mass", n_resamples=200, seed=0)
    # df: q = 2 contrast rows of rank 2, n - rank(X) = 18 - 3 (as statsmodels' df_num / df_denom)
    assert r.kind == "F" and r.df == (2, 15)
    # cluster-forming threshold: upper 0.05 point of F(2, 15) (scipy.stats.f)
    assert r.threshold == pytest.approx(stats.f.isf(0.05, 2, 15))
    ref = sm.OLS(Y[:, 0, 3].astype(float), X).fit().f_test(C)    # statsmodels F
    assert r.statistic[0, 3] == pytest.approx(float(np.squeeze(ref.fvalue)), rel=1e-5)
    assert np.isnan(r.estimate).all()
    assert set(r.clusters.sign) <= {1}
    assert r.clusters.p_corrected.iloc[0] < 0.05
    assert (r.null.max_neg == 0).all()


def test_blocks_and_validation():
    rng = np.random.default_rng(1)
    Y = rng.standard_normal((8, 2, 2)).astype(np.float32)
    X = np.c_[np.ones(8), rng.standard_normal(8)]
    r = run_inference(Y, X, [0, 1.0], sparse.csr_matrix((2, 2)), scheme="permutation",
                      correction="max-stat", n_resamples=10_000, seed=0,
                      blocks=[0, 0, 0, 0, 1, 1, 1, 1])
    # 4! * 4! within-block orders (combinatorics; exchangeability blocks,
    # Winkler et al. 2015, NeuroImage 123:253-268)
    assert r.exact and r.n_resamples == 24 * 24
    with pytest.raises(ValueError, match="correction"):
        run_inference(Y, X, [0, 1.0], sparse.csr_matrix((2, 2)), correction="bonferroni")
    with pytest.raises(ValueError, match="NaN"):
        Z = Y.copy(); Z[0, 0, 0] = np.nan
        run_inference(Z, X, [0, 1.0], sparse.csr_matrix((2, 2)))
    with pytest.raises(ValueError, match="adjacency"):
        run_inference(Y, X, [0, 1.0], sparse.csr_matrix((3, 3)))


def _tfce_reference(tvol, steps, E=0.5, H=2.0):
    """TFCE from its definition (Smith & Nichols 2009, NeuroImage 44:83-98,
    E = 0.5, H = 2 as recommended there): at heights h_k = k dh, k = 1..steps,
    dh = max|t| / steps, each point of a component of {t >= h_k} (labelled
    with scipy.ndimage.label, 4D face neighbours) gets e^E h_k^H dh; the
    negative side likewise on -t, with the sign carried back."""
    dh = np.abs(tvol).max() / steps
    out = np.zeros_like(tvol)
    for sign in (1, -1):
        x = sign * tvol
        for k in range(1, steps + 1):
            lab, _ = ndimage.label(x >= k * dh * (1 - 1e-12), STRUCT4)
            size = np.bincount(lab.ravel()).astype(float)
            size[0] = 0.0
            out += sign * size[lab] ** E * (k * dh) ** H * dh
    return out


def test_exact_sign_flip_tfce_equals_brute_force():
    # All 2**6 = 64 sign vectors; the TFCE maps of the reference come from the
    # per-height ndimage definition above, not from groupsrc.stats.corrections.tfce.
    grid, Y = _small_problem(n=6, seed=2)
    adj = grid.adjacency("face")
    y64 = Y.astype(np.float64)
    steps = 50
    maxima = np.array([np.abs(_tfce_reference(grid.to_volume(
        _t1(np.array(s)[:, None, None] * y64)), steps)).max()
        for s in itertools.product([1, -1], repeat=6)])
    obs = np.abs(_tfce_reference(grid.to_volume(_t1(y64)), steps))
    ref = (maxima[None, None, None, None] >= obs[..., None] * (1 - 1e-6)).mean(-1)
    r = run_inference(Y, np.ones((6, 1)), [1.0], adj, scheme="sign-flip", correction="tfce",
                      n_resamples=64, seed=0, tfce=TfceOptions(steps=50))
    assert r.exact
    assert np.any((ref > 1 / 64) & (ref < 1))     # a check with room to fail
    np.testing.assert_allclose(grid.to_volume(r.p_corrected), ref)
    np.testing.assert_allclose(np.sort(np.maximum(r.null.max_pos, -r.null.max_neg)),
                               np.sort(maxima), rtol=1e-5)
    np.testing.assert_allclose(grid.to_volume(r.enhanced),
                               _tfce_reference(grid.to_volume(_t1(y64)), steps),
                               rtol=1e-5, atol=1e-6 * obs.max())


@pytest.mark.parametrize("correction", ["cluster-mass", "cluster-extent", "tfce"])
def test_map_by_map_and_stacked_labelling_agree(correction):
    grid, Y = _small_problem(n=10, seed=6)
    kw = dict(scheme="sign-flip", correction=correction, n_resamples=60, seed=3)
    stacked = run_inference(Y, np.ones((10, 1)), [1.0], grid.adjacency("face"), **kw)
    single = run_inference(Y, np.ones((10, 1)), [1.0], grid.adjacency("face"), batch_size=1,
                           **kw)
    # labelling several maps at once must not change a single bit (the
    # reproducibility rule in groupsrc.stats.models.ols)
    for col in ("max_stat", "max_pos", "max_neg"):
        np.testing.assert_array_equal(stacked.null[col], single.null[col])
    np.testing.assert_array_equal(stacked.p_corrected, single.p_corrected)
