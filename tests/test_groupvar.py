"""Variance groups in the GLM (groupsrc/stats/models/groupvar.py) against outside references.

* two groups, no covariate: Welch's t and the Welch-Satterthwaite df are
  ``scipy.stats.ttest_ind(equal_var=False)`` (reference library);
* k groups, one way: the G statistic is Welch's heteroscedastic F, with its df, as
  ``statsmodels.stats.oneway.anova_oneway(use_var="unequal")`` computes it (reference
  library; Welch 1951, Biometrika 38:330-336);
* covariates: v is the weighted-least-squares t of the contrast with the weights
  ``w_g = tr_g / e_g'e_g`` held fixed -- ``statsmodels`` WLS with ``cov_type="fixed
  scale"`` (reference library) -- and the df are those of Winkler et al. 2014
  (NeuroImage 92:381-397, "variance groups"; the formula written out here from the
  paper, from memory: nu = s (s + 2) / (3 Y), Y = sum_g (1 - sum_{n in g} W_nn /
  tr W)^2 / sum_{n in g} R_nn).
"""

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats.oneway import anova_oneway

from groupsrc.stats.models.groupvar import (GroupVarianceKernel, group_contrast,
                                            groups_without_variance, v_to_z)


def _groups(sizes, sds, F=6, seed=0, shift=None):
    rng = np.random.default_rng(seed)
    g = np.repeat(np.arange(len(sizes)), sizes)
    Y = rng.standard_normal((g.size, F)) * np.asarray(sds, float)[g][:, None]
    if shift is not None:
        Y += np.asarray(shift, float)[g][:, None]
    return g, Y


def test_two_groups_is_welchs_t():
    g, Y = _groups([6, 12], [2.0, 1.0], seed=1, shift=[0.5, 0.0])
    X = np.c_[g == 0, g == 1].astype(float)
    r = group_contrast(Y, X, [1.0, -1.0], g)
    ref = stats.ttest_ind(Y[g == 0], Y[g == 1], equal_var=False)
    np.testing.assert_allclose(r.statistic, ref.statistic, rtol=1e-10)
    np.testing.assert_allclose(r.nu, ref.df, rtol=1e-10)
    np.testing.assert_allclose(r.estimate, Y[g == 0].mean(0) - Y[g == 1].mean(0), rtol=1e-10)


def test_an_intercept_coding_gives_the_same_v():
    """The contrast's meaning, not the coding: [1, group] with weight on the group column."""
    g, Y = _groups([5, 11], [1.0, 2.5], seed=2)
    a = group_contrast(Y, np.c_[g == 0, g == 1].astype(float), [-1.0, 1.0], g)
    b = group_contrast(Y, np.c_[np.ones(g.size), g], [0.0, 1.0], g)
    np.testing.assert_allclose(a.statistic, b.statistic, rtol=1e-10)
    np.testing.assert_allclose(a.nu, b.nu, rtol=1e-10)


@pytest.mark.parametrize("sizes,sds", [([4, 6, 9], [1.0, 2.0, 0.5]),
                                       ([5, 5, 5, 8], [1.0, 1.0, 3.0, 1.0])])
def test_k_groups_is_welchs_anova(sizes, sds):
    g, Y = _groups(sizes, sds, seed=3)
    k = len(sizes)
    X = (g[:, None] == np.arange(k)[None]).astype(float)
    C = np.hstack([np.eye(k - 1), -np.ones((k - 1, 1))])
    r = group_contrast(Y, X, C, g)
    for j in range(Y.shape[1]):
        ref = anova_oneway([Y[g == i, j] for i in range(k)], use_var="unequal")
        np.testing.assert_allclose(r.statistic[j], ref.statistic, rtol=1e-9)
        np.testing.assert_allclose(r.nu[j], ref.df[1], rtol=1e-9)


def _wls_reference(y, X, C, g):
    """v (or the Wald F over Lambda) and df of Winkler et al. 2014 with statsmodels WLS."""
    ols = sm.OLS(y, X).fit()
    h = ols.get_influence().hat_matrix_diag
    labels = np.unique(g)
    tr = np.array([(1 - h[g == k]).sum() for k in labels])
    wg = np.array([tr[i] / (ols.resid[g == k] ** 2).sum() for i, k in enumerate(labels)])
    w = wg[np.searchsorted(labels, g)]
    wls = sm.WLS(y, X, weights=w).fit(cov_type="fixed scale", cov_kwds={"scale": 1.0})
    n = np.array([(g == k).sum() for k in labels])
    Ysum = ((1 - n * wg / (n * wg).sum()) ** 2 / tr).sum()
    C = np.atleast_2d(C)
    s = C.shape[0]
    nu = s * (s + 2) / (3 * Ysum)
    if s == 1:
        tt = wls.t_test(C)
        return float(np.squeeze(tt.tvalue)), nu, float(np.squeeze(tt.effect)), \
            float(np.squeeze(tt.sd))
    lam = 1 + 2 * (s - 1) * Ysum / (s * (s + 2))
    return float(np.squeeze(wls.f_test(C).fvalue)) / lam, nu, None, None


@pytest.mark.parametrize("contrast", [[0, 1.0, 0], [1.0, 0.5, 0.0], [0, 0, 1.0]],
                         ids=["group difference", "mean of groups", "age slope"])
def test_covariates_match_weighted_least_squares(contrast):
    rng = np.random.default_rng(4)
    g, Y = _groups([7, 13], [2.0, 1.0], seed=4)
    age = rng.uniform(20, 60, g.size) + 5 * g
    X = np.c_[np.ones(g.size), g, age]
    Y = Y + 0.03 * age[:, None]
    r = group_contrast(Y, X, contrast, g)
    for j in range(Y.shape[1]):
        v, nu, est, se = _wls_reference(Y[:, j], X, contrast, g)
        np.testing.assert_allclose(r.statistic[j], v, rtol=1e-8)
        np.testing.assert_allclose(r.nu[j], nu, rtol=1e-8)
        np.testing.assert_allclose(r.estimate[j], est, rtol=1e-8)
        np.testing.assert_allclose(r.se[j], se, rtol=1e-8)


