"""The statistic-kernel contract (groupsrc/stats/kernels.py): every kernel passes it.

For each kernel factory in KERNELS on small data:
- the observed statistic, estimate and standard error equal a direct refit of every
  feature with an outside reference;
- the statistic of each rearranged data set equals a direct refit of that data set,
  rearranged as the kernel's rearrangement says (for nuisance regressors the
  Freedman-Lane data ``P R_z + H_z Y``: Freedman & Lane 1983, J Bus Econ Stat
  1:292-298; Winkler et al. 2014, NeuroImage 92:381-397);
- the arithmetic of a resample does not depend on how resamples are split
  (the project's reproducibility promise, bit for bit);
- the identity comes first and its statistic is the observed one.

A factory returns ``(kernel, refit)``: ``refit(Y_rows)`` gives the reference
statistic of data ``Y_rows`` (n, features) -- statsmodels OLS here.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from groupsrc.stats.kernels import OLSKernel, StatisticKernel


def _ols_refit(X, C):
    """statsmodels OLS t_test / f_test of contrast C at every feature (reference library)."""
    C = np.asarray(C, float)

    def refit(Y):
        out = np.empty(Y.shape[1])
        for j in range(Y.shape[1]):
            fit = sm.OLS(Y[:, j], X).fit()
            if C.ndim == 1:
                out[j] = float(np.squeeze(fit.t_test(C).tvalue))
            else:
                out[j] = float(np.squeeze(fit.f_test(C).fvalue))
        return out
    return refit


def _data(n, f, seed, shift=0.0):
    rng = np.random.default_rng(seed)
    return (rng.standard_normal((n, f)) + shift).astype(np.float32), rng


def ols_one_sample():
    Y, _ = _data(9, 6, 0, 0.4)
    X = np.ones((9, 1))
    return OLSKernel(Y, X, [1.0], scheme="sign-flip"), X, [1.0], Y


def ols_sign_flip_with_covariate():
    Y, rng = _data(10, 5, 1, 0.5)
    X = np.c_[np.ones(10), rng.standard_normal(10)]
    Y += (0.8 * X[:, 1])[:, None].astype(np.float32)
    return OLSKernel(Y, X, [1.0, 0.0], scheme="sign-flip"), X, [1.0, 0.0], Y


def ols_two_groups_with_covariate():
    Y, rng = _data(12, 5, 2)
    g = np.repeat([0.0, 1.0], 6)
    age = rng.uniform(20, 60, 12) + 8 * g                  # nuisance correlated with group
    X = np.c_[1 - g, g, age]
    Y += (0.05 * age)[:, None].astype(np.float32)
    C = [1.0, -1.0, 0.0]
    return OLSKernel(Y, X, C, scheme="permutation"), X, C, Y


def ols_three_groups_f():
    Y, _ = _data(12, 4, 3)
    lev = np.repeat([0, 1, 2], 4)
    X = np.c_[lev == 0, lev == 1, lev == 2].astype(float)
    C = np.array([[1.0, 0, -1], [0, 1, -1]])
    return OLSKernel(Y, X, C, scheme="permutation"), X, C, Y


KERNELS = {"OLS one-sample": ols_one_sample,
           "OLS sign flips + covariate (Freedman-Lane)": ols_sign_flip_with_covariate,
           "OLS two groups + covariate (Freedman-Lane)": ols_two_groups_with_covariate,
           "OLS F, three groups": ols_three_groups_f}


@pytest.fixture(params=list(KERNELS), ids=list(KERNELS))
def case(request):
    kernel, X, C, Y = KERNELS[request.param]()
    return kernel, X, C, Y.astype(np.float64)


def _rearranged(kernel, X, C, Y, row):
    """Freedman-Lane data of one rearrangement row: P R_z + H_z Y (sign flips: S R_z + H_z Y).

    Without nuisance regressors (or when the rearrangements leave their space alone)
    this is P Y, as Freedman & Lane's procedure reduces to."""
    C2 = np.atleast_2d(np.asarray(C, float))
    # nuisance space: the design restricted to C b = 0 (Winkler et al. 2014, appendix A)
    null_c = np.linalg.svd(C2 @ np.linalg.pinv(X) @ X)[2][np.linalg.matrix_rank(C2):].T \
        if C2.shape[0] < X.shape[1] else np.zeros((X.shape[1], 0))
    Z = X @ null_c if null_c.size else np.zeros((X.shape[0], 0))
    if Z.shape[1]:
        Hz = Z @ np.linalg.pinv(Z)
    else:
        Hz = np.zeros((X.shape[0], X.shape[0]))
    Rz = Y - Hz @ Y
    moved = row[:, None] * Rz if kernel.rearr.kind == "sign-flip" else Rz[row]
    return moved + Hz @ Y


def test_kernel_declares_the_contract(case):
    kernel, *_ = case
    assert isinstance(kernel, StatisticKernel)
    assert kernel.kind in ("t", "F") and isinstance(kernel.df, tuple)
    assert kernel.n_features > 0 and kernel.n_units > 0


@pytest.mark.parametrize("tails", ["two", "greater", "less"])
def test_observed_equals_a_direct_refit(case, tails):
    kernel, X, C, Y = case
    obs = kernel.observed(tails)
    np.testing.assert_allclose(obs.statistic, _ols_refit(X, C)(Y), rtol=1e-5)
    assert obs.p_uncorrected.shape == (kernel.n_features,)
    assert np.all((obs.p_uncorrected >= 0) & (obs.p_uncorrected <= 1))
    if kernel.kind == "t":
        ref = [sm.OLS(Y[:, j], X).fit().t_test(C) for j in range(Y.shape[1])]
        np.testing.assert_allclose(obs.estimate, [float(np.squeeze(r.effect)) for r in ref],
                                   rtol=1e-5)
        np.testing.assert_allclose(obs.se, [float(np.squeeze(r.sd)) for r in ref], rtol=1e-5)


def test_resampled_statistics_equal_direct_refits(case):
    kernel, X, C, Y = case
    rearr = kernel.rearrangements(24, seed=3)
    kernel.prepare(rearr)
    maps = kernel.resampled(0, rearr.n_resamples, np.empty((rearr.n_resamples,
                                                           kernel.n_features), np.float32))[0]
    refit = _ols_refit(X, C)
    for i in range(rearr.n_resamples):
        ref = refit(_rearranged(kernel, X, C, Y, rearr.matrix[i]))
        np.testing.assert_allclose(maps[i], ref, rtol=2e-4, atol=2e-4,
                                   err_msg=f"resample {i}")


def test_identity_first_and_split_independent(case):
    kernel, X, C, Y = case
    rearr = kernel.rearrangements(40, seed=9)
    kernel.prepare(rearr)
    m = rearr.n_resamples
    whole = kernel.resampled(0, m, np.empty((m, kernel.n_features), np.float32))[0].copy()
    np.testing.assert_allclose(whole[0], kernel.observed("two").statistic, rtol=1e-4)
    parts = np.vstack([kernel.resampled(a, min(m, a + 7),
                                        np.empty((min(m, a + 7) - a, kernel.n_features),
                                                 np.float32))[0].copy()
                       for a in range(0, m, 7)])
    np.testing.assert_array_equal(parts, whole)
    _, mx, mn = kernel.resampled(0, m)
    np.testing.assert_array_equal(mx, whole.max(axis=1))
    np.testing.assert_array_equal(mn, whole.min(axis=1))
    again = kernel.rearrangements(40, seed=9)
    np.testing.assert_array_equal(again.matrix, rearr.matrix)
