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

from groupsrc.stats.models.mixed import fit as mixed_fit
from groupsrc.stats.models.mixed import inference as mf
from groupsrc.stats.models.mixed.model import MixedCore, MixedDesign


def _fit(X, g, Y):
    fit = mixed_fit.fit_features(MixedCore(MixedDesign(X, np.ones((len(g), 1)), g)), Y)
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
    assert ok.sum() >= 10                  # enough interior fits to compare
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
    assert ok.sum() >= 10                  # enough interior fits to compare
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


def test_scored_z_is_the_exact_z_where_it_counts():
    """The z maps and scores use the exact z (scipy t and normal tails) where |z| >= 3,
    and Hill's normalizing transformation below: within 1.3e-4 of the exact z for
    df >= 4 and 1e-6 for df >= 8 (checked here against scipy, not taken from the code)."""
    t = np.concatenate([-np.geomspace(1e-3, 60, 400), np.geomspace(1e-3, 60, 400)])
    for nu in (4.0, 7.3, 15.0, 42.0, 300.0):
        exact = np.sign(t) * stats.norm.isf(stats.t.sf(np.abs(t), nu))
        z = mf.scored_z(t, nu, mf.t_switch(nu))
        big = np.abs(exact) >= 3 + 1e-9
        np.testing.assert_allclose(z[big], exact[big], rtol=1e-9)
        np.testing.assert_allclose(z[~big], exact[~big], atol=1.3e-4 if nu < 8 else 1e-6)
        assert np.all(np.diff(z[400:]) > 0)                     # monotone in t
    # below 4 df (Satterthwaite df near a boundary fit can fall under 1/2, where Hill's
    # transformation is undefined) every value is the exact one
    for nu in (0.3, 0.9, 3.5):
        exact = np.sign(t) * stats.norm.isf(stats.t.sf(np.abs(t), nu))
        np.testing.assert_allclose(mf.scored_z(t, nu, mf.t_switch(nu)), exact, rtol=1e-9)


def test_scoring_df_are_those_of_the_restricted_model():
    """The permutation score (mixed_kernel) converts t to z at Satterthwaite df computed
    at the fit of the model restricted to L b = 0, which has rank(L) fixed effects fewer
    than the full model: in the balanced designs above the df are then n (paired; the
    restricted model leaves the within-participant variance n df) and N - 1 (two groups
    of participant means) -- the analytic identities of the full model plus one."""
    rng = np.random.default_rng(6)
    n = 12
    g, cond = np.repeat(np.arange(n), 2), np.tile([0.0, 1.0], n)
    Y = (1.5 * rng.standard_normal((n, 30)))[g] + 0.5 * cond[:, None] \
        + rng.standard_normal((2 * n, 30))
    X = np.c_[np.ones(2 * n), cond]
    fit, ok = _fit(X, g, Y)
    assert ok.sum() >= 10                  # enough interior fits to compare
    fit0, ok0 = _fit(X[:, :1], g, Y)
    _, _, nu = mf.score_statistics(fit, fit0, Y, [0.0, 1.0])
    assert (ok & ok0).sum() >= 20
    np.testing.assert_allclose(nu[ok & ok0], n, rtol=1e-7)
    N, k = 12, 3
    g = np.repeat(np.arange(N), k)
    grp = (g >= N // 2).astype(float)
    Y = rng.standard_normal((N, 30))[g] + rng.standard_normal((N * k, 30))
    X = np.c_[np.ones(N * k), grp]
    fit, ok = _fit(X, g, Y)
    assert ok.sum() >= 10                  # enough interior fits to compare
    fit0, ok0 = _fit(X[:, :1], g, Y)
    _, _, nu = mf.score_statistics(fit, fit0, Y, [0.0, 1.0])
    assert (ok & ok0).sum() >= 20
    np.testing.assert_allclose(nu[ok & ok0], N - 1, rtol=1e-5)