def test_g_with_a_covariate_matches_the_wald_form():
    rng = np.random.default_rng(5)
    g, Y = _groups([5, 7, 10], [1.0, 2.0, 0.7], seed=5)
    age = rng.uniform(20, 60, g.size)
    X = np.c_[g == 0, g == 1, g == 2, age].astype(float)
    C = np.array([[1.0, 0, -1, 0], [0, 1, -1, 0]])
    r = group_contrast(Y, X, C, g)
    for j in range(Y.shape[1]):
        G, nu, _, _ = _wls_reference(Y[:, j], X, C, g)
        np.testing.assert_allclose(r.statistic[j], G, rtol=1e-8)
        np.testing.assert_allclose(r.nu[j], nu, rtol=1e-8)


def test_z_of_v_against_scipy():
    """The z of equal tail probability (scipy's t and normal tails); Hill's transformation
    inside |z| < 3 for nu >= 4 is accurate to 1.3e-4 (Hill 1970, checked, not assumed)."""
    v = np.array([-6.0, -2.5, -0.3, 0.0, 0.7, 1.9, 3.2, 8.0])
    for nu in (1.5, 3.0, 4.0, 6.3, 15.0, 80.0):
        ref = np.sign(v) * stats.norm.isf(stats.t.sf(np.abs(v), nu))
        np.testing.assert_allclose(v_to_z(v, np.full(v.size, nu)), ref, atol=1.3e-4)


def test_a_group_of_one_has_no_variance():
    g = np.array(["a"] * 5 + ["b"] * 6 + ["c"])
    X = np.c_[g == "a", g == "b", g == "c"].astype(float)
    assert groups_without_variance(X, g) == ["c"]
    assert groups_without_variance(X[:11], g[:11]) == []


def test_the_kernel_flips_signs_and_is_welch_at_the_identity():
    g, Y = _groups([6, 12], [2.0, 1.0], seed=6, F=8)
    X = np.c_[g == 0, g == 1].astype(float)
    k = GroupVarianceKernel(Y.astype(np.float32), X, [1.0, -1.0], g,
                            info={"column": "group"})
    obs = k.observed("two")
    ref = stats.ttest_ind(Y[g == 0], Y[g == 1], equal_var=False)
    np.testing.assert_allclose(obs.test_statistic, ref.statistic, rtol=1e-5)
    np.testing.assert_allclose(obs.p_uncorrected, ref.pvalue, rtol=1e-5)
    assert obs.scale == "z" and k.describe()["statistic"] == "welch_v"
    rearr = k.rearrangements(100, seed=1)
    assert rearr.kind == "sign-flip"


def test_the_z_floor_never_changes_a_cluster_null():
    """Cluster corrections read resampled maps only beyond the forming threshold, so the
    kernel skips the exact z below it (|z| <= |v| for a t: its tails are heavier than the
    normal's); the null distribution is the same to the bit as with every z exact."""
    from scipy import sparse
    from groupsrc.stats.inference import InferenceSpec, infer

    class Everywhere(GroupVarianceKernel):
        @property
        def z_floor(self):
            return 0.0

        @z_floor.setter
        def z_floor(self, value):
            pass

    g, Y = _groups([6, 10], [2.0, 1.0], F=40, seed=8)
    adj = sparse.csr_matrix(np.eye(8, k=1) + np.eye(8, k=-1))
    X = np.c_[g == 0, g == 1].astype(float)
    spec = InferenceSpec(correction="cluster-mass", n_resamples=200, seed=3, forming_p=0.05)
    fast = infer(GroupVarianceKernel(Y.astype(np.float32), X, [1.0, -1.0], g), adj, spec)
    slow = infer(Everywhere(Y.astype(np.float32), X, [1.0, -1.0], g), adj, spec)
    np.testing.assert_array_equal(fast.null.to_numpy(), slow.null.to_numpy())
    assert (fast.null["max_stat"] > 0).mean() > 0.5        # clusters were formed at all


@pytest.mark.parametrize("sizes,sds,contrast", [
    ([7, 12], [2.0, 1.0], [[0, 1.0, 0], [0, 0, 1.0]]),            # two groups, F (s = 2)
    ([5, 6, 9], [1.0, 2.0, 0.5], [0, 1.0, 0, 0]),                # three groups, one row
    ([5, 6, 9], [1.0, 2.0, 0.5], [[0, 1.0, 0, 0], [0, 0, 0, 1.0]])])   # three groups, F
def test_every_path_of_the_compiled_statistic_matches_wls(sizes, sds, contrast):
    """Two groups with several rows (:func:`_vg2_rows`), three groups (the general
    tiles): statsmodels WLS (reference library), as in the covariate tests above."""
    rng = np.random.default_rng(9)
    g, Y = _groups(sizes, sds, seed=9)
    age = rng.uniform(20, 60, g.size)
    if len(sizes) == 2:
        X = np.c_[np.ones(g.size), g, age]
    else:
        X = np.c_[np.ones(g.size), g == 1, g == 2, age].astype(float)
    r = group_contrast(Y, X, contrast, g)
    for j in range(Y.shape[1]):
        v, nu, est, se = _wls_reference(Y[:, j], X, contrast, g)
        np.testing.assert_allclose(r.statistic[j], v, rtol=1e-8)
        np.testing.assert_allclose(r.nu[j], nu, rtol=1e-8)
