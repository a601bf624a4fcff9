"""The vectorized mixed-model fit against statsmodels MixedLM (reference library).

Acceptance (issue 9): on random features of an unbalanced cohort with an empty
cell (a participant without condition 1; 1 to 3 sessions), the REML fit agrees
with statsmodels MixedLM -- fixed effects rtol 1e-5, standard errors rtol
1e-4, variance components rtol 1e-3 -- for a random intercept and for a random
intercept + slope.

Standard errors: lme4 (``vcov``) and lmerTest report the fixed-effect
covariance conditional on the variance estimates, ``sigma^2 (X'V^-1 X)^-1``;
statsmodels' ``bse_fe`` of a free fit comes from the joint information of
fixed effects and variance parameters, which differs in small samples.  The
reference SEs are therefore statsmodels' own, from a refit with the variance
parameters held at their REML estimates (``free``), where the two coincide.
"""

from __future__ import annotations

import numpy as np
import pytest

from groupsrc.stats.models.mixed import fit as mixed_fit
from groupsrc.stats.models.mixed import inference as mf
from groupsrc.stats.models.mixed.model import MixedCore, MixedDesign, lower_index

from _mixed_data import simulate, statsmodels_reml, unbalanced_design


def _theta_of(core, cov_re_relative):
    """Our theta for a relative covariance Psi given in the coding of Z."""
    Ps = core.R @ cov_re_relative @ core.R.T
    Lam = np.linalg.cholesky(Ps)
    return np.array([Lam[a, b] for a, b in lower_index(core.q)])[:, None]


