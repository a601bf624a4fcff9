"""Convergence of the mixed-model fit: three random effects against statsmodels MixedLM,
and the checks that keep a fit from being called converged when it is not.

Reference: statsmodels MixedLM (reference library), fitted tightly by several
optimizers with the best kept (``_mixed_data.statsmodels_reml``).  MixedLM keeps the
random-effect covariance positive semi-definite, as groupsrc does with random slopes
(lme4's parameterization, groupsrc/stats/models/mixed/model.py), so:

* everywhere, groupsrc's criterion is no worse than MixedLM's beyond
  ``DEV_TOL`` = 1e-3 (a fit creeping to the boundary is accepted within about 5e-4 of
  its limit, groupsrc/stats/models/mixed/fit.py); a fit that stopped at a local
  optimum (issue 21 saw one 0.30 worse) fails this;
* where both covariances are positive definite (interior fits), the two are the same
  optimum: criterion, fixed effects and covariance.
"""

from __future__ import annotations

import numpy as np
import pytest

from groupsrc.stats.models.mixed import fit as mixed_fit
from groupsrc.stats.models.mixed.model import MixedCore, MixedDesign

from _mixed_data import statsmodels_reml, unbalanced_design

DEV_TOL = 1e-3


def _three_random_effects(n=24, n_features=24, seed=31, sds=(1.4, 0.9, 0.7)):
    """Random intercept, condition slope and session slope (1 to 3 sessions, an empty
    cell), with those SDs; invented inputs for both fits."""
    d0 = unbalanced_design(n, seed=seed, missing=(3,), max_sessions=3, map_covariate=True)
    X, g = np.asarray(d0.X), np.asarray(d0.groups)
    cond, ses = np.asarray(d0.within)[:, 1], np.asarray(d0.map_cols)[:, 0]
    Z = np.c_[np.ones(len(g)), cond, ses - 1.0]
    design = MixedDesign(X, Z, g)
    rng = np.random.default_rng(seed + 1)
    b = rng.standard_normal((n, 3, n_features)) * np.asarray(sds)[None, :, None]
    Y = np.einsum("nq,nqf->nf", Z, b[g]) + rng.standard_normal((len(g), n_features))
    return design, Y.astype(np.float32)


def _against_statsmodels(n_features, sds):
    design, Y = _three_random_effects(n_features=n_features, sds=sds)
    core = MixedCore(design)
    fit = mixed_fit.fit_features(core, Y)
    assert not np.any(fit.code == 2), fit.counts()
    Psi = core.psi_raw(core.psi_of(fit.theta))
    st = core.stats(Y.astype(float))
    beta = core.evaluate(fit.theta, st).beta
    interior = 0
    for j in range(Y.shape[1]):
        ref, _ = statsmodels_reml(Y[:, j].astype(float), design)
        assert fit.dev[j] <= -2 * ref.llf + DEV_TOL, (j, fit.dev[j], -2 * ref.llf)
        cov = np.asarray(ref.cov_re) / ref.scale
        if fit.code[j] == 0 and np.linalg.eigvalsh(cov).min() > 1e-3 * np.abs(cov).max():
            interior += 1
            np.testing.assert_allclose(fit.dev[j], -2 * ref.llf, rtol=1e-8)
            np.testing.assert_allclose(beta[:, j], ref.fe_params, rtol=1e-4, atol=1e-5)
            np.testing.assert_allclose(Psi[:, :, j], cov, rtol=2e-3, atol=2e-3 * np.abs(cov).max())
    return interior, fit


@pytest.mark.filterwarnings("ignore")
def test_three_random_effects_against_statsmodels():
    """Quick version (a statsmodels fit of three random effects takes seconds)."""
    interior, _ = _against_statsmodels(4, (2.0, 1.2, 1.0))
    assert interior >= 2, f"only {interior} interior fits to compare"


@pytest.mark.slow
@pytest.mark.filterwarnings("ignore")
def test_three_random_effects_against_statsmodels_long(request):
    """60 features, half of them with small slope SDs (many boundary fits); about
    three minutes."""
    if "slow" not in (request.config.getoption("-m") or ""):
        pytest.skip("long: run  pytest -m slow -s tests/test_mixed_convergence.py")
    a, fa = _against_statsmodels(30, (2.0, 1.2, 1.0))
    b, fb = _against_statsmodels(30, (1.0, 0.4, 0.3))
    print(f"\nthree random effects: {a + b} interior fits compared, codes "
          f"{fa.counts()} / {fb.counts()}")
    assert a + b >= 10


def test_a_stop_away_from_a_stationary_point_is_not_called_converged(monkeypatch):
    """Planted: an optimizer that stops at once and says it converged.  The gradient
    check refuses it (fit code 2 after the restarts), for every feature."""
    design, Y = _three_random_effects(n_features=6)
    core = MixedCore(design)

    def lazy(core, st, psi0, reml=True, max_iter=0):
        F = psi0.shape[1]
        return psi0.copy(), np.zeros(F), np.zeros(F, np.int32), np.ones(F, bool)
    monkeypatch.setattr(mixed_fit, "optimize", lazy)
    fit = mixed_fit.fit_features(core, Y)
    assert np.all(fit.code == 2)


def test_restarts_rescue_fits_stopped_at_the_iteration_limit(monkeypatch):
    """With two Newton steps per start the first start stops short; the restarts (Psi = 0
    and a large Psi) run their own two steps, and what is still not converged is code 2.
    With the default limit every feature converges, and the restarts are counted in the
    iterations."""
    design, Y = _three_random_effects(n_features=12)
    core = MixedCore(design)
    short = mixed_fit.fit_features(core, Y, max_iter=2)
    assert np.any(short.code == 2)
    assert np.all(short.iterations[short.code == 2] >= 2 * (1 + len(mixed_fit.RESTARTS)))
    full = mixed_fit.fit_features(core, Y)
    assert not np.any(full.code == 2)
    assert np.all(full.dev <= short.dev + 1e-9)


def test_converged_check_accepts_the_optimum_and_refuses_a_nearby_point():
    design, Y = _three_random_effects(n_features=8)
    core = MixedCore(design)
    fit = mixed_fit.fit_features(core, Y)
    st = core.stats(Y)
    ok, _, _ = mixed_fit.converged(core, st, fit.theta)
    assert ok.all()
    moved, _, _ = mixed_fit.converged(core, st, fit.theta + 1e-2)
    assert not moved.any()
