"""Freedman-Lane resampling against a brute-force refit with statsmodels.

Freedman & Lane (1983, J Bus Econ Stat 1:292-298), in the form of Winkler et
al. (2014, NeuroImage 92:381-397, Table 2 and eq. 8): fit the reduced model
``Y = Z g + e`` (the nuisance regressors alone), rearrange its residuals and
add its fitted values back, ``Y* = P R_z + H_z Y``, refit the full model to
``Y*`` and take the contrast's statistic.  The reference below does exactly
that, literally, for every rearrangement: residuals and fitted values from a
statsmodels OLS fit on ``Z``, then a statsmodels OLS refit of the full model
and its ``t_test``.  Every rearrangement is enumerated here with itertools
(the engine enumerates its own; both are exact), so the whole null of
maximum |t| over features and the FWER-corrected p, ``p = #(max >= obs) /
m`` with the identity among the ``m`` rearrangements (Phipson & Smyth 2010,
Stat Appl Genet Mol Biol 9:39), must agree.

The nuisance design ``Z`` is written down by hand from the contrast (the
regressors left when the tested effect is removed), not taken from groupsrc.
"""

import itertools

import numpy as np
import statsmodels.api as sm
from scipy import sparse

from groupsrc.stats.inference import run_inference


def _refit_max_t(Ystar, X, c):
    """max |t| over features of the full-model contrast (statsmodels OLS)."""
    return max(abs(float(sm.OLS(Ystar[:, j], X).fit().t_test(c).tvalue[0, 0]))
               for j in range(Ystar.shape[1]))


def _freedman_lane_null(Y, X, Z, c, rearranged):
    """Brute-force Freedman-Lane null: one max |t| per rearrangement.

    ``rearranged(R)`` yields ``P R`` for every rearrangement ``P``.
    """
    fits = [sm.OLS(Y[:, j], Z).fit() for j in range(Y.shape[1])]   # reduced model
    R = np.column_stack([f.resid for f in fits])                    # R_z
    H = np.column_stack([f.fittedvalues for f in fits])             # H_z Y
    return np.array([_refit_max_t(PR + H, X, c) for PR in rearranged(R)])


def _fwer_p(null, observed):
    """Share of null maxima reaching each observed |t| (identity included,
    Phipson & Smyth 2010); a relative 1e-6 absorbs float32 rounding."""
    return np.array([np.mean(null >= o * (1 - 1e-6)) for o in observed])


def _as_engine_input(Y):
    """(n, features) -> (n, features, 1) float32, and the float64 values used."""
    Y32 = Y.astype(np.float32)
    return Y32[:, :, None], Y32.astype(np.float64)


def test_permutation_with_covariate_correlated_with_group():
    # Two groups of 3 with an age covariate that differs between groups and
    # drives the data strongly; no group effect.  Ages are all different, so
    # all 6! = 720 orders are distinct relabellings (common practice,
    # combinatorics) and the engine enumerates them (exact test).
    rng = np.random.default_rng(21)
    n = 6
    g = np.array([0, 0, 0, 1, 1, 1], float)
    age = np.array([22.0, 31.0, 38.0, 47.0, 55.0, 66.0])
    X = np.c_[1 - g, g, age]
    c = np.array([1.0, -1.0, 0.0])
    Z = np.c_[np.ones(n), age]                    # reduced model: intercept + age
    Yin, Y = _as_engine_input(0.2 * age[:, None] + rng.standard_normal((n, 3)))
    r = run_inference(Yin, X, c, sparse.csr_matrix((3, 3)), scheme="permutation",
                      correction="max-stat", n_resamples=1000, seed=0)
    assert r.exact and r.n_resamples == 720 and r.resampling.freedman_lane

    def orders(R):
        for perm in itertools.permutations(range(n)):
            yield R[list(perm)]

    null = _freedman_lane_null(Y, X, Z, c, orders)
    np.testing.assert_allclose(np.sort(r.null.max_stat), np.sort(null), rtol=2e-5)
    t_obs = [float(sm.OLS(Y[:, j], X).fit().t_test(c).tvalue[0, 0]) for j in range(3)]
    np.testing.assert_allclose(r.statistic[:, 0], t_obs, rtol=1e-5)
    np.testing.assert_allclose(r.p_corrected[:, 0], _fwer_p(null, np.abs(t_obs)))


def test_sign_flip_with_covariate():
    # One-sample mean with a covariate (X = [1, cov], contrast on the
    # intercept): the reduced model is the covariate alone, through the
    # origin.  All 2^8 = 256 sign vectors (common practice, combinatorics).
    rng = np.random.default_rng(22)
    n = 8
    cov = np.array([-1.6, -1.1, -0.7, -0.2, 0.3, 0.9, 1.4, 2.2])
    X = np.c_[np.ones(n), cov]
    c = np.array([1.0, 0.0])
    Z = cov[:, None]
    Yin, Y = _as_engine_input(0.3 + 1.5 * cov[:, None] + rng.standard_normal((n, 3)))
    r = run_inference(Yin, X, c, sparse.csr_matrix((3, 3)), scheme="sign-flip",
                      correction="max-stat", n_resamples=1000, seed=0)
    assert r.exact and r.n_resamples == 256 and r.resampling.freedman_lane

    def flips(R):
        for s in itertools.product([1.0, -1.0], repeat=n):
            yield np.array(s)[:, None] * R

    null = _freedman_lane_null(Y, X, Z, c, flips)
    np.testing.assert_allclose(np.sort(r.null.max_stat), np.sort(null), rtol=2e-5)
    t_obs = [float(sm.OLS(Y[:, j], X).fit().t_test(c).tvalue[0, 0]) for j in range(3)]
    np.testing.assert_allclose(r.p_corrected[:, 0], _fwer_p(null, np.abs(t_obs)))