@pytest.mark.parametrize("slope", [False, True])
@pytest.mark.parametrize("reml", [True, False])
def test_criterion_equals_statsmodels_loglikelihood(slope, reml):
    """-2 log-likelihood, GLS fixed effects and scale at statsmodels' estimates."""
    design = unbalanced_design(12, seed=2, random_slope=slope)
    y = simulate(design, 1, seed=3)[:, 0].astype(float)
    ref, _ = statsmodels_reml(y, design, reml=reml)
    core = MixedCore(design)
    theta = _theta_of(core, np.asarray(ref.cov_re) / ref.scale)
    ev = core.evaluate(theta, core.stats(y[:, None]), reml=reml)
    np.testing.assert_allclose(ev.dev[0], -2 * ref.llf, rtol=1e-9)
    np.testing.assert_allclose(ev.beta[:, 0], ref.fe_params, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(ev.r2[0] / core.m(reml), ref.scale, rtol=1e-7)


@pytest.mark.parametrize("slope", [False, True])
def test_gradient_and_hessian_match_finite_differences(slope):
    """Central differences of the criterion (common practice; h = 1e-5)."""
    design = unbalanced_design(10, seed=4, random_slope=slope)
    core = MixedCore(design)
    st = core.stats(simulate(design, 3, seed=5).astype(float))
    rng = np.random.default_rng(0)
    theta = np.abs(rng.normal(1.0, 0.3, (core.npar, 3)))
    ev = core.evaluate(theta, st, order=2)
    h = 1e-5
    for k in range(core.npar):
        up, dn = theta.copy(), theta.copy()
        up[k] += h
        dn[k] -= h
        eu, ed = core.evaluate(up, st, order=1), core.evaluate(dn, st, order=1)
        np.testing.assert_allclose(ev.grad[k], (eu.dev - ed.dev) / (2 * h), rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(ev.hess[k], (eu.grad - ed.grad) / (2 * h), rtol=1e-5,
                                   atol=1e-5)


def _ours(design, Y, reml=True):
    core = MixedCore(design)
    fit = mixed_fit.fit_features(core, Y, reml=reml)
    vc = mf.variance_components(fit, Y)
    ses = []
    for j in range(core.p):
        L = np.zeros(core.p)
        L[j] = 1.0
        ses.append(mf.contrast_statistics(fit, Y, L).se)
    st = core.stats(Y.astype(float))
    beta = core.evaluate(fit.theta, st, reml).beta
    return fit, vc, beta, np.array(ses)


@pytest.mark.parametrize("slope", [False, True], ids=["intercept", "intercept+slope"])
def test_fit_matches_statsmodels_on_an_unbalanced_cohort(slope):
    """Acceptance: statsmodels MixedLM (REML) on random features, interior fits."""
    design = unbalanced_design(18, seed=6, missing=(3, 8), random_slope=slope)
    Y = simulate(design, 8, seed=7, sd_random=(1.6, 1.0), effect=[0.5, 0.2, 0, 0.4, 0, 0])
    fit, vc, beta, ses = _ours(design, Y)
    checked = 0
    for j in range(Y.shape[1]):
        ref, fixed = statsmodels_reml(Y[:, j].astype(float), design)
        cov = np.asarray(ref.cov_re)
        if fit.code[j] != 0 or np.linalg.eigvalsh(cov).min() < 1e-3 * np.abs(cov).max():
            continue                                  # boundary fits: tested below
        checked += 1
        np.testing.assert_allclose(beta[:, j], ref.fe_params, rtol=1e-5)
        np.testing.assert_allclose(ses[:, j], fixed.bse_fe, rtol=1e-4)
        np.testing.assert_allclose(vc["sd_residual"][j] ** 2, ref.scale, rtol=1e-3)
        D = np.diag(vc["sd"][:, j] ** 2)
        for (a, b), r in vc["corr"].items():
            D[a, b] = D[b, a] = r[j] * vc["sd"][a, j] * vc["sd"][b, j]
        np.testing.assert_allclose(D, cov, rtol=1e-3, atol=1e-3 * np.abs(cov).max())
    assert checked >= 5, f"only {checked} interior fits to compare"


def test_boundary_fit_is_kept_and_counted():
    """No participant variance: lme4 keeps the singular fit (variance 0), whose fixed
    effects are the least-squares ones (statsmodels OLS); the fit code says so."""
    import statsmodels.api as sm
    design = unbalanced_design(14, seed=8)
    rng = np.random.default_rng(9)
    Y = rng.standard_normal((design.X.shape[0], 40)).astype(np.float32)
    fit, vc, beta, ses = _ours(design, Y)
    at_zero = np.flatnonzero(fit.code == 1)
    assert at_zero.size > 0 and fit.counts()["boundary (singular covariance)"] == at_zero.size
    for j in at_zero[:5]:
        ols = sm.OLS(Y[:, j].astype(float), design.X).fit()
        np.testing.assert_allclose(beta[:, j], ols.params, rtol=1e-5, atol=1e-6)
        assert vc["sd"][0, j] < 1e-3 * vc["sd_residual"][j]


def test_constant_feature_has_its_own_code():
    design = unbalanced_design(8, seed=10)
    Y = simulate(design, 4, seed=11)
    Y[:, 2] = 3.0
    core = MixedCore(design)
    fit = mixed_fit.fit_features(core, Y)
    assert fit.code[2] == 3 and np.all(fit.code[[0, 1, 3]] != 3)
    cs = mf.contrast_statistics(fit, Y, [0, 1, 0, 0, 0, 0])
    assert cs.z[2] == 0 and cs.p[2] == 1


def test_ml_option_matches_statsmodels():
    design = unbalanced_design(16, seed=12)
    Y = simulate(design, 4, seed=13, sd_random=(1.5,))
    fit, vc, beta, _ = _ours(design, Y, reml=False)
    interior = np.flatnonzero(fit.code == 0)
    assert interior.size >= 2                        # something is compared
    for j in interior:
        ref, _ = statsmodels_reml(Y[:, j].astype(float), design, reml=False)
        np.testing.assert_allclose(beta[:, j], ref.fe_params, rtol=1e-5)
        np.testing.assert_allclose(vc["sd_residual"][j] ** 2, ref.scale, rtol=1e-3)


def test_design_refuses_what_cannot_be_fitted():
    X = np.ones((6, 1))
    with pytest.raises(ValueError, match="1 to 3"):
        MixedDesign(X, np.ones((6, 4)), np.repeat(np.arange(3), 2))
    with pytest.raises(ValueError, match="rank"):
        MixedDesign(np.ones((6, 2)), np.ones((6, 1)), np.repeat(np.arange(3), 2))
