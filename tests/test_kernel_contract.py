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

A factory returns ``(kernel, X, C, Y)``; :func:`_reference` gives the outside
reference for that kind of kernel -- statsmodels OLS for the OLS kernel,
statsmodels MixedLM for the mixed-model kernel (``X`` is then its
``MixedDesign``).  The mixed kernel scores every data set, the observed one
included, with the variance components held at the estimates of the model
restricted to L b = 0 (groupsrc/stats/mixed_kernel.py): those estimates are
checked against a free MixedLM fit of the restricted model, and the observed
and rearranged data sets are refitted by MixedLM with the covariance of the
random effects held at them (``free``); the estimate and its standard error
are those of a free MixedLM fit of the full model.  The statistic is the z of
equal p: the reference t is converted with scipy (t and normal tails) at the
kernel's Satterthwaite df (those df are checked in test_mixed_satterthwaite).
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from groupsrc.stats.models import ols as kernels
from groupsrc.stats.models.mixed import kernel as mixed_kernel
from groupsrc.stats.models.ols import OLSKernel, StatisticKernel
from groupsrc.stats.models.mixed.model import MixedCore
from groupsrc.stats.models.mixed.fit import fit_features
from groupsrc.stats.models.mixed.kernel import MixedKernel
from groupsrc.stats.models.groupvar import GroupVarianceKernel

from _mixed_data import simulate, statsmodels_reml, unbalanced_design


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


def ols_three_groups_f_with_covariate():
    """An F over the group means with an age covariate: Freedman-Lane, the basis of
    the products (effect and nuisance) wider than the F's numerator."""
    Y, rng = _data(15, 4, 4)
    lev = np.repeat([0, 1, 2], 5)
    age = rng.uniform(20, 60, 15) + 6 * lev
    X = np.c_[lev == 0, lev == 1, lev == 2, age].astype(float)
    Y += (0.04 * age)[:, None].astype(np.float32)
    C = np.array([[1.0, 0, -1, 0], [0, 1, -1, 0]])
    return OLSKernel(Y, X, C, scheme="permutation"), X, C, Y


def _mixed(design, L, scheme, seed):
    # strong participant variance: interior fits (statsmodels' fixed-covariance
    # refit is unreliable at an exactly zero variance)
    Y = simulate(design, 5, seed=seed, sd_random=(2.0, 1.2), effect=None)
    fit = fit_features(MixedCore(design), Y)
    assert np.all(fit.code == 0)
    return MixedKernel(fit, Y, L, scheme=scheme), design, L, Y


def mixed_within_sign_flips():
    """Random intercept; a condition effect: whole-participant sign flips."""
    design = unbalanced_design(10, seed=21, missing=(3,))
    return _mixed(design, np.array([0, 1.0, 0, 0.5, 0, 0]), "sign-flip", 22)


def mixed_between_permutations():
    """Random intercept + a map covariate; a group effect: whole-participant
    permutations within map layouts."""
    design = unbalanced_design(12, seed=23, missing=(), max_sessions=2, map_covariate=True)
    return _mixed(design, np.array([0, 0, 1.0, 0.5, 0, 0, 0]), "permutation", 24)


def mixed_between_continuous_map_covariate():
    """Random intercept + a continuous map covariate (trials per map, every map its own
    value) and a participant without condition 1: permutation blocks are the
    participants with the same number of maps (the same covariance), not the same
    covariate values, so the design's map rows move with the participants."""
    d = unbalanced_design(12, seed=29, missing=(4,), max_sessions=2, map_covariate=True)
    rng = np.random.default_rng(30)
    X = np.asarray(d.X).copy()
    X[:, -1] = rng.uniform(20, 60, X.shape[0])
    design = type(d)(X, d.Z, d.groups, between=d.between, within=d.within,
                     map_cols=X[:, -1:], layout=d.layout)
    return _mixed(design, np.array([0, 0, 1.0, 0.5, 0, 0, 0]), "permutation", 31)


def mixed_slopes_three_groups_f():
    """Random intercept + condition slope; three groups: F, permutations."""
    design = unbalanced_design(12, seed=26, missing=(), max_sessions=2, random_slope=True,
                               groups=3)
    L = np.zeros((2, design.X.shape[1]))
    L[0, 2], L[1, 4] = 1.0, 1.0
    return _mixed(design, L, "permutation", 26)


