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
from groupsrc.stats.models.mixed.model import MixedCore, MixedDesign

from _mixed_data import simulate, statsmodels_reml, unbalanced_design


def _theta_of(core, cov_re_relative):
    """Our theta for a relative covariance Psi given in the coding of Z."""
    return core.theta_of((core.R @ cov_re_relative @ core.R.T)[:, :, None])


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


@pytest.mark.parametrize("reml", [True, False])
@pytest.mark.parametrize("slope", [False, True])
def test_gradient_and_hessian_match_finite_differences(slope, reml):
    """Central differences of the criterion (common practice; h = 1e-5); a random
    intercept's variance also below zero (but admissible), lme4's Lambda with entries of
    either sign."""
    design = unbalanced_design(10, seed=4, random_slope=slope)
    core = MixedCore(design)
    st = core.stats(simulate(design, 4, seed=5).astype(float))
    rng = np.random.default_rng(0)
    theta = rng.normal(0.6, 0.5, (core.npar, 4))
    if core.unconstrained:
        theta[0, 2:] = [-0.04, -0.1]                 # negative, every Vbar_i positive definite
    ev = core.evaluate(theta, st, reml=reml, order=2)
    assert ev.ok.all()
    h = 1e-5
    for k in range(core.npar):
        up, dn = theta.copy(), theta.copy()
        up[k] += h
        dn[k] -= h
        eu, ed = core.evaluate(up, st, reml, order=1), core.evaluate(dn, st, reml, order=1)
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


def test_boundary_fits_are_counted_and_at_least_as_good_as_a_non_negative_fit():
    """No participant variance: about half of the features estimate it below zero.
    They are counted (code 1) and kept unconstrained: their criterion is no worse than
    statsmodels MixedLM's (whose variance cannot go below zero, so it sits at zero
    there, where its fixed effects are the least-squares ones, statsmodels OLS), and
    strictly better where our estimate is negative."""
    import statsmodels.api as sm
    design = unbalanced_design(14, seed=8)
    rng = np.random.default_rng(9)
    Y = rng.standard_normal((design.X.shape[0], 24)).astype(np.float32)
    fit, vc, beta, ses = _ours(design, Y)
    below = np.flatnonzero(fit.code == 1)
    assert below.size >= 6 and fit.counts()[mixed_fit.CODES[1]] == below.size
    assert np.all(fit.theta[0, below] < mixed_fit.BOUNDARY_TOL)
    for j in below[:6]:
        ref, _ = statsmodels_reml(Y[:, j].astype(float), design)
        assert fit.dev[j] <= -2 * ref.llf + 1e-6
        if fit.theta[0, j] < -1e-3 and float(np.asarray(ref.cov_re)[0, 0]) < 1e-6 * ref.scale:
            assert fit.dev[j] < -2 * ref.llf - 1e-6
            ols = sm.OLS(Y[:, j].astype(float), design.X).fit()
            np.testing.assert_allclose(ref.fe_params, ols.params, rtol=1e-4, atol=1e-5)
        assert vc["sd"][0, j] == 0.0                  # no SD for a variance below zero


def test_balanced_one_way_estimates_are_the_anova_estimates():
    """Balanced one-way random-effects layout (N participants x k maps): the REML
    estimates are the analysis-of-variance ones, sigma^2 = MSW and the participant
    variance (MSB - MSW) / k, negative where MSB < MSW (Searle, Casella & McCulloch
    1992, Variance Components, ch. 3-4; from memory) -- for every feature."""
    rng = np.random.default_rng(14)
    N, k, F = 9, 4, 60
    g = np.repeat(np.arange(N), k)
    Y = (0.4 * rng.standard_normal((N, F)))[g] + rng.standard_normal((N * k, F))
    design = MixedDesign(np.ones((N * k, 1)), np.ones((N * k, 1)), g)
    fit, vc, _, _ = _ours(design, Y)
    assert np.all(fit.code <= 1) and np.any(fit.code == 1)
    means = np.stack([Y[g == i].mean(axis=0) for i in range(N)])
    msw = ((Y - means[g]) ** 2).sum(axis=0) / (N * (k - 1))
    msb = k * ((means - means.mean(axis=0)) ** 2).sum(axis=0) / (N - 1)
    np.testing.assert_allclose(vc["sd_residual"] ** 2, msw, rtol=1e-7)
    var_b = fit.theta[0] * vc["sd_residual"] ** 2          # Z is all ones: no rescaling
    np.testing.assert_allclose(var_b, (msb - msw) / k, rtol=1e-6, atol=1e-9)
    np.testing.assert_array_equal(fit.code == 1, msb < msw)


def test_constant_feature_has_its_own_code():
    design = unbalanced_design(8, seed=10)
    Y = simulate(design, 4, seed=11)
    Y[:, 2] = 3.0
    core = MixedCore(design)
    fit = mixed_fit.fit_features(core, Y)
    assert fit.code[2] == 3 and np.all(fit.code[[0, 1, 3]] != 3)
    cs = mf.contrast_statistics(fit, Y, [0, 1, 0, 0, 0, 0])
    assert np.isnan(cs.z[2]) and np.isnan(cs.p[2])      # undefined, as in the GLM


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
