"""Satterthwaite degrees of freedom and the mixed-model t and F against exact identities.

Balanced designs in which the random-intercept model's test reduces to a
classical one (analytic identities; Satterthwaite 1946, Biometrics Bulletin
2:110-114, gives these df exactly when the variance estimate is interior):

* one map per participant and condition: the condition t equals the paired t
  of ``scipy.stats.ttest_rel`` and its df are n - 1 (acceptance of issue 9);
* equal maps per participant, two groups: the group t equals the two-sample t
  of the participant means (``scipy.stats.ttest_ind``), df N - 2;
* three groups: the F equals the one-way ANOVA F of the participant means
  (``scipy.stats.f_oneway``), denominator df N - 3 (Fai & Cornelius 1996 as
  lmerTest computes it, exact here).
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from groupsrc.stats import mixed_fit as mf
from groupsrc.stats.mixed import MixedCore, MixedDesign


def _fit(X, g, Y):
    fit = mf.fit_features(MixedCore(MixedDesign(X, np.ones((len(g), 1)), g)), Y)
    return fit, fit.code == 0


def test_paired_design_equals_ttest_rel_with_n_minus_1_df():
    rng = np.random.default_rng(3)
    n = 12
    g, cond = np.repeat(np.arange(n), 2), np.tile([0.0, 1.0], n)
    Y = (1.5 * rng.standard_normal((n, 40)))[g] + 0.5 * cond[:, None] \
        + rng.standard_normal((2 * n, 40))
    fit, ok = _fit(np.c_[np.ones(2 * n), cond], g, Y)
    assert ok.sum() >= 30
    cs = mf.contrast_statistics(fit, Y, [0.0, 1.0])
    ref = stats.ttest_rel(Y[1::2], Y[0::2])
    np.testing.assert_allclose(cs.statistic[ok], ref.statistic[ok], rtol=1e-9)
    np.testing.assert_allclose(cs.df[ok], n - 1, rtol=1e-7)
    np.testing.assert_allclose(cs.p[ok], ref.pvalue[ok], rtol=1e-7)
    np.testing.assert_allclose(cs.estimate[ok], (Y[1::2] - Y[0::2]).mean(axis=0)[ok],
                               rtol=1e-9)
    # one-sided tails follow the sign of t
    less = mf.contrast_statistics(fit, Y, [0.0, 1.0], tails="less")
    np.testing.assert_allclose(less.p[ok], stats.ttest_rel(Y[1::2], Y[0::2],
                                                            alternative="less").pvalue[ok],
                               rtol=1e-7)


def test_two_groups_equal_two_sample_t_of_means_with_N_minus_2_df():
    rng = np.random.default_rng(4)
    N, k = 12, 3
    g = np.repeat(np.arange(N), k)
    grp = (g >= N // 2).astype(float)
    Y = rng.standard_normal((N, 40))[g] + 0.3 * grp[:, None] + rng.standard_normal((N * k, 40))
    fit, ok = _fit(np.c_[np.ones(N * k), grp], g, Y)
    cs = mf.contrast_statistics(fit, Y, [0.0, 1.0])
    means = np.stack([Y[g == i].mean(axis=0) for i in range(N)])
    ref = stats.ttest_ind(means[N // 2:], means[:N // 2])
    np.testing.assert_allclose(cs.statistic[ok], ref.statistic[ok], rtol=1e-6)
    np.testing.assert_allclose(cs.df[ok], N - 2, rtol=1e-5)


def test_three_groups_f_equals_one_way_anova_of_means():
    rng = np.random.default_rng(5)
    N, k = 12, 3
    g = np.repeat(np.arange(N), k)
    lev = g % 3
    X = np.c_[np.ones(N * k), lev == 1, lev == 2].astype(float)
    Y = rng.standard_normal((N, 40))[g] + rng.standard_normal((N * k, 40))
    fit, ok = _fit(X, g, Y)
    cs = mf.contrast_statistics(fit, Y, [[0, 1.0, 0], [0, 0, 1.0]])
    means = np.stack([Y[g == i].mean(axis=0) for i in range(N)])
    ref = stats.f_oneway(*[means[np.arange(N) % 3 == j] for j in range(3)])
    np.testing.assert_allclose(cs.statistic[ok], ref.statistic[ok], rtol=1e-6)
    np.testing.assert_allclose(cs.df[ok], N - 3, rtol=1e-5)
    np.testing.assert_allclose(cs.p[ok], ref.pvalue[ok], rtol=1e-5)
    assert np.all(np.isnan(cs.estimate))


def test_z_has_the_p_of_the_t():
    """z of equal p: Phi(-|z|) = the t tail (scipy.stats.t and norm)."""
    t = np.array([-40.0, -3.0, -0.5, 0.0, 0.7, 2.5, 300.0])
    nu = np.array([3.0, 7.5, 20.0, 5.0, 11.0, 40.0, 12.0])
    z = mf.z_of_t(t, nu)
    np.testing.assert_allclose(stats.norm.logsf(np.abs(z)), stats.t.logsf(np.abs(t), nu),
                               rtol=1e-8)
    assert np.all(np.sign(z) == np.sign(t))
    Fv = np.array([0.1, 2.0, 30.0, 4000.0])
    np.testing.assert_allclose(stats.norm.logsf(mf.z_of_f(Fv, 2, 9.0)),
                               stats.f.logsf(Fv, 2, 9.0), rtol=1e-8)