def mixed_every_fixed_effect_f():
    """Random intercept; an F over every fixed effect (the null model has none):
    whole-participant sign flips of the raw data."""
    design = unbalanced_design(10, seed=27, missing=(2,), groups=1)
    return _mixed(design, np.eye(design.X.shape[1]), "sign-flip", 28)


def _vg_data(sizes, sds, f, seed):
    rng = np.random.default_rng(seed)
    g = np.repeat(np.arange(len(sizes)), sizes)
    Y = (rng.standard_normal((g.size, f)) * np.asarray(sds)[g][:, None]).astype(np.float32)
    return g, Y, rng


def vg_two_groups():
    """Welch's v: 6 vs 11 participants, the small group twice as variable."""
    g, Y, _ = _vg_data([6, 11], [2.0, 1.0], 6, 40)
    X = np.c_[g == 0, g == 1].astype(float)
    C = [1.0, -1.0]
    return GroupVarianceKernel(Y, X, C, g), X, (C, g), Y


def vg_two_groups_with_covariate():
    g, Y, rng = _vg_data([7, 12], [1.0, 2.5], 5, 41)
    age = rng.uniform(20, 60, g.size) + 6 * g
    X = np.c_[np.ones(g.size), g, age]
    Y += (0.04 * age)[:, None].astype(np.float32)
    C = [0.0, 1.0, 0.0]
    return GroupVarianceKernel(Y, X, C, g), X, (C, g), Y


def vg_within_mean_of_groups():
    """A within-participant effect averaged over unequal groups (Freedman-Lane flips)."""
    g, Y, _ = _vg_data([5, 10], [2.0, 1.0], 5, 42)
    Y += 0.4
    X = np.c_[np.ones(g.size), g]
    C = [1.0, 0.5]
    return GroupVarianceKernel(Y, X, C, g), X, (C, g), Y


def vg_three_groups_g():
    g, Y, _ = _vg_data([4, 6, 8], [1.0, 2.0, 0.6], 4, 43)
    X = (g[:, None] == np.arange(3)[None]).astype(float)
    C = np.array([[1.0, 0, -1], [0, 1, -1]])
    return GroupVarianceKernel(Y, X, C, g), X, (C, g), Y


KERNELS = {"OLS one-sample": ols_one_sample,
           "OLS sign flips + covariate (Freedman-Lane)": ols_sign_flip_with_covariate,
           "OLS two groups + covariate (Freedman-Lane)": ols_two_groups_with_covariate,
           "OLS F, three groups": ols_three_groups_f,
           "OLS F, three groups + covariate (Freedman-Lane)": ols_three_groups_f_with_covariate,
           "mixed, within effect, sign flips": mixed_within_sign_flips,
           "mixed, between effect + map covariate, permutations": mixed_between_permutations,
           "mixed, between effect, continuous map covariate, permutations":
               mixed_between_continuous_map_covariate,
           "mixed, random slope, F, permutations": mixed_slopes_three_groups_f,
           "mixed, F over every fixed effect, sign flips": mixed_every_fixed_effect_f,
           "variance groups, Welch v": vg_two_groups,
           "variance groups, v + covariate (Freedman-Lane)": vg_two_groups_with_covariate,
           "variance groups, within effect": vg_within_mean_of_groups,
           "variance groups, G, three groups": vg_three_groups_g}


class _OlsReference:
    def __init__(self, kernel, X, C):
        self.kernel, self.X, self.C = kernel, X, C

    def observed(self, Y):
        """(statistic, estimate, se) per feature by statsmodels OLS."""
        ref = [sm.OLS(Y[:, j], self.X).fit().t_test(self.C) for j in range(Y.shape[1])]
        est = [float(np.squeeze(r.effect)) for r in ref] if np.ndim(self.C) == 1 else None
        se = [float(np.squeeze(r.sd)) for r in ref] if np.ndim(self.C) == 1 else None
        return _ols_refit(self.X, self.C)(Y), est, se

    def resampled(self, Y, row):
        return _ols_refit(self.X, self.C)(_rearranged(self.kernel, self.X, self.C, Y, row))


