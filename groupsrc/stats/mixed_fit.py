"""Fitting the mixed model at every feature at once, and its per-feature inference.

Optimizer
---------
Newton's method on the profiled criterion of :mod:`.mixed` in ``theta`` (the
entries of ``Lambda``), for all features at once, with the exact gradient
and Hessian:

* start: a moment estimate per feature -- per-participant least-squares
  random effects from the ordinary least-squares residuals, their spread
  minus the part the residual variance explains -- floored so that every
  diagonal of ``Lambda`` starts positive;
* step ``-(H + mu I)^{-1} grad`` with ``mu = 0`` where ``H`` is positive
  definite, else the Gershgorin shift that makes it so; steps are halved
  until the criterion does not increase (at most 30 times);
* a feature stops when an accepted step moves no entry of ``theta`` by more
  than ``1e-7 (1 + max |theta|)``, or when no halving improves it; features
  that stop leave the working set, so late iterations cost little.

Fit codes (per feature)
-----------------------
0 converged inside the parameter space; 1 converged on its boundary -- a
singular random-effect covariance (a variance zero or a correlation of +-1),
detected as a diagonal entry of ``Lambda`` below 1e-4, lme4's default
tolerance (``isSingular``) -- kept like lme4 keeps it, with its fixed effects,
standard errors and degrees of freedom; 2 stopped at the iteration limit
(the last iterate is used and counted); 3 no residual variance (e.g. a
constant feature): statistic 0, p 1.

Inference per feature (:func:`contrast_statistics`)
---------------------------------------------------
``estimate = L beta_hat``, ``Var = sigma_hat^2 L C L'``; t (one row) or
Wald F (k rows).  Denominator degrees of freedom by Satterthwaite (1946,
Biometrics Bulletin 2:110-114) as lmerTest computes them (Kuznetsova et al.
2017, J Stat Softw 82(13)): ``nu = 2 Phi^2 / (gamma' A gamma)`` with ``Phi``
the contrast variance, ``gamma`` its gradient in the variance parameters
``(theta, sigma^2)`` and ``A = 2 H^{-1}`` from the Hessian ``H`` of the
(non-profiled) -2 log-likelihood; on the boundary the directions in which
``Psi`` does not move drop out (pseudo-inverse), as in lmerTest.  For F, the
method of Fai & Cornelius (1996, J Stat Comput Simul 54:363-378) as lmerTest
applies it: one Satterthwaite df per eigen-direction ``nu_j`` of ``L C L'``,
``E = sum_{nu_j > 2} nu_j / (nu_j - 2)``, ``nu = 2 E / (E - k)`` (the
smallest ``nu_j`` when ``E <= k``).

Clusters need one scale for every feature, but every feature has its own
df, so the statistic used for thresholds, cluster masses, TFCE and the
maximum is the *z of equal p*: ``z = Phi^{-1}(1 - p)`` for the one-sided p of
the t (with the sign of t) or the upper-tail p of F.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special, stats

from . import mixed_linalg as la
from .kernels import one_blas_thread
from .mixed import MixedCore, Stats, canonical_theta, lower_index

#: features per block of the fit (arrays of N x block float64 stay in cache)
FIT_CHUNK = 4096
MAX_ITER = 100
STEP_TOL = 1e-7
#: lme4's default singularity tolerance on the diagonal of Lambda (isSingular)
BOUNDARY_TOL = 1e-4
#: smallest starting diagonal of Lambda (scaled random-effect units)
START_FLOOR = 0.1
CODES = {0: "converged", 1: "boundary (singular covariance)", 2: "iteration limit",
         3: "no residual variance"}


# ----------------------------------------------------------------------------
# starting values
# ----------------------------------------------------------------------------

def start_theta(core: MixedCore, st: Stats):
    """Moment-based starting ``theta`` (npar, F) and the degenerate mask (no residual)."""
    q, N, p = core.q, core.N, core.p
    beta0 = np.linalg.solve(core.XtX, st.Xty)
    rss = st.yy - (beta0 * st.Xty).sum(axis=0)
    zr = st.u - (core.Hmat.T @ beta0).reshape(q, N, -1)              # Z_i' r_i
    Gi = np.moveaxis(core.G, 2, 0)                                   # (N, q, q)
    rank = np.linalg.matrix_rank(Gi)
    Gp = np.moveaxis(np.linalg.pinv(Gi), 0, 2)                       # (q, q, N)
    proj = (zr * la.mv(Gp[..., None], zr)).sum(axis=(0, 1))
    df_w = max(core.n - int(rank.sum()), 1)
    s2 = np.maximum((rss - proj) / df_w, 1e-12 * np.maximum(rss, 1e-300) / core.n)
    full = rank == q
    degenerate = ~(rss > 1e-10 * np.maximum(st.yy, 1e-300))
    if not full.any():
        Psi = np.repeat(np.eye(q)[:, :, None] * START_FLOOR ** 2, st.n_features, axis=2)
    else:
        b = la.mv(Gp[..., None], zr)[:, full]                          # (q, Nf, F)
        Psi = np.einsum("anf,bnf->abf", b, b) / full.sum() / s2
        Psi -= Gp[:, :, full].mean(axis=2)[..., None]
    Psi = np.moveaxis(Psi, 2, 0)
    w, V = np.linalg.eigh(0.5 * (Psi + np.swapaxes(Psi, 1, 2)))
    w = np.clip(w, START_FLOOR ** 2, 1e6)
    Psi = np.einsum("fij,fj,fkj->fik", V, w, V)
    Lam = np.linalg.cholesky(Psi)
    theta = np.stack([Lam[:, a, b] for a, b in lower_index(q)])
    return theta, degenerate


# ----------------------------------------------------------------------------
# Newton's method over all features
# ----------------------------------------------------------------------------

def _newton_step(H, g):
    """-(H + mu I)^{-1} g, mu = 0 where H is positive definite, else a Gershgorin shift
    (every eigenvalue of H + mu I is then positive)."""
    d = H.shape[0]
    L, ok = la.chol(H)
    if not ok.all():
        diag = np.stack([H[i, i] for i in range(d)])
        off = np.abs(H).sum(axis=1) - np.abs(diag)
        mu = np.maximum(0.0, (off - diag).max(axis=0))
        mu = np.where(ok, 0.0, mu + 1e-6 * np.abs(diag).max(axis=0) + 1e-12)
        L, _ = la.chol(H + mu * la.eye_like(d, mu.shape))
    return -la.chol_solve(L, g)


def optimize(core: MixedCore, st: Stats, theta0, reml=True, max_iter=MAX_ITER):
    """Minimize the profiled criterion for every feature: (theta, dev, iterations, converged)."""
    q = core.q
    theta = theta0.copy()
    F = theta.shape[1]
    iters = np.zeros(F, np.int32)
    conv = np.zeros(F, bool)
    dev = np.full(F, np.inf)
    act = np.arange(F)
    ev = core.evaluate(theta, st, reml, order=2)
    dev[:] = ev.dev
    grad, hess = ev.grad, ev.hess
    for _ in range(max_iter):
        if act.size == 0:
            break
        sta = st.take(act)
        th = theta[:, act]
        step = _newton_step(hess, grad)
        scale = 1.0 + np.abs(th).max(axis=0)
        big = np.abs(step).max(axis=0)
        step *= np.minimum(1.0, 4.0 * scale / np.maximum(big, 1e-300))
        new = canonical_theta(th + step, q)
        trial = core.evaluate(new, sta, reml, order=2)
        good = trial.dev <= dev[act]
        alpha = np.ones(act.size)
        # a step below the tolerance that does not lower the criterion: at the optimum
        # (rounding decides the sign of the change), so no halving is tried
        tiny = np.abs(new - th).max(axis=0) <= STEP_TOL * scale
        bad = np.flatnonzero(~good & ~tiny)
        for _ in range(30):
            if bad.size == 0:
                break
            alpha[bad] *= 0.5
            cand = canonical_theta(th[:, bad] + alpha[bad] * step[:, bad], q)
            e2 = core.evaluate(cand, sta.take(bad), reml, order=0)
            ok = e2.dev <= dev[act[bad]]
            new[:, bad[ok]] = cand[:, ok]
            good[bad[ok]] = True
            bad = bad[~ok]
        moved = np.abs(new - th).max(axis=0)
        iters[act] += 1
        stuck = ~good                                  # no (halved) step improved: at the optimum
        upd = good
        theta[:, act[upd]] = new[:, upd]
        # accepted full steps carry fresh derivatives; halved ones need them recomputed
        full_ok = good & (alpha == 1.0)
        dev[act[full_ok]] = trial.dev[full_ok]
        done = stuck | (good & (moved <= STEP_TOL * scale))
        conv[act[done]] = True
        keep = ~done
        if not keep.any():
            break
        halved = keep & good & (alpha < 1.0)
        grad = trial.grad[:, keep]
        hess = trial.hess[:, :, keep]
        act_keep = act[keep]
        if halved.any():
            hk = np.flatnonzero(halved[keep])
            e3 = core.evaluate(theta[:, act_keep[hk]], st.take(act_keep[hk]), reml, order=2)
            grad[:, hk], hess[:, :, hk] = e3.grad, e3.hess
            dev[act_keep[hk]] = e3.dev
        act = act_keep
    return theta, dev, iters, conv


@dataclass
class MixedFit:
    """The fitted model at every feature (flat features in C order)."""

    core: MixedCore
    reml: bool
    theta: np.ndarray            # (npar, F) scaled Lambda entries
    dev: np.ndarray              # (F,) -2 log-likelihood (REML or ML)
    code: np.ndarray             # (F,) int8 fit code (CODES)
    iterations: np.ndarray       # (F,) Newton iterations

    @property
    def n_features(self):
        return self.theta.shape[1]

    def counts(self) -> dict:
        return {CODES[k]: int(np.sum(self.code == k)) for k in CODES}


def fit_block(core, Y, reml=True, max_iter=MAX_ITER):
    """Fit the features ``Y`` (n, F): (theta, dev, code, iterations)."""
    st = core.stats(Y)
    theta0, degenerate = start_theta(core, st)
    F = st.n_features
    theta = np.zeros_like(theta0)
    dev = np.full(F, np.nan)
    iters = np.zeros(F, np.int32)
    code = np.full(F, 3, np.int8)
    live = np.flatnonzero(~degenerate)
    if live.size:
        th, dv, it, conv = optimize(core, st.take(live), theta0[:, live], reml, max_iter)
        theta[:, live], dev[live], iters[live] = th, dv, it
        diag = np.stack([th[lower_index(core.q).index((j, j))] for j in range(core.q)])
        code[live] = np.where(~conv, 2, np.where((diag < BOUNDARY_TOL).any(axis=0), 1, 0))
    return theta, dev, code, iters


def fit_features(core: MixedCore, Y, reml=True, chunk=FIT_CHUNK, max_iter=MAX_ITER,
                 progress=None) -> MixedFit:
    """Fit every feature of ``Y`` (n, F) (array or memory map), ``chunk`` at a time.

    BLAS runs on one thread: the products are small, and more threads only
    contend (and a resample's bits must not depend on the thread count)."""
    with one_blas_thread():
        return _fit_features(core, Y, reml, chunk, max_iter, progress)


def _fit_features(core, Y, reml, chunk, max_iter, progress):
    F = Y.shape[1]
    theta = np.zeros((core.npar, F))
    dev = np.full(F, np.nan)
    code = np.zeros(F, np.int8)
    iters = np.zeros(F, np.int32)
    for a in range(0, F, chunk):
        b = min(F, a + chunk)
        theta[:, a:b], dev[a:b], code[a:b], iters[a:b] = fit_block(core, Y[:, a:b], reml,
                                                                   max_iter)
        if progress is not None:
            progress(b, F)
    return MixedFit(core, reml, theta, dev, code, iters)


# ----------------------------------------------------------------------------
# per-feature quantities at the fit
# ----------------------------------------------------------------------------

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
        Lam = ev.Lam
        D = core.psi_raw(la.mm(Lam, la.T(Lam))) * s2
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
    """-2 log-lik Hessian in (theta, sigma^2), non-profiled, at sigma^2 = r2 / m."""
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
    """Gradient of s2 l' C l in (theta, sigma^2) for rows l (p, F) -> (npar + 1, F)."""
    C = ev.parts["C"]
    Cl = la.mv(C, l)
    rows = [s2 * (Cl * la.mv(O, Cl)).sum(axis=0) for O in ev.parts["Om"]]
    rows.append((l * Cl).sum(axis=0))
    return np.stack(rows)


def contrast_block(core, theta, Y, Lmat, reml, tails, zbar):
    """Observed inference of contrast rows ``Lmat`` (k, p) on the features ``Y`` (n, F)."""
    st = core.stats(Y)
    ev = core.evaluate(theta, st, reml, order=2)
    H, s2 = _full_hessian(ev, core, reml)
    C = ev.parts["C"]
    k = Lmat.shape[0]
    F = st.n_features
    est = Lmat @ ev.beta                                   # (k, F)
    V = np.einsum("ip,pqf,jq->ijf", Lmat, C, Lmat)         # L C L' (k, k, F)
    Lam = ev.Lam
    psi_bar = np.einsum("i,ijf,j->f", zbar, core.psi_raw(la.mm(Lam, la.T(Lam))), zbar)
    total_sd = np.sqrt(s2 * (1.0 + psi_bar))
    if k == 1:
        var = s2 * V[0, 0]
        se = np.sqrt(var)
        t = est[0] / np.where(se > 0, se, np.inf)
        l = np.broadcast_to(Lmat[0][:, None], (core.p, F))
        nu = _satterthwaite(H, _gamma(ev, s2, l), var)
        z = z_of_t(t, nu)
        if tails == "two":
            p = np.minimum(1.0, 2.0 * special.stdtr(nu, -np.abs(t)))
        elif tails == "greater":
            p = special.stdtr(nu, -t)
        else:
            p = special.stdtr(nu, t)
        return est[0], se, t, nu, z, p, est[0] / np.where(total_sd > 0, total_sd, np.inf)
    # F: eigen-directions of L C L' (Fai & Cornelius 1996, as in lmerTest)
    w, P = np.linalg.eigh(np.moveaxis(V, 2, 0))              # (F, k), (F, k, k)
    Lrot = np.einsum("fkj,kp->jpf", P, Lmat)                  # rows P_j' L: (k, p, F)
    proj = np.einsum("fkj,kf->jf", P, est)                    # (k, F)
    w = np.maximum(w, 1e-300).T                               # (k, F)
    Fv = (proj ** 2 / w).sum(axis=0) / (k * s2)
    nus = np.stack([_satterthwaite(H, _gamma(ev, s2, Lrot[j]), s2 * w[j]) for j in range(k)])
    Esum = np.where(nus > 2, nus / np.where(nus > 2, nus - 2, 1.0), 0.0).sum(axis=0)
    nu = np.where(Esum > k, 2 * Esum / np.where(Esum > k, Esum - k, 1.0), nus.min(axis=0))
    z = z_of_f(Fv, k, nu)
    p = special.fdtrc(k, nu, np.maximum(Fv, 0.0))
    nan = np.full(F, np.nan)
    return nan, nan, Fv, nu, z, p, Fv * k / (Fv * k + nu)


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
    for a in range(0, F, chunk):
        b = min(F, a + chunk)
        res = contrast_block(core, fit.theta[:, a:b], Y[:, a:b], Lmat, fit.reml, tails, zbar)
        for key, val in zip(("est", "se", "stat", "nu", "z", "p", "eff"), res):
            out[key][a:b] = val
    bad = fit.code == 3
    for key, v in (("stat", 0.0), ("z", 0.0), ("p", 1.0), ("eff", 0.0)):
        out[key][bad] = v
    return ContrastStats(out["est"], out["se"], out["stat"], out["nu"], out["z"], out["p"],
                         out["eff"], Lmat.shape[0])
