"""Inference per feature from a fitted mixed model: variance components, contrasts.

Contrasts (:func:`contrast_statistics`)
----------------------------------------
``estimate = L beta_hat``, ``Var = sigma_hat^2 L C L'``; t (one row) or
Wald F (k rows).  Denominator degrees of freedom by Satterthwaite (1946,
Biometrics Bulletin 2:110-114) as lmerTest computes them (Kuznetsova et al.
2017, J Stat Softw 82(13)): ``nu = 2 Phi^2 / (gamma' A gamma)`` with ``Phi``
the contrast variance, ``gamma`` its gradient in the variance parameters
``(psi, sigma^2)`` and ``A = 2 H^{-1}`` from the Hessian ``H`` of the
(non-profiled) -2 log-likelihood.  With a random intercept only, the variance is
estimated unconstrained (:mod:`.model`), so the df move smoothly through a
participant variance of zero instead of jumping to the residual df ``n - p`` of a
fit held at zero.  With random slopes (lme4's parameterization) the directions of
``Psi`` that sit on the boundary drop out (pseudo-inverse), as in lmerTest, and the
df of a boundary fit are floored: at most the participant-stratum ("containment")
df, ``N`` minus the rank of the participant-level columns (:func:`containment_df`).  For F, the
method of Fai & Cornelius (1996, J Stat Comput Simul 54:363-378) as lmerTest
applies it: one Satterthwaite df per eigen-direction ``nu_j`` of ``L C L'``,
``E = sum_{nu_j > 2} nu_j / (nu_j - 2)``, ``nu = 2 E / (E - k)`` (the
smallest ``nu_j`` when ``E <= k``).

Clusters need one scale for every feature, but every feature has its own
df, so the statistic used for thresholds, cluster masses, TFCE and the
maximum is the *z of equal p*: ``z = Phi^{-1}(1 - p)`` for the one-sided p of
the t (with the sign of t) or the upper-tail p of F.  For t it is computed
exactly where |z| >= 3 and by Hill's transformation below (``scored_z``);
the observed map and every resampled map use the same function.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special, stats

from . import linalg as la
from .fit import FIT_CHUNK, MixedFit


def variance_components(fit: MixedFit, Y, chunk=FIT_CHUNK) -> dict:
    """Per feature: residual SD, random-effect SDs and correlations (in the coding
    of the given Z) and the intraclass correlation at the average map.

    ICC = zbar' D zbar / (zbar' D zbar + sigma^2), ``zbar`` the mean random-effect
    row over maps: the share of a map's variance that lies between participants
    (with a random intercept only, the usual intraclass correlation)."""
    core = fit.core
    q, F = core.q, fit.n_features
    zbar = np.asarray(core.design.Z, float).mean(axis=0)
    out = {"sd_residual": np.zeros(F), "icc": np.zeros(F),
           "sd": np.zeros((q, F)), "corr": {}}
    for a in range(0, F, chunk):
        b = min(F, a + chunk)
        st = core.stats(Y[:, a:b])
        ev = core.evaluate(fit.theta[:, a:b], st, fit.reml, order=0)
        s2 = np.maximum(ev.r2, 0.0) / core.m(fit.reml)
        D = core.psi_raw(ev.Psi) * s2
        out["sd_residual"][a:b] = np.sqrt(s2)
        for j in range(q):
            out["sd"][j, a:b] = np.sqrt(np.maximum(D[j, j], 0.0))
        for j in range(q):
            for k in range(j + 1, q):
                den = np.sqrt(np.maximum(D[j, j] * D[k, k], 0.0))
                r = np.where(den > 0, D[j, k] / np.where(den > 0, den, 1.0), 0.0)
                out["corr"].setdefault((j, k), np.zeros(F))[a:b] = r
        between = np.einsum("i,ijf,j->f", zbar, D, zbar)
        tot = between + s2
        out["icc"][a:b] = np.where(tot > 0, between / np.where(tot > 0, tot, 1.0), 0.0)
    bad = fit.code == 3
    for key in ("sd_residual", "icc"):
        out[key][bad] = 0.0
    out["sd"][:, bad] = 0.0
    return out


#: below this |z| the z of a t comes from Hill's transformation, above it from the tail
Z_SWITCH = 3.0
#: below these df the exact z is used at every |t| (Hill's accuracy is checked from 4 df;
#: it is undefined below 1/2, which Satterthwaite df can reach near a boundary fit)
HILL_MIN_DF = 4.0


def hill_z(t, nu):
    """Normal deviate of a t with nu df by the normalizing transformation of Hill (1970,
    Commun ACM 13:617-619, Algorithm 395; from memory, its accuracy checked against
    scipy in tests/test_mixed_satterthwaite.py).  Only scipy.special and IEEE
    arithmetic: the same bits for an element whatever the array it sits in."""
    a = nu - 0.5
    b = 48.0 * a * a
    z2 = a * special.log1p(t * t / nu)
    z = np.sqrt(z2)
    return np.sign(t) * (((((-0.4 * z2 - 3.3) * z2 - 24.0) * z2 - 85.5)
                          / (0.8 * z2 * z2 + 100.0 + b) + z2 + 3.0) / b + 1.0) * z


def t_switch(nu):
    """Per feature, the |t| whose exact z is ``Z_SWITCH`` (scipy.special.stdtrit)."""
    return special.stdtrit(nu, special.ndtr(Z_SWITCH))


def scored_z(t, nu, switch):
    """The z used for maps and scores: exact (``z_of_t``) where |t| >= ``switch``
    (|z| >= 3), Hill's transformation below (within 1.3e-4 of the exact z for nu >= 4,
    5e-7 for nu >= 8).  The incomplete beta of the exact tail costs ~0.5 us per value,
    and almost every value of a resampled map is small."""
    t = np.asarray(t, float)
    shape = t.shape
    t = t.reshape(-1)
    nu = np.broadcast_to(nu, shape).reshape(-1)
    switch = np.broadcast_to(switch, shape).reshape(-1)
    with np.errstate(invalid="ignore"):          # nu < 1/2: replaced just below
        z = hill_z(t, nu)
    big = np.flatnonzero((np.abs(t) >= switch) | (nu < HILL_MIN_DF))
    if big.size:
        z[big] = z_of_t(t[big], nu[big])
    return z.reshape(shape)


def z_fast(t, nu):
    """:func:`scored_z` for df that change with every value (a resample's own df): Hill's
    transformation, the exact tail where its value is beyond ``Z_SWITCH - 0.1`` (Hill is
    within 1.3e-4 there, so every |z| >= 3 is exact) or the df are below ``HILL_MIN_DF``."""
    t = np.asarray(t, float)
    shape = t.shape
    t = t.reshape(-1)
    nu = np.broadcast_to(nu, shape).reshape(-1)
    with np.errstate(invalid="ignore"):
        z = hill_z(t, nu)
    big = np.flatnonzero(~(np.abs(z) < Z_SWITCH - 0.1) | (nu < HILL_MIN_DF))
    if big.size:
        z[big] = z_of_t(t[big], nu[big])
    return z.reshape(shape)


def z_of_t(t, nu):
    """z with the same one-sided tail probability as t with nu df (sign of t)."""
    t = np.asarray(t, float)
    lo = special.stdtr(nu, -np.abs(t))
    z = -special.ndtri(lo)
    tiny = lo < 1e-290
    if np.any(tiny):
        idx = np.nonzero(tiny)
        nu_b = np.broadcast_to(nu, t.shape)
        z[idx] = -special.ndtri_exp(stats.t.logsf(np.abs(t[idx]), nu_b[idx]))
    return np.sign(t) * z


def z_of_f(Fv, k, nu):
    """z with the same upper-tail probability as F with (k, nu) df."""
    Fv = np.asarray(Fv, float)
    up = special.fdtrc(k, nu, np.maximum(Fv, 0.0))
    z = -special.ndtri(up)
    tiny = up < 1e-290
    if np.any(tiny):
        idx = np.nonzero(tiny)
        nu_b = np.broadcast_to(nu, Fv.shape)
        z[idx] = -special.ndtri_exp(stats.f.logsf(Fv[idx], k, nu_b[idx]))
    return z


@dataclass
class ContrastStats:
    """Observed per-feature inference of one contrast (float64, flat features)."""

    estimate: np.ndarray       # (F,) NaN for F contrasts
    se: np.ndarray
    statistic: np.ndarray      # t or F
    df: np.ndarray             # Satterthwaite denominator df
    z: np.ndarray              # z of equal p
    p: np.ndarray              # parametric p for the requested tails
    std_effect: np.ndarray
    k: int


def _full_hessian(ev, core, reml):
    """-2 log-lik Hessian in (psi, sigma^2), non-profiled, at sigma^2 = r2 / m."""
    m = core.m(reml)
    r2 = np.where(ev.ok, ev.r2, 1.0)
    s2 = r2 / m
    npar = core.npar
    F = r2.shape[0]
    s = ev.parts["s"]
    H = np.empty((npar + 1, npar + 1, F))
    for k in range(npar):
        for l in range(npar):
            H[k, l] = ev.hess[k, l] + (m / r2 ** 2) * s[k] * s[l]
        H[k, npar] = H[npar, k] = s[k] / s2 ** 2
    H[npar, npar] = m / s2 ** 2
    return H, s2


def _satterthwaite(H, gamma, phi):
    """phi^2 / (gamma' H^{-1} gamma) per feature (pseudo-inverse where H is singular)."""
    L, ok = la.chol(H)
    x = la.chol_solve(L, gamma)
    if not ok.all():
        bad = np.flatnonzero(~ok)
        x[:, bad] = la.sym_pinv_solve(H[:, :, bad], gamma[:, bad])
    den = (gamma * x).sum(axis=0)
    return np.where(den > 0, phi ** 2 / np.where(den > 0, den, 1.0), np.inf)


def _gamma(ev, s2, l):
    """Gradient of s2 l' C l in (psi, sigma^2) for rows l (p, F) -> (npar + 1, F)."""
    C = ev.parts["C"]
    Cl = la.mv(C, l)
    rows = [s2 * (Cl * la.mv(O, Cl)).sum(axis=0) for O in ev.parts["Om"]]
    rows.append((l * Cl).sum(axis=0))
    return np.stack(rows)


def _test(ev, Lmat, s2, H):
    """Estimate (k, F), its SE (one row), t or F, and its Satterthwaite df at an evaluation
    ``ev`` of the full model, with the variance parameters' Hessian ``H``."""
    C = ev.parts["C"]
    k, F = Lmat.shape[0], ev.r2.shape[0]
    est = Lmat @ ev.beta                                   # (k, F)
    V = np.einsum("ip,pqf,jq->ijf", Lmat, C, Lmat)         # L C L' (k, k, F)
    if k == 1:
        var = s2 * V[0, 0]
        se = np.sqrt(var)
        t = est[0] / np.where(se > 0, se, np.inf)
        l = np.broadcast_to(Lmat[0][:, None], (Lmat.shape[1], F))
        return est[0], se, t, _satterthwaite(H, _gamma(ev, s2, l), var)
    # F: eigen-directions of L C L' (Fai & Cornelius 1996, as in lmerTest)
    w, P = np.linalg.eigh(np.moveaxis(V, 2, 0))              # (F, k), (F, k, k)
    Lrot = np.einsum("fkj,kp->jpf", P, Lmat)                  # rows P_j' L: (k, p, F)
    proj = np.einsum("fkj,kf->jf", P, est)                    # (k, F)
    w = np.maximum(w, 1e-300).T                               # (k, F)
    Fv = (proj ** 2 / w).sum(axis=0) / (k * s2)
    nus = np.stack([_satterthwaite(H, _gamma(ev, s2, Lrot[j]), s2 * w[j]) for j in range(k)])
    Esum = np.where(nus > 2, nus / np.where(nus > 2, nus - 2, 1.0), 0.0).sum(axis=0)
    nu = np.where(Esum > k, 2 * Esum / np.where(Esum > k, Esum - k, 1.0), nus.min(axis=0))
    return None, None, Fv, nu


def _z(stat, nu, k):
    return scored_z(stat, nu, t_switch(nu)) if k == 1 else z_of_f(stat, k, nu)


def contrast_block(core, psi, Y, Lmat, reml, tails, zbar, cap=np.inf):
    """Observed inference of contrast rows ``Lmat`` (k, p) on the features ``Y`` (n, F);
    the df at most ``cap`` (per feature: the floor of boundary fits)."""
    st = core.stats(Y)
    ev = core.evaluate(psi, st, reml, order=2)
    H, s2 = _full_hessian(ev, core, reml)
    k, F = Lmat.shape[0], st.n_features
    est, se, stat, nu = _test(ev, Lmat, s2, H)
    nu = np.minimum(nu, cap)
    z = _z(stat, nu, k)
    if k > 1:
        nan = np.full(F, np.nan)
        return nan, nan, stat, nu, z, special.fdtrc(k, nu, np.maximum(stat, 0.0)), \
            stat * k / (stat * k + nu)
    psi_bar = np.einsum("i,ijf,j->f", zbar, core.psi_raw(ev.Psi), zbar)
    total_sd = np.sqrt(s2 * (1.0 + psi_bar))
    if tails == "two":
        p = np.minimum(1.0, 2.0 * special.stdtr(nu, -np.abs(stat)))
    elif tails == "greater":
        p = special.stdtr(nu, -stat)
    else:
        p = special.stdtr(nu, stat)
    return est, se, stat, nu, z, p, est / np.where(total_sd > 0, total_sd, np.inf)


def score_block(core, core0, psi0, Y, Lmat, reml, cap=np.inf):
    """The permutation score of a contrast: its t (or F) with the variance components
    ``psi0`` of the null model (``core0``: the model restricted to L b = 0), as z
    through the Satterthwaite df that the null model's information gives.

    The df are computed wholly at the null model's estimates (``psi0`` and its
    residual variance ``s0^2``): they do not depend on the scale, only on ``psi0``
    and the design, so a large effect (which inflates ``s0^2``) does not shrink
    them.  The t itself is studentized by the full model's residual variance at
    ``psi0``, as every resample is."""
    st = core.stats(Y)
    ev = core.evaluate(psi0, st, reml, order=2)
    ev0 = core0.evaluate(psi0, core0.stats(Y), reml, order=2)
    H0, s0 = _full_hessian(ev0, core0, reml)
    s2 = np.where(ev.ok, np.maximum(ev.r2, 1e-300), 1.0) / core.m(reml)
    _, _, stat, _ = _test(ev, Lmat, s2, H0)
    _, _, _, nu = _test(ev, Lmat, s0, H0)
    nu = np.minimum(nu, cap)
    return _z(stat, nu, Lmat.shape[0]), stat, nu


def containment_df(design, Lmat):
    """The participant-stratum ("containment") df of a contrast: ``N - rank`` of the
    fixed-effect columns that are constant within every participant -- the df of the
    participants' own effects, which a contrast contained in a participant-level
    random effect (the intercept, or a random slope) is tested against; None for a
    contrast that weighs only map covariates without a random slope (the residual
    stratum)."""
    X, Z, g = np.asarray(design.X, float), np.asarray(design.Z, float), np.asarray(design.groups)
    N = int(g.max()) + 1
    const = [j for j in range(X.shape[1])
             if np.allclose(np.bincount(g, X[:, j] ** 2, N) * np.bincount(g, minlength=N),
                            np.bincount(g, X[:, j], N) ** 2, rtol=1e-9, atol=1e-12)]
    rank = np.linalg.matrix_rank(X[:, const]) if const else 0
    if design.map_cols is not None:
        pm = np.asarray(design.map_cols).shape[1]
        cols = np.flatnonzero(np.abs(np.atleast_2d(Lmat)).sum(axis=0) > 0)
        random = [j for j in range(X.shape[1] - pm, X.shape[1])
                  if any(np.allclose(X[:, j], Z[:, c]) for c in range(Z.shape[1]))]
        if cols.size and np.all(cols >= X.shape[1] - pm) and not set(cols) & set(random):
            return None
    return float(max(N - rank, 1))


def boundary_cap(fit: MixedFit, Lmat, design=None):
    """Per feature, the largest df a contrast may have (inf, or the containment df at a
    boundary fit of a model with random slopes: there the directions of ``Psi`` that
    sit at zero drop out of the Satterthwaite df, which would otherwise jump towards the
    residual df ``n - p``)."""
    F = fit.n_features
    if fit.core.unconstrained:
        return np.full(F, np.inf)
    floor = containment_df(design if design is not None else fit.core.design, Lmat)
    if floor is None:
        return np.full(F, np.inf)
    return np.where(fit.code == 1, floor, np.inf)


def score_statistics(fit: MixedFit, fit0: MixedFit, Y, Lmat, chunk=FIT_CHUNK):
    """Per feature (z, t or F, df) of :func:`score_block` over ``Y`` (n, F); 0, 0, 1 where
    either fit has no residual variance."""
    Lmat = np.atleast_2d(np.asarray(Lmat, float))
    F = fit.n_features
    z, stat, nu = np.zeros(F), np.zeros(F), np.ones(F)
    cap = boundary_cap(fit0, Lmat, fit.core.design)
    for a in range(0, F, chunk):
        b = min(F, a + chunk)
        z[a:b], stat[a:b], nu[a:b] = score_block(fit.core, fit0.core, fit0.theta[:, a:b],
                                                 Y[:, a:b], Lmat, fit.reml, cap[a:b])
    bad = (fit.code == 3) | (fit0.code == 3) | ~np.isfinite(nu) | ~np.isfinite(z)
    z[bad], stat[bad], nu[bad] = 0.0, 0.0, 1.0
    return z, stat, nu


def contrast_statistics(fit: MixedFit, Y, Lmat, tails="two", chunk=FIT_CHUNK) -> ContrastStats:
    """Estimate, SE, t or F, Satterthwaite df, z, p and standardized effect per feature.

    Standardized effect: for t, the estimate over ``sqrt(sigma^2 + zbar' D zbar)``,
    the SD of a single map at the average map (all variance components, the
    convention of Westfall, Kenny & Judd 2014, J Exp Psychol Gen 143:2020-2045);
    for F, ``F k / (F k + nu)`` (partial eta squared from F)."""
    core = fit.core
    Lmat = np.atleast_2d(np.asarray(Lmat, float))
    F = fit.n_features
    zbar = np.asarray(core.design.Z, float).mean(axis=0)
    out = {k: np.zeros(F) for k in ("est", "se", "stat", "nu", "z", "p", "eff")}
    cap = boundary_cap(fit, Lmat)
    for a in range(0, F, chunk):
        b = min(F, a + chunk)
        res = contrast_block(core, fit.theta[:, a:b], Y[:, a:b], Lmat, fit.reml, tails, zbar,
                             cap[a:b])
        for key, val in zip(("est", "se", "stat", "nu", "z", "p", "eff"), res):
            out[key][a:b] = val
    bad = fit.code == 3       # degenerate: undefined (NaN), as in the GLM (glm.degenerate)
    for key in ("stat", "z", "p", "eff", "nu"):
        out[key][bad] = np.nan
    # a fit that did not converge has no trustworthy df or SE: no parametric p (NaN: left
    # out of FDR, never significant without resampling); counted in the run record.
    # Measured: p down to 0 where |z| <= 2.5 (10 participants, 1-3 sessions)
    out["p"][fit.code == 2] = np.nan
    return ContrastStats(out["est"], out["se"], out["stat"], out["nu"], out["z"], out["p"],
                         out["eff"], Lmat.shape[0])