class _MixedReference:
    """statsmodels MixedLM (REML) refits; z of equal p at the kernel's df (scipy)."""

    def __init__(self, kernel, design, L):
        self.kernel, self.d, self.L = kernel, design, np.atleast_2d(L)
        core = kernel.core
        self.Psi = core.psi_raw(core.psi_of(kernel.null_fit().theta))   # relative, raw Z

    def _z(self, res, j):
        from scipy import stats
        nu = self.kernel._nu[j]
        if self.L.shape[0] == 1:
            t = float(np.squeeze(res.t_test(self.L).tvalue))
            return float(np.sign(t) * stats.norm.isf(stats.t.sf(abs(t), nu))), t
        # statsmodels' f_test takes weights over every parameter (fixed, then variance)
        pad = np.zeros((self.L.shape[0], len(res.params) - self.L.shape[1]))
        Fv = float(np.squeeze(res.f_test(np.hstack([self.L, pad])).fvalue))
        return float(stats.norm.isf(stats.f.sf(Fv, self.L.shape[0], nu))), Fv

    def _sorted_maps(self, i):
        """Participant i's maps sorted by their random-effect, within and map-covariate
        rows (then table order): equal covariance rows are matched when participants
        trade places."""
        d = self.d
        idx = np.flatnonzero(np.asarray(d.groups) == i)
        cols = [np.asarray(d.Z), np.asarray(d.within)] + (
            [np.asarray(d.map_cols)] if d.map_cols is not None else [])
        rows = np.round(np.hstack(cols)[idx], 10)
        return idx[sorted(range(idx.size), key=lambda k: (tuple(rows[k]), idx[k]))]

    def _fixed(self, y, j):
        from statsmodels.regression.mixed_linear_model import MixedLM, MixedLMParams
        d = self.d
        q = d.Z.shape[1]
        free = MixedLMParams.from_components(np.ones(d.X.shape[1]), np.zeros((q, q)))
        start = MixedLMParams.from_components(np.zeros(d.X.shape[1]), self.Psi[:, :, j])
        return MixedLM(y, d.X, d.groups, exog_re=d.Z).fit(reml=True, free=free,
                                                            start_params=start, method=["bfgs"])

    _cache = {}

    def observed(self, Y):
        key = (Y.tobytes(), self.L.tobytes())
        if key not in self._cache:
            self._cache[key] = self._observed(Y)
        return self._cache[key]

    def _observed(self, Y):
        if self.kernel._nu is None:
            self.kernel.observed("two")
        z, est, se = [], [], []
        for j in range(Y.shape[1]):
            _, fixed = statsmodels_reml(Y[:, j], self.d)
            z.append(self._z(self._fixed(Y[:, j].astype(float), j), j)[0])
            if self.L.shape[0] == 1:
                est.append(float(self.L[0] @ np.asarray(fixed.fe_params)))
                se.append(float(np.sqrt(self.L[0] @ fixed.cov_params()[:len(self.L[0]),
                                                                         :len(self.L[0])]
                                        @ self.L[0])))
        return np.array(z), (est or None), (se or None)

    def resampled(self, Y, row):
        """Freedman-Lane data in the model's metric (GLS fit under L b = 0 with the
        kernel's covariance), rearranged by whole participants, refitted.  Sign flips
        move leverage-adjusted residuals: participant i's whitened restricted residual
        times (I - H0_ii)^(-1/2), H0 the whitened hat matrix of the restricted model
        (the HC2 / CR2 residual of the wild bootstrap; Davidson & Flachaire 2008,
        J Econometrics 146:162-169, cited from memory), written here with dense
        matrix square roots; the identity is the observed statistic itself."""
        d, L = self.d, self.L
        X, Z, g = np.asarray(d.X), np.asarray(d.Z), np.asarray(d.groups)
        Nc = np.linalg.svd(L)[2][np.linalg.matrix_rank(L):].T
        flips = self.kernel.rearr.kind == "sign-flip"
        if flips and Nc.shape[1] and np.all(row == 1):
            return self.observed(Y)[0]
        out = []
        for j in range(Y.shape[1]):
            V = np.eye(len(g)) + Z @ self.Psi[:, :, j] @ Z.T
            V[g[:, None] != g[None, :]] = 0.0
            Vi = np.linalg.inv(V)
            Xz = X @ Nc
            bz = np.linalg.solve(Xz.T @ Vi @ Xz, Xz.T @ Vi @ Y[:, j])
            rz = Y[:, j] - Xz @ bz
            ystar = Xz @ bz
            if flips and Nc.shape[1]:
                w, E = np.linalg.eigh(V)
                half = E @ np.diag(np.sqrt(w)) @ E.T                 # V^(1/2)
                ihalf = E @ np.diag(1 / np.sqrt(w)) @ E.T            # V^(-1/2)
                Xw = ihalf @ Xz
                H0 = Xw @ np.linalg.solve(Xw.T @ Xw, Xw.T)
                rw = ihalf @ rz
                for i in np.unique(g):
                    blk = np.ix_(g == i, g == i)
                    lam, U = np.linalg.eigh(np.eye(int(np.sum(g == i))) - H0[blk])
                    rw[g == i] = U @ np.diag(np.clip(lam, 1e-3, None) ** -0.5) @ U.T \
                        @ rw[g == i]
                rz = half @ rw
            if flips:
                ystar = ystar + row[g] * rz
            else:                       # slot i takes participant row[i]'s maps, matched
                for i in range(len(row)):
                    ystar[self._sorted_maps(i)] += rz[self._sorted_maps(row[i])]
            out.append(self._z(self._fixed(ystar, j), j)[0])
        return np.array(out)


