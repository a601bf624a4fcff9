"""Fitting the mixed model at every feature at once (inference: :mod:`.inference`).

Optimizer
---------
Newton's method on the profiled criterion of :mod:`.model` in its parameters
``theta`` (the unconstrained intercept variance, or lme4's ``Lambda``), for all
features at once, with the exact gradient and Hessian:

* start: a moment estimate per feature -- per-participant least-squares
  random effects from the ordinary least-squares residuals, their spread
  minus the part the residual variance explains -- with its eigenvalues
  floored so that the start is positive definite;
* step ``-(H + mu I)^{-1} grad`` with ``mu = 0`` where ``H`` is positive
  definite, else the Gershgorin shift that makes it so; steps are halved
  until the criterion does not increase (at most 30 times); a step that leaves
  the parameter space (some ``Vbar_i`` not positive definite) has an infinite
  criterion and is halved too;
* a feature stops when its Newton step moves no entry of ``theta`` by more
  than ``1e-6 (1 + max |theta|)`` (that step is taken: convergence is
  quadratic, so what remains is of the order of its square), or when no
  halving improves it; features that stop leave the working set, so late
  iterations cost little.

Convergence is then *checked* (:func:`converged`), not assumed: at the final
``theta`` the Hessian must be positive definite and the Newton decrement
``g'H^{-1}g`` (the criterion's predicted remaining decrease) below
``DECREMENT_TOL``, or, where the criterion is flat in some direction, every
gradient entry small (``GRAD_TOL``).  With random slopes, a fit creeping towards
the boundary of lme4's parameter space (a diagonal entry of ``Lambda`` going to
zero, where the Hessian turns singular and Newton's method converges only linearly)
is accepted once that diagonal is below ``CREEP_DIAG`` and the gradient below
``CREEP_GRAD``, and counted as a boundary fit.  A feature that fails the
check, or stops at the iteration limit, is fitted again from other starting values
(``RESTARTS``: a small and a large ``Psi``), and the best converged fit is kept
(lowest criterion).

Fit codes (per feature)
-----------------------
0 converged, ``Psi`` positive definite; 1 a boundary fit: a random intercept's
variance estimated at or below zero (below ``BOUNDARY_TOL`` relative to the
residual variance; kept unconstrained, :mod:`.model`), or with random slopes a
diagonal entry of ``Lambda`` below 1e-4, lme4's default tolerance
(``isSingular``; a variance of zero or a correlation of +-1, kept as lme4 keeps
it) -- kept with their fixed effects and standard errors, their degrees of
freedom floored (:mod:`.inference`), and counted; 2 not converged after the
restarts (the best iterate is used and counted); 3 no residual variance (e.g. a
constant feature): statistic 0, p 1.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import linalg as la
from ...engine.blas import one_blas_thread
from ..glm import degenerate as glm_degenerate
from .model import MixedCore, Stats, canonical_theta, lower_index

#: features per block of the fit (arrays of N x block float64 stay in cache)
FIT_CHUNK = 4096
MAX_ITER = 100
STEP_TOL = 1e-6
#: convergence check: the Newton decrement g'H^-1 g (deviance units) at most this ...
DECREMENT_TOL = 1e-8
#: ... or, where H is not positive definite, every |gradient| * (1 + max|theta|) at most this
GRAD_TOL = 1e-6
#: a random intercept's relative variance below this is a boundary fit (the square of
#: lme4's tolerance); with random slopes a diagonal of Lambda below LAMBDA_TOL
BOUNDARY_TOL = 1e-8
LAMBDA_TOL = 1e-4
#: a fit of a model with random slopes whose smallest diagonal of Lambda is below
#: CREEP_DIAG and whose gradient (as for GRAD_TOL) is below CREEP_GRAD is at the boundary:
#: Newton's method converges only linearly there, and the criterion is within about
#: CREEP_DIAG * CREEP_GRAD of its limit
CREEP_DIAG = 1e-2
CREEP_GRAD = 5e-2
#: smallest starting eigenvalue of Psi (scaled random-effect units)
START_FLOOR = 0.1
#: scaled Psi of the restarts: multiples of the identity
RESTARTS = (0.01, 10.0)
CODES = {0: "converged", 1: "boundary (variance at or below zero)",
         2: "not converged", 3: "no residual variance"}


# ----------------------------------------------------------------------------
# starting values
# ----------------------------------------------------------------------------

def start_theta(core: MixedCore, st: Stats):
    """Moment-based starting ``theta`` (npar, F) and the degenerate mask (no residual)."""
    q, N = core.q, core.N
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
    if core.n > int(rank.sum()):
        # no residual within participants (e.g. the same condition difference in every
        # participant): the residual variance is zero and every t infinite -- undefined,
        # as in the GLM (glm.degenerate, the same tolerance)
        degenerate |= glm_degenerate(np.maximum(rss - proj, 0.0), st.yy)
    if not full.any():
        Psi = np.repeat(np.eye(q)[:, :, None] * START_FLOOR ** 2, st.n_features, axis=2)
    else:
        b = la.mv(Gp[..., None], zr)[:, full]                          # (q, Nf, F)
        Psi = np.einsum("anf,bnf->abf", b, b) / full.sum() / s2
        Psi -= Gp[:, :, full].mean(axis=2)[..., None]
    Psi = np.moveaxis(Psi, 2, 0)
    w, V = np.linalg.eigh(0.5 * (Psi + np.swapaxes(Psi, 1, 2)))
    w = np.clip(w, START_FLOOR ** 2, 1e6)
    Psi = np.einsum("fij,fj,fkj->ikf", V, w, V)
    return core.theta_of(Psi), degenerate


# ----------------------------------------------------------------------------
# Newton's method over all features
# ----------------------------------------------------------------------------

def _newton_step(H, g):
    """-(H + mu I)^{-1} g, mu = 0 where H is positive definite, else a Gershgorin shift
    (every eigenvalue of H + mu I is then positive); and where H was positive definite."""
    d = H.shape[0]
    L, ok = la.chol(H)
    if not ok.all():
        diag = np.stack([H[i, i] for i in range(d)])
        off = np.abs(H).sum(axis=1) - np.abs(diag)
        mu = np.maximum(0.0, (off - diag).max(axis=0))
        mu = np.where(ok, 0.0, mu + 1e-6 * np.abs(diag).max(axis=0) + 1e-12)
        L, _ = la.chol(H + mu * la.eye_like(d, mu.shape))
    return -la.chol_solve(L, g), ok


def _canonical(core, theta):
    return theta if core.unconstrained else canonical_theta(theta, core.q)


def optimize(core: MixedCore, st: Stats, theta0, reml=True, max_iter=MAX_ITER):
    """Minimize the profiled criterion for every feature: (theta, dev, iterations, stopped).

    A feature whose Newton step (positive definite Hessian) is below ``STEP_TOL`` takes
    that last step without another evaluation: Newton's method converges
    quadratically, so the step left after it is of the order of its square."""
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
        th = theta[:, act]
        step, newton = _newton_step(hess, grad)
        scale = 1.0 + np.abs(th).max(axis=0)
        big = np.abs(step).max(axis=0)
        final = newton & (big <= STEP_TOL * scale)
        if final.any():
            theta[:, act[final]] = _canonical(core, th[:, final] + step[:, final])
            iters[act[final]] += 1
            conv[act[final]] = True
            live = ~final
            act, th, step, scale, big = act[live], th[:, live], step[:, live], scale[live], \
                big[live]
            grad, hess = grad[:, live], hess[:, :, live]
            if act.size == 0:
                break
        sta = st.take(act)
        step *= np.minimum(1.0, 4.0 * scale / np.maximum(big, 1e-300))
        new = _canonical(core, th + step)
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
            cand = _canonical(core, th[:, bad] + alpha[bad] * step[:, bad])
            e2 = core.evaluate(cand, sta.take(bad), reml, order=0)
            ok = e2.dev <= dev[act[bad]]
            new[:, bad[ok]] = cand[:, ok]
            good[bad[ok]] = True
            bad = bad[~ok]
        moved = np.abs(new - th).max(axis=0)
        iters[act] += 1
        stuck = ~good                                  # no (halved) step improved: at the optimum
        theta[:, act[good]] = new[:, good]
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


def converged(core: MixedCore, st: Stats, theta, reml=True):
    """Per feature: the convergence check at ``theta`` (module docstring), the criterion,
    and where only the boundary rule accepted the fit."""
    ev = core.evaluate(theta, st, reml, order=2)
    g, H = ev.grad, ev.hess
    L, pd = la.chol(H)
    dec = (g * la.chol_solve(L, g)).sum(axis=0)
    scale = 1.0 + np.abs(theta).max(axis=0)
    grad = (np.abs(g) * scale).max(axis=0)
    flat = grad <= GRAD_TOL
    if not core.unconstrained:          # creeping to lme4's boundary (module docstring)
        flat = flat.copy()
        diag = np.stack([theta[lower_index(core.q).index((j, j))] for j in range(core.q)])
        flat |= (np.abs(diag).min(axis=0) < CREEP_DIAG) & (grad <= CREEP_GRAD)
    strict = ev.ok & np.isfinite(ev.dev) & ((pd & (dec <= DECREMENT_TOL)) | (grad <= GRAD_TOL))
    ok = ev.ok & np.isfinite(ev.dev) & ((pd & (dec <= DECREMENT_TOL)) | flat)
    return ok, ev.dev, ok & ~strict


def _boundary(core, theta):
    """Boundary fits (module docstring)."""
    if core.unconstrained:
        return theta[0] < BOUNDARY_TOL
    diag = np.stack([theta[lower_index(core.q).index((j, j))] for j in range(core.q)])
    return (diag < LAMBDA_TOL).any(axis=0)


@dataclass
class MixedFit:
    """The fitted model at every feature (flat features in C order)."""

    core: MixedCore
    reml: bool
    theta: np.ndarray            # (npar, F) variance parameters (MixedCore.psi_of)
    dev: np.ndarray              # (F,) -2 log-likelihood (REML or ML)
    code: np.ndarray             # (F,) int8 fit code (CODES)
    iterations: np.ndarray       # (F,) Newton iterations (every start)

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
        sl = st.take(live)
        th, dv, it, _ = optimize(core, sl, theta0[:, live], reml, max_iter)
        ok, dv, creep = converged(core, sl, th, reml)
        for scale in RESTARTS:
            again = np.flatnonzero(~ok)
            if again.size == 0:
                break
            start = np.repeat(core.theta_of(scale * np.eye(core.q)[:, :, None]), again.size,
                              axis=1)
            s2 = sl.take(again)
            th2, _, it2, _ = optimize(core, s2, start, reml, max_iter)
            ok2, dv2, creep2 = converged(core, s2, th2, reml)
            it[again] += it2
            # keep the restart where it converged and is no worse, or where neither
            # converged and it is better
            better = (ok2 & (~ok[again] | (dv2 <= dv[again]))) | (~ok[again] & ~ok2
                                                                  & (dv2 < dv[again]))
            idx = again[better]
            th[:, idx], dv[idx], ok[idx] = th2[:, better], dv2[better], ok2[better]
            creep[idx] = creep2[better]
        theta[:, live], dev[live], iters[live] = th, dv, it
        code[live] = np.where(~ok, 2, np.where(_boundary(core, th) | creep, 1, 0))
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
        theta[:, a:b], dev[a:b], code[a:b], iters[a:b] = fit_block(core, Y[:, a:b], reml, max_iter)
        if progress is not None:
            progress(b, F)
    return MixedFit(core, reml, theta, dev, code, iters)
