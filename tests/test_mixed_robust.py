"""The mixed model's variance-groups statistic (CR2 cluster-robust, whole-participant sign
flips) against outside references and a brute-force per-feature computation.

References:
* one map per participant and no participant variance: the CR2 t of a group
  difference is Welch's t and its Bell-McCaffrey df with group variances are the
  Welch-Satterthwaite df (``scipy.stats.ttest_ind(equal_var=False)``, reference library;
  the identities Bell & McCaffrey 2002 and Pustejovsky & Tipton 2018 state, from memory);
* otherwise a brute-force dense computation written here from the definitions: GLS with
  ``V_i = I + Z_i Psi Z_i'``, symmetric whitening, the whitened hat matrix, ``A_i =
  (I - H_ii)^(-1/2)``, ``V_CR2 = C (sum_i X~_i'A_i e~_i e~_i'A_i X~_i) C``, and the
  Satterthwaite df of ``V_CR2`` under a working covariance scaled per variance group
  (``2 E[v]^2 / Var[v]`` of the quadratic form, Gaussian moments: common practice).
The kernel's resampled statistics are checked against the same brute force applied to
the data of each sign-flip row (the full model's CR2-adjusted residuals, flipped, on
fitted values of the model without the tested effect).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from groupsrc.stats.models.mixed import robust
from groupsrc.stats.models.mixed.fit import fit_features
from groupsrc.stats.models.mixed.inference import z_of_f, z_of_t
from groupsrc.stats.models.mixed.kernel import MixedKernel
from groupsrc.stats.models.mixed.model import MixedCore, MixedDesign

from _mixed_data import simulate, unbalanced_design


def _sqrtm(M, power):
    w, U = np.linalg.eigh(M)
    return U @ np.diag(w ** power) @ U.T


def brute_cr2(y, X, Z, g, Psi, L, groups):
    """(estimate, CR2 t or F, Bell-McCaffrey df per row of L) by dense matrices."""
    n = len(y)
    V = np.eye(n) + Z @ Psi @ Z.T
    V[g[:, None] != g[None, :]] = 0.0
    Wh = _sqrtm(V, -0.5)
    Xt, yt = Wh @ X, Wh @ y
    C = np.linalg.inv(Xt.T @ Xt)
    beta = C @ Xt.T @ yt
    H = Xt @ C @ Xt.T
    e = yt - Xt @ beta
    N = g.max() + 1
    A = [_sqrtm(np.eye(int(np.sum(g == i))) - H[np.ix_(g == i, g == i)], -0.5)
         for i in range(N)]
    meat = sum(np.outer(u, u) for u in
               (Xt[g == i].T @ A[i] @ e[g == i] for i in range(N)))
    Vr = C @ meat @ C
    L = np.atleast_2d(L)
    est = L @ beta
    if L.shape[0] == 1:
        stat = est[0] / np.sqrt(L[0] @ Vr @ L[0])
    else:
        stat = est @ np.linalg.solve(L @ Vr @ L.T, est) / L.shape[0]
    # working covariance scaled per variance group: residual SS over residual df
    lev = np.array([np.trace(H[np.ix_(g == i, g == i)]) for i in range(N)])
    ss = np.array([e[g == i] @ e[g == i] for i in range(N)])
    sizes = np.bincount(g)
    codes = np.asarray(groups)
    pooled = ss.sum() / (sizes - lev).sum()
    om = np.array([ss[codes == codes[i]].sum() / (sizes - lev)[codes == codes[i]].sum()
                   for i in range(N)]) / pooled
    Omega = np.diag(om[g])
    # df per eigen-direction of L C L' (here: orthonormal in the whitened metric)
    LA = np.linalg.cholesky(np.linalg.inv(C))
    dirs = np.linalg.qr(np.linalg.solve(LA, L.T))[0]
    nus = []
    for j in range(dirs.shape[1]):
        l_c = np.linalg.solve(LA.T, dirs[:, j])                    # C l in beta space
        G = np.zeros((n, N))
        for i in range(N):
            Ei = np.zeros((n, int(np.sum(g == i))))
            Ei[g == i] = np.eye(int(np.sum(g == i)))
            G[:, i] = (np.eye(n) - H) @ Ei @ A[i] @ Xt[g == i] @ l_c
        M = G.T @ Omega @ G
        nus.append(np.trace(M) ** 2 / np.trace(M @ M))
    return est, stat, np.array(nus)


def _fai(nus, k):
    if k == 1:
        return nus[0]
    E = sum(v / (v - 2) for v in nus if v > 2)
    return 2 * E / (E - k) if E > k else min(nus)


def test_one_map_per_participant_is_welch():
    """6 vs 12 participants, the small group twice as variable."""
    rng = np.random.default_rng(0)
    n1, n2, F = 6, 12, 6
    grp = np.r_[np.zeros(n1), np.ones(n2)]
    X = np.c_[np.ones(n1 + n2), grp]
    Y = rng.standard_normal((n1 + n2, F)) * np.where(grp == 0, 2.0, 1.0)[:, None]
    core = MixedCore(MixedDesign(X, np.ones((n1 + n2, 1)), np.arange(n1 + n2)))
    est, se, t, nu, live = robust.robust_statistics(robust.Design(core, grp.astype(int)),
                                                    np.zeros((1, F)), Y, [0, 1.0], True)
    ref = stats.ttest_ind(Y[grp == 1], Y[grp == 0], equal_var=False)
    np.testing.assert_allclose(t, ref.statistic, rtol=1e-10)
    np.testing.assert_allclose(nu, ref.df, rtol=1e-10)
    np.testing.assert_allclose(est[0], Y[grp == 1].mean(0) - Y[grp == 0].mean(0), rtol=1e-10)
    assert live.all()


def _slope_case(F=5):
    d = unbalanced_design(14, seed=41, missing=(2,), max_sessions=3, random_slope=True)
    Y = simulate(d, F, seed=42, sd_random=(1.5, 0.8)).astype(float)
    Y *= np.where(np.asarray(d.between)[np.asarray(d.groups), 1] > 0, 2.0, 1.0)[:, None]
    return d, Y


@pytest.mark.parametrize("L", [[0, 0, 1.0, 0.5, 0, 0], [0, 1.0, 0, 0.5, 0, 0],
                               [[0, 0, 1.0, 0, 0, 0], [0, 0, 0, 1.0, 0, 0]]],
                         ids=["between t", "within t", "F"])
def test_cr2_statistic_and_df_against_brute_force(L):
    d, Y = _slope_case()
    core = MixedCore(d)
    rng = np.random.default_rng(43)
    groups = np.asarray(d.between)[:, 1].astype(int)
    # lme4's Lambda (scaled coding), entries of either sign, one column near zero
    theta = rng.normal(0.5, 0.6, (core.npar, Y.shape[1]))
    theta[2, 1] = 1e-6
    est, se, stat, nu, live = robust.robust_statistics(robust.Design(core, groups), theta, Y,
                                                       L, True)
    Psi_raw = core.psi_raw(core.psi_of(theta))
    k = np.atleast_2d(L).shape[0]
    for j in range(Y.shape[1]):
        e_ref, s_ref, nus = brute_cr2(Y[:, j], np.asarray(d.X), np.asarray(d.Z),
                                      np.asarray(d.groups), Psi_raw[:, :, j], L, groups)
        assert live[j]
        np.testing.assert_allclose(est[:, j], e_ref, rtol=1e-8)
        np.testing.assert_allclose(stat[j], s_ref, rtol=1e-7)
        np.testing.assert_allclose(nu[j], _fai(nus, k), rtol=1e-6)


@pytest.mark.parametrize("L,scheme", [([0, 0, 1.0, 0.5, 0, 0], "permutation"),
                                      ([0, 1.0, 0, 0.5, 0, 0], "sign-flip"),
                                      ([[0, 0, 1.0, 0, 0, 0], [0, 0, 0, 1.0, 0, 0]],
                                       "permutation")],
                         ids=["between t", "within t", "F"])
def test_kernel_with_variance_groups_against_brute_force(L, scheme):
    """Observed score and resampled statistics: variance groups always use sign flips, of
    the full model's CR2-adjusted residuals ``V^(1/2) (I - H_ii)^(-1/2) e~_i`` added to
    fitted values of the model without the tested effect; each is the brute-force CR2
    statistic at the null model's variance components, as z through that data set's own
    Bell-McCaffrey df, and the identity is the observed statistic."""
    d, Y = _slope_case(4)
    Y = Y.astype(np.float32)
    groups = np.asarray(d.between)[:, 1].astype(int)
    kernel = MixedKernel(fit_features(MixedCore(d), Y), Y, L, scheme=scheme,
                         variance_groups={"column": "group", "labels": groups})
    obs = kernel.observed("two")
    rearr = kernel.rearrangements(12, seed=4)
    assert rearr.kind == "sign-flip"
    kernel.prepare(rearr)
    maps = kernel.resampled(0, rearr.n_resamples,
                            np.empty((rearr.n_resamples, kernel.n_features), np.float32))[0]
    core = kernel.core
    Psi0 = core.psi_raw(core.psi_of(kernel.null_fit().theta))
    X, Z, g = np.asarray(d.X), np.asarray(d.Z), np.asarray(d.groups)
    Lm = np.atleast_2d(L)
    k = Lm.shape[0]
    Nc = np.linalg.svd(Lm)[2][k:].T
    def z(stat, nus):
        nu = _fai(nus, k)
        return z_of_t(stat, nu) if k == 1 else z_of_f(stat, k, nu)

    for j in range(Y.shape[1]):
        y = Y[:, j].astype(float)
        _, s_obs, nus = brute_cr2(y, X, Z, g, Psi0[:, :, j], L, groups)
        np.testing.assert_allclose(obs.statistic[j], z(s_obs, nus), rtol=1e-4, atol=1e-5)
        # CR2-adjusted residuals of the full model at the null model's variance components
        V = np.eye(len(g)) + Z @ Psi0[:, :, j] @ Z.T
        V[g[:, None] != g[None, :]] = 0.0
        half, ihalf = _sqrtm(V, 0.5), _sqrtm(V, -0.5)
        Xw, yw = ihalf @ X, ihalf @ y
        H = Xw @ np.linalg.solve(Xw.T @ Xw, Xw.T)
        ew = yw - H @ yw
        for i in np.unique(g):
            blk = np.ix_(g == i, g == i)
            ew[g == i] = _sqrtm(np.eye(int(np.sum(g == i))) - H[blk], -0.5) @ ew[g == i]
        radj = half @ ew
        Xz = X @ Nc
        bz = np.linalg.lstsq(Xz, y, rcond=None)[0]            # any null-model fitted values
        for r in range(1, rearr.n_resamples):
            ystar = Xz @ bz + rearr.matrix[r][g] * radj
            _, s_r, nus_r = brute_cr2(ystar, X, Z, g, Psi0[:, :, j], L, groups)
            np.testing.assert_allclose(maps[r, j], z(s_r, nus_r), rtol=2e-4, atol=2e-4,
                                       err_msg=f"resample {r}, feature {j}")
    np.testing.assert_allclose(maps[0], obs.statistic, rtol=1e-6)
    assert kernel.describe()["variance_groups"]["column"] == "group"