class _GroupReference:
    """statsmodels WLS with the weights w_g = tr_g / e_g'e_g of the OLS residuals held
    fixed (``cov_type="fixed scale"``), the df of Winkler et al. 2014 (NeuroImage
    92:381-397; formula from memory, checked against scipy's Welch t and statsmodels'
    Welch ANOVA in tests/test_groupvar.py), the z of equal p by scipy's t / F and
    normal tails.  The kernel's z uses Hill's transformation inside |z| < 3 (accurate
    to 1.3e-4), hence the absolute tolerance."""

    atol = 2e-4

    def __init__(self, kernel, X, C):
        self.kernel, self.X = kernel, X
        self.C, self.g = C

    def _one(self, y):
        from scipy import stats
        X, g = self.X, self.g
        ols = sm.OLS(y, X).fit()
        h = ols.get_influence().hat_matrix_diag
        labels = np.unique(g)
        tr = np.array([(1 - h[g == k]).sum() for k in labels])
        wg = np.array([tr[i] / (ols.resid[g == k] ** 2).sum() for i, k in enumerate(labels)])
        wls = sm.WLS(y, X, weights=wg[np.searchsorted(labels, g)]).fit(
            cov_type="fixed scale", cov_kwds={"scale": 1.0})
        nk = np.array([(g == k).sum() for k in labels])
        Ys = ((1 - nk * wg / (nk * wg).sum()) ** 2 / tr).sum()
        C = np.atleast_2d(self.C)
        s = C.shape[0]
        nu = s * (s + 2) / (3 * Ys)
        if s == 1:
            tt = wls.t_test(C)
            v = float(np.squeeze(tt.tvalue))
            z = np.sign(v) * stats.norm.isf(stats.t.sf(abs(v), nu))
            return z, float(np.squeeze(tt.effect)), float(np.squeeze(tt.sd))
        G = float(np.squeeze(wls.f_test(C).fvalue)) / (1 + 2 * (s - 1) * Ys / (s * (s + 2)))
        return stats.norm.isf(stats.f.sf(G, s, nu)), None, None

    def observed(self, Y):
        out = [self._one(Y[:, j]) for j in range(Y.shape[1])]
        z = np.array([o[0] for o in out])
        if np.ndim(self.C) == 1:
            return z, [o[1] for o in out], [o[2] for o in out]
        return z, None, None

    def resampled(self, Y, row):
        """Freedman-Lane in the statistic's metric: the model restricted to C b = 0 fitted
        by statsmodels WLS with the observed data's group weights, its residuals flipped
        (groupsrc/stats/models/groupvar.py, weighted_residuals)."""
        C2 = np.atleast_2d(np.asarray(self.C, float))
        null_c = np.linalg.svd(C2)[2][np.linalg.matrix_rank(C2):].T
        Z = self.X @ null_c
        out = np.empty_like(Y)
        for j in range(Y.shape[1]):
            y = Y[:, j]
            ols = sm.OLS(y, self.X).fit()
            h = ols.get_influence().hat_matrix_diag
            labels = np.unique(self.g)
            w = np.empty(len(y))
            for k in labels:
                sel = self.g == k
                w[sel] = (1 - h[sel]).sum() / (ols.resid[sel] ** 2).sum()
            fitted = sm.WLS(y, Z, weights=w).fit().fittedvalues if Z.shape[1] else 0 * y
            out[:, j] = fitted + row * (y - fitted)
        return self.observed(out)[0]


