"""Fitting the mixed model at every feature at once (inference: :mod:`.inference`).

Optimizer
---------
Newton's method on the profiled criterion of :mod:`.model` in ``psi`` (the
entries of the unconstrained ``Psi``), for all features at once, with the
exact gradient and Hessian:

* start: a moment estimate per feature -- per-participant least-squares
  random effects from the ordinary least-squares residuals, their spread
  minus the part the residual variance explains -- with its eigenvalues
  floored so that the start is positive definite;
* step ``-(H + mu I)^{-1} grad`` with ``mu = 0`` where ``H`` is positive
  definite, else the Gershgorin shift that makes it so; steps are halved
  until the criterion does not increase (at most 30 times); a step that leaves
  the parameter space (some ``Vbar_i`` not positive definite) has an infinite
  criterion and is halved too;
* a feature stops when its Newton step moves no entry of ``psi`` by more
  than ``1e-6 (1 + max |psi|)`` (that step is taken: convergence is
  quadratic, so what remains is of the order of its square), or when no
  halving improves it; features that stop leave the working set, so late
  iterations cost little.

Convergence is then *checked* (:func:`converged`), not assumed: at the final
``psi`` the Hessian must be positive definite and the Newton decrement
``g'H^{-1}g`` (the criterion's predicted remaining decrease) below
``DECREMENT_TOL``, or, where the criterion is flat in some direction, every
gradient entry small (``GRAD_TOL``).  A feature that fails the check, or stops
at the iteration limit, is fitted again from other starting values
(``RESTARTS``: the least-squares point ``Psi = 0`` and a large ``Psi``), and the
best converged fit is kept (lowest criterion).

Fit codes (per feature)
-----------------------
0 converged, ``Psi`` positive definite; 1 converged with ``Psi`` not positive
definite -- a variance estimated at or below zero, or a correlation at or
beyond +-1 (smallest eigenvalue of the scaled ``Psi`` below ``BOUNDARY_TOL``):
the fits that a non-negative fit would put on the boundary of its parameter
space; kept unconstrained (:mod:`.model`), with their fixed effects, standard
errors and degrees of freedom, and counted; 2 not converged after the restarts
(the best iterate is used and counted); 3 no residual variance (e.g. a
constant feature): statistic 0, p 1.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import linalg as la
from ...engine.blas import one_blas_thread
from .model import MixedCore, Stats, psi_entries, psi_matrix

#: features per block of the fit (arrays of N x block float64 stay in cache)
FIT_CHUNK = 4096
MAX_ITER = 100
STEP_TOL = 1e-6
#: convergence check: the Newton decrement g'H^-1 g (deviance units) at most this ...
DECREMENT_TOL = 1e-8
#: ... or, where H is not positive definite, every |gradient| * (1 + max|psi|) at most this
GRAD_TOL = 1e-6
#: smallest eigenvalue of the scaled Psi below which a fit counts as a boundary fit (the
#: square of lme4's 1e-4 tolerance on the Cholesky factor's diagonal)
BOUNDARY_TOL = 1e-8
#: smallest starting eigenvalue of Psi (scaled random-effect units)
START_FLOOR = 0.1
#: scaled Psi of the restarts: multiples of the identity (0: the least-squares point)
RESTARTS = (0.0, 10.0)
CODES = {0: "converged", 1: "boundary (covariance not positive definite)",
         2: "not converged", 3: "no residual variance"}


# ----------------------------------------------------------------------------
# starting values
# ----------------------------------------------------------------------------

def start_psi(core: MixedCore, st: Stats):
    """Moment-based starting ``psi`` (npar, F) and the degenerate mask (no residual)."""
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
    return psi_entries(Psi), degenerate


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


def optimize(core: MixedCore, st: Stats, psi0, reml=True, max_iter=MAX_ITER):
    """Minimize the profiled criterion for every feature: (psi, dev, iterations, stopped).

    A feature whose Newton step (positive definite Hessian) is below ``STEP_TOL`` takes
    that last step without another evaluation: Newton's method converges
    quadratically, so the step left after it is of the order of its square."""
    psi = psi0.copy()
    F = psi.shape[1]
    iters = np.zeros(F, np.int32)
    conv = np.zeros(F, bool)
    dev = np.full(F, np.inf)
    act = np.arange(F)
    ev = core.evaluate(psi, st, reml, order=2)
    dev[:] = ev.dev
    grad, hess = ev.grad, ev.hess
    for _ in range(max_iter):
        if act.size == 0:
            break
        th = psi[:, act]
        step, newton = _newton_step(hess, grad)
        scale = 1.0 + np.abs(th).max(axis=0)
        big = np.abs(step).max(axis=0)
        final = newton & (big <= STEP_TOL * scale)
        if final.any():
            psi[:, act[final]] = th[:, final] + step[:, final]
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
        new = th + step
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
            cand = th[:, bad] + alpha[bad] * step[:, bad]
            e2 = core.evaluate(cand, sta.take(bad), reml, order=0)
            ok = e2.dev <= dev[act[bad]]
            new[:, bad[ok]] = cand[:, ok]
            good[bad[ok]] = True
            bad = bad[~ok]
        moved = np.abs(new - th).max(axis=0)
        iters[act] += 1
        stuck = ~good                                  # no (halved) step improved: at the optimum
        psi[:, act[good]] = new[:, good]
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
            e3 = core.evaluate(psi[:, act_keep[hk]], st.take(act_keep[hk]), reml, order=2)
            grad[:, hk], hess[:, :, hk] = e3.grad, e3.hess
            dev[act_keep[hk]] = e3.dev
        act = act_keep
    return psi, dev, iters, conv


def converged(core: MixedCore, st: Stats, psi, reml=True):
    """Per feature: the convergence check at ``psi`` (module docstring) and the criterion."""
    ev = core.evaluate(psi, st, reml, order=2)
    g, H = ev.grad, ev.hess
    L, pd = la.chol(H)
    dec = (g * la.chol_solve(L, g)).sum(axis=0)
    scale = 1.0 + np.abs(psi).max(axis=0)
    flat = (np.abs(g) * scale).max(axis=0) <= GRAD_TOL
    ok = ev.ok & np.isfinite(ev.dev) & ((pd & (dec <= DECREMENT_TOL)) | flat)
    return ok, ev.dev


def _boundary(psi, q):
    """Fits whose scaled Psi is not positive definite (smallest eigenvalue below the
    tolerance)."""
    Psi = np.moveaxis(psi_matrix(psi, q), 2, 0)
    return np.linalg.eigvalsh(Psi)[:, 0] < BOUNDARY_TOL


@dataclass
class MixedFit:
    """The fitted model at every feature (flat features in C order)."""

    core: MixedCore
    reml: bool
    psi: np.ndarray              # (npar, F) entries of the scaled Psi
    dev: np.ndarray              # (F,) -2 log-likelihood (REML or ML)
    code: np.ndarray             # (F,) int8 fit code (CODES)
    iterations: np.ndarray       # (F,) Newton iterations (every start)

    @property
    def n_features(self):
        return self.psi.shape[1]

    def counts(self) -> dict:
        return {CODES[k]: int(np.sum(self.code == k)) for k in CODES}


def fit_block(core, Y, reml=True, max_iter=MAX_ITER):
    """Fit the features ``Y`` (n, F): (psi, dev, code, iterations)."""
    st = core.stats(Y)
    psi0, degenerate = start_psi(core, st)
    F = st.n_features
    psi = np.zeros_like(psi0)
    dev = np.full(F, np.nan)
    iters = np.zeros(F, np.int32)
    code = np.full(F, 3, np.int8)
    live = np.flatnonzero(~degenerate)
    if live.size:
        sl = st.take(live)
        th, dv, it, _ = optimize(core, sl, psi0[:, live], reml, max_iter)
        ok, dv = converged(core, sl, th, reml)
        for scale in RESTARTS:
            again = np.flatnonzero(~ok)
            if again.size == 0:
                break
            start = np.repeat(psi_entries(scale * np.eye(core.q)[:, :, None]), again.size,
                              axis=1)
            s2 = sl.take(again)
            th2, _, it2, _ = optimize(core, s2, start, reml, max_iter)
            ok2, dv2 = converged(core, s2, th2, reml)
            it[again] += it2
            # keep the restart where it converged and is no worse, or where neither
            # converged and it is better
            better = (ok2 & (~ok[again] | (dv2 <= dv[again]))) | (~ok[again] & ~ok2
                                                                  & (dv2 < dv[again]))
            idx = again[better]
            th[:, idx], dv[idx], ok[idx] = th2[:, better], dv2[better], ok2[better]
        psi[:, live], dev[live], iters[live] = th, dv, it
        code[live] = np.where(~ok, 2, np.where(_boundary(th, core.q), 1, 0))
    return psi, dev, code, iters


def fit_features(core: MixedCore, Y, reml=True, chunk=FIT_CHUNK, max_iter=MAX_ITER,
                 progress=None) -> MixedFit:
    """Fit every feature of ``Y`` (n, F) (array or memory map), ``chunk`` at a time.

    BLAS runs on one thread: the products are small, and more threads only
    contend (and a resample's bits must not depend on the thread count)."""
    with one_blas_thread():
        return _fit_features(core, Y, reml, chunk, max_iter, progress)


def _fit_features(core, Y, reml, chunk, max_iter, progress):
    F = Y.shape[1]
    psi = np.zeros((core.npar, F))
    dev = np.full(F, np.nan)
    code = np.zeros(F, np.int8)
    iters = np.zeros(F, np.int32)
    for a in range(0, F, chunk):
        b = min(F, a + chunk)
        psi[:, a:b], dev[a:b], code[a:b], iters[a:b] = fit_block(core, Y[:, a:b], reml, max_iter)
        if progress is not None:
            progress(b, F)
    return MixedFit(core, reml, psi, dev, code, iters)
