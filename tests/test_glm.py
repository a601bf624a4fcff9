"""OLS t / F contrasts against scipy.stats and statsmodels."""

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from groupsrc.stats.models import glm


def test_one_sample_matches_scipy():
    rng = np.random.default_rng(0)
    Y = (rng.standard_normal((12, 50)) + 0.3).astype(np.float32)
    r = glm.t_contrast(Y, np.ones((12, 1)), [1.0])
    ref = stats.ttest_1samp(Y.astype(float), 0.0, axis=0)  # scipy.stats reference
    np.testing.assert_allclose(r.t, ref.statistic, rtol=1e-5)
    assert r.df == 11                                       # n - 1 (scipy's df)
    np.testing.assert_allclose(r.estimate, Y.astype(float).mean(0), rtol=1e-5)  # the mean


def test_paired_matches_scipy():
    rng = np.random.default_rng(1)
    a = rng.standard_normal((10, 40))
    b = a + rng.standard_normal((10, 40)) * 0.5 + 0.2
    r = glm.t_contrast((a - b).astype(np.float32), np.ones((10, 1)), [1.0])
    ref = stats.ttest_rel(a, b, axis=0)  # scipy.stats paired t reference
    np.testing.assert_allclose(r.t, ref.statistic, rtol=1e-5)


def test_two_sample_matches_scipy():
    rng = np.random.default_rng(2)
    g1 = rng.standard_normal((9, 30)) + 0.5
    g2 = rng.standard_normal((7, 30))
    Y = np.vstack([g1, g2]).astype(np.float32)
    X = np.zeros((16, 2)); X[:9, 0] = 1; X[9:, 1] = 1
    r = glm.t_contrast(Y, X, [1.0, -1.0])
    ref = stats.ttest_ind(g1, g2, axis=0)  # scipy.stats pooled-variance two-sample t
    np.testing.assert_allclose(r.t, ref.statistic, rtol=1e-5)
    assert r.df == 14                                       # n1 + n2 - 2 (pooled t)
    # Cohen's d: difference over the pooled sd (common practice), times Hedges'
    # J = 1 - 3/(4 df - 1) (Hedges 1981, J Educ Stat 6:107-128)
    sp = np.sqrt(((8 * g1.var(0, ddof=1)) + 6 * g2.var(0, ddof=1)) / 14)
    d = (g1.mean(0) - g2.mean(0)) / sp * (1 - 3 / (4 * 14 - 1))
    np.testing.assert_allclose(glm.cohens_d(r.estimate, r.sigma, r.df), d, rtol=1e-5)


def _design(seed=3, n=30):
    rng = np.random.default_rng(seed)
    level = np.repeat([0, 1, 2], n // 3)
    age = rng.uniform(20, 60, n)
    X = np.c_[np.ones(n), level == 1, level == 2, age, rng.standard_normal(n)].astype(float)
    return X, rng


def test_t_with_covariates_matches_statsmodels():
    X, rng = _design()
    y = X @ [1.0, 0.5, -0.3, 0.02, 0.4] + rng.standard_normal(30)
    c = np.array([0, 1.0, -1.0, 0, 0])
    r = glm.t_contrast(y[:, None].astype(np.float32), X, c)
    ref = sm.OLS(y, X).fit().t_test(c)  # statsmodels OLS contrast reference
    np.testing.assert_allclose(r.estimate[0], ref.effect[0], rtol=1e-5)
    np.testing.assert_allclose(r.se[0], ref.sd[0, 0], rtol=1e-5)
    np.testing.assert_allclose(r.t[0], ref.tvalue[0, 0], rtol=1e-5)
    assert r.df == ref.df_denom


def test_f_three_level_factor_matches_statsmodels():
    X, rng = _design(4)
    Y = X @ rng.standard_normal((5, 6)) + rng.standard_normal((30, 6))
    C = np.array([[0, 1.0, 0, 0, 0], [0, 0, 1.0, 0, 0]])
    r = glm.f_contrast(Y.astype(np.float32), X, C)
    for j in range(6):
        ref = sm.OLS(Y[:, j], X).fit().f_test(C)  # statsmodels F test reference
        np.testing.assert_allclose(r.F[j], float(np.squeeze(ref.fvalue)), rtol=1e-4)
        assert (r.df1, r.df2) == (int(ref.df_num), int(ref.df_denom))
    # partial eta^2 = SS_eff / (SS_eff + SS_res) (its definition, common practice),
    # with SS from statsmodels fits of the full and the reduced model
    eta = glm.partial_eta_squared(r.F, r.df1, r.df2)
    full = sm.OLS(Y[:, 0], X).fit()
    red = sm.OLS(Y[:, 0], X[:, [0, 3, 4]]).fit()
    ss_eff = red.ssr - full.ssr
    np.testing.assert_allclose(eta[0], ss_eff / (ss_eff + full.ssr), rtol=1e-4)


def test_rank_deficient_redundant_contrast_rows():
    # The third row is the sum of the first two, so the hypothesis is the
    # same as with the first two rows alone: q = rank 2 numerator df.
    X, rng = _design(5)
    Y = X @ rng.standard_normal((5, 3)) + rng.standard_normal((30, 3))
    C = np.array([[0, 1.0, 0, 0, 0], [0, 0, 1.0, 0, 0], [0, 1.0, 1.0, 0, 0]])
    r = glm.f_contrast(Y, X, C)
    assert (r.df1, r.df2) == (2, 25)
    for j in range(3):
        full = sm.OLS(Y[:, j], X).fit()
        ref = full.f_test(C[:2])            # statsmodels F test, non-redundant rows
        np.testing.assert_allclose(r.F[j], float(np.squeeze(ref.fvalue)), rtol=1e-10)
        assert (r.df1, r.df2) == (int(ref.df_num), int(ref.df_denom))
        # the same F as the nested-model comparison without the two level
        # dummies (statsmodels compare_f_test; extra-sum-of-squares F, common practice)
        nested = full.compare_f_test(sm.OLS(Y[:, j], X[:, [0, 3, 4]]).fit())
        np.testing.assert_allclose(r.F[j], nested[0], rtol=1e-10)
        assert nested[2] == 2


def test_rejects_non_estimable_and_no_df():
    # c = [1, -1] on two identical columns is not a combination of the
    # design's rows (estimability, common practice of linear models)
    X = np.c_[np.ones(6), np.ones(6)]
    with pytest.raises(ValueError, match="estimable"):
        glm.t_contrast(np.zeros((6, 2)), X, [1.0, -1.0])
    with pytest.raises(ValueError, match="degrees of freedom"):
        glm.t_contrast(np.zeros((2, 2)), np.eye(2), [1.0, 0.0])


def test_hedges_j_formula():
    # Hedges 1981: J = 1 - 3 / (4 df - 1); e.g. df = 10 -> 1 - 3/39
    assert glm.hedges_j(10) == pytest.approx(1 - 3 / 39)