def _reference(kernel, X, C):
    """The outside reference for this kind of kernel."""
    if isinstance(kernel, GroupVarianceKernel):
        return _GroupReference(kernel, X, C)
    if isinstance(kernel, MixedKernel):
        return _MixedReference(kernel, X, C)
    return _OlsReference(kernel, X, C)


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
    ref = _reference(kernel, X, C)
    stat, est, se = ref.observed(Y)
    np.testing.assert_allclose(obs.statistic, stat, rtol=1e-5, atol=getattr(ref, "atol", 0))
    assert obs.p_uncorrected.shape == (kernel.n_features,)
    assert np.all((obs.p_uncorrected >= 0) & (obs.p_uncorrected <= 1))
    if kernel.kind == "t":
        np.testing.assert_allclose(obs.estimate, est, rtol=1e-5)
        np.testing.assert_allclose(obs.se, se, rtol=1e-4)


MIXED = [name for name in KERNELS if name.startswith("mixed")]


@pytest.mark.parametrize("name", MIXED)
def test_mixed_null_model_variance_matches_statsmodels(name):
    """The restricted model's variance components (relative to the residual variance)
    against a free statsmodels MixedLM REML fit of X N, N a basis of {b : L b = 0}
    (reference library; rtol 1e-3 as for the full model in test_mixed_core)."""
    kernel, d, L, Y = KERNELS[name]()
    from types import SimpleNamespace
    L = np.atleast_2d(L)
    Nc = np.linalg.svd(L)[2][np.linalg.matrix_rank(L):].T
    Psi = _MixedReference(kernel, d, L).Psi
    d0 = SimpleNamespace(X=np.asarray(d.X) @ Nc, Z=d.Z, groups=d.groups)
    for j in range(Y.shape[1]):
        best, _ = statsmodels_reml(Y[:, j], d0)
        np.testing.assert_allclose(Psi[:, :, j], np.asarray(best.cov_re) / best.scale,
                                   rtol=1e-3, atol=1e-6)


def test_resampled_statistics_equal_direct_refits(case):
    kernel, X, C, Y = case
    rearr = kernel.rearrangements(24, seed=3)
    kernel.prepare(rearr)
    maps = kernel.resampled(0, rearr.n_resamples, np.empty((rearr.n_resamples,
                                                           kernel.n_features), np.float32))[0]
    reference = _reference(kernel, X, C)
    step = 1 if isinstance(kernel, OLSKernel) else 4      # MixedLM refits are slow
    for i in range(0, rearr.n_resamples, step):
        ref = reference.resampled(Y, rearr.matrix[i])
        np.testing.assert_allclose(maps[i], ref, rtol=2e-4,
                                   atol=max(2e-4, getattr(reference, "atol", 0)),
                                   err_msg=f"resample {i}")


def test_feature_parts_assemble_the_whole(case, monkeypatch):
    # part = (j, J): J threads share one batch's products; the parts must tile the
    # features and give the whole call's values bit for bit (kernels contract)
    kernel, X, C, Y = case
    fc = max(1, kernel.n_features // 4)                   # four chunks or more
    monkeypatch.setattr(kernels, "FEATURE_CHUNK", fc)
    monkeypatch.setattr(mixed_kernel, "FEATURE_CHUNK", fc)
    rearr = kernel.rearrangements(20, seed=5)
    kernel.prepare(rearr)
    assert kernel.fc == fc and -(-kernel.n_features // fc) >= 4
    m, F = rearr.n_resamples, kernel.n_features
    whole = kernel.resampled(0, m, np.empty((m, F), np.float32))[0].copy()
    _, mx, mn = kernel.resampled(0, m)
    for J in (2, 3):
        out = np.full((m, F), np.nan, np.float32)
        maxima, minima = [], []
        for j in range(J):
            kernel.resampled(0, m, out, part=(j, J))
            _, a, b = kernel.resampled(0, m, part=(j, J))
            maxima.append(a)
            minima.append(b)
        np.testing.assert_array_equal(out, whole)
        np.testing.assert_array_equal(np.max(maxima, axis=0), mx)
        np.testing.assert_array_equal(np.min(minima, axis=0), mn)


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
