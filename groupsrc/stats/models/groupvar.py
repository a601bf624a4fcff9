"""Variance groups in the GLM: Welch's v and the G statistic, with sign flips.

Model
-----
At every feature (source x sample), participants ``n = 1..N`` in variance groups
``g(n) = 1..K``::

    y = X b + e,    e_n ~ N(0, sigma_g(n)^2) independent

-- the GLM whose residual variance may differ between groups (patients more variable
than controls).  The pooled-variance t assumes one ``sigma``; with groups of different
sizes it is then too liberal or too conservative (the Behrens-Fisher problem).

The statistic (Winkler et al. 2014, NeuroImage 92:381-397, "variance groups"; for a
one-way layout it is Welch's 1951 heteroscedastic F, Biometrika 38:330-336, and for two
groups the Aspin-Welch v).  Notation, the same letters in the code:

* ``R = I - X X^+`` the residual-forming matrix, ``e = R y`` the OLS residuals,
  ``tr_g = sum_{n in g} R_nn`` the residual degrees of freedom of group g;
* ``w_g = tr_g / (e_g' e_g)``: one over the group's residual variance; ``W = diag(w_g(n))``;
* ``psi = (X'WX)^+ X'W y`` (weighted least squares with those weights);
* ``s = rank(C)``; ``V = C (X'WX)^+ C'``;
* ``G = (C psi)' V^-1 (C psi) / (Lambda s)``,
  ``Lambda = 1 + 2 (s - 1) Ysum / (s (s + 2))``,
  ``Ysum = sum_g (1 - sum_{n in g} w_n / tr(W))^2 / tr_g``;
* approximate null distribution ``F(s, nu)``, ``nu = s (s + 2) / (3 Ysum)``;
* ``s = 1``: ``v = C psi / sqrt(V)`` (``G = v^2``) with ``t(nu)``, ``nu = 1 / Ysum``: for two
  groups and no covariate, Welch's t and the Welch-Satterthwaite df.

Maps, thresholds and maxima use the z of equal p (``t(nu)`` or ``F(s, nu)`` per feature,
as the mixed model does), since ``nu`` differs between features and between resamples.
The estimate written is ``C psi`` (the weighted estimate, in the input's units), its
standard error ``sqrt(V)``; the standardized effect divides it by the root of the
unweighted mean of the groups' residual variances (a d that favours no group; Bonett
2008, Psychol Methods 13:99-109, cited from memory).

Resampling.  Permuting participants between groups of different variance is not an
exchangeable rearrangement; sign flips are, for errors that are independent and
symmetric (Winkler et al. 2014, "ISE").  So every contrast with variance groups uses
sign flips of the Freedman-Lane residuals ``r_z`` of the model restricted to
``C b = 0``, fitted in the statistic's own metric: by weighted least squares with the
weights ``w_g`` of the observed data, feature by feature (:func:`weighted_residuals`;
the mixed model likewise does Freedman-Lane by GLS).  With the restricted model fitted
by ordinary least squares the noisy group's residuals leak into the precise group's
through the pooled nuisance fit, and the flips were liberal (6 vs 12 participants, 2x
SD: 30 and 24 family-wise rejections in 400 null data sets for a group difference with
age and a mean of groups, interval [12, 29]; with the weighted fit 23 and 16).  The statistic of ``H_z y + S r_z`` depends on ``S r_z`` only (the
nuisance part is fitted exactly by any weighting and has ``C b = 0``), so with an
orthonormal basis ``Q`` of the design and ``Q_g`` its rows in group g, each resample
needs ``U_g = Q_g' S r_z`` for every group: one product of ``K r`` rows (``r`` the
design's rank) where the pooled statistic needs ``r`` or fewer.  Then, per feature,
``U = sum_g U_g``, ``e_g'e_g = ||r_g||^2 - 2 U_g'U + U' M_g U`` with ``M_g = Q_g'Q_g``
(``||r_g||^2`` does not change under sign flips), ``X'WX`` and ``X'W S r_z`` in the
coordinates of ``Q``: ``A = sum_g w_g M_g``, ``sum_g w_g U_g`` -- an r x r solve per
feature in compiled code (:func:`_vg_rows`).  With two groups ``M_1 + M_2 = I``, so
in the eigenvectors of ``M_1`` (the basis is chosen so) both are diagonal and the
solve is r divisions (:func:`_vg2_rows`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit
from scipy import special

from . import glm
from .base import FitInfo, Observed
from .mixed.inference import hill_z, z_of_f, z_of_t
from .ols import OLSKernel, _release
from ..engine.perthread import PerThread
from ..resampling import sign_flips

_JIT = dict(nogil=True, cache=True)
#: below these df, or beyond this |z|, the z of a v comes from the exact tail
#: (scipy.special), elsewhere from Hill's transformation (within 1.3e-4 for nu >= 4)
_HILL_MIN_DF = 4.0
_Z_EXACT = 3.0


@dataclass(frozen=True)
class GroupDesign:
    """What every feature shares: the design split by the contrast and the groups."""

    Q: np.ndarray          # (N, r) orthonormal basis of the design
    q_nuisance: np.ndarray  # (N, r0) basis of the model restricted to C b = 0
    codes: np.ndarray      # (N,) group index 0..K-1
    M: np.ndarray          # (K, r, r) Q_g' Q_g
    K: np.ndarray          # (s, r) the contrast in the coordinates of Q
    tr: np.ndarray         # (K,) residual df per group
    sizes: np.ndarray      # (K,) participants per group
    s: int                 # rank of the contrast

    @property
    def Qext(self):
        """(N, K r): column ``g r + k`` is ``Q[:, k]`` on the rows of group g, 0 elsewhere."""
        N, r = self.Q.shape
        out = np.zeros((N, self.M.shape[0] * r))
        for g in range(self.M.shape[0]):
            rows = self.codes == g
            out[rows, g * r:(g + 1) * r] = self.Q[rows]
        return out


def group_design(X, contrast, groups) -> GroupDesign:
    """The shared arrays; ``groups`` (N,) labels (any type)."""
    basis = glm.contrast_basis(X, contrast)
    X = np.asarray(X, float)
    C = np.atleast_2d(np.asarray(contrast, float))
    Q = basis.q
    _, codes = np.unique(np.asarray(groups).astype(str), return_inverse=True)
    codes = codes.reshape(-1)
    Kn = int(codes.max()) + 1
    h = (Q * Q).sum(axis=1)                         # leverages
    if Kn == 2:
        # M_1 + M_2 = Q'Q = I: both are diagonal in the eigenvectors of M_1, so the basis
        # Q P makes every per-feature solve a division (:func:`_vg2_rows`)
        _, P = np.linalg.eigh(Q[codes == 0].T @ Q[codes == 0])
        Q = Q @ P
    M = np.stack([Q[codes == g].T @ Q[codes == g] for g in range(Kn)])
    if Kn == 2:
        M = np.stack([np.diag(np.diag(m)) for m in M])
    tr = np.array([(1.0 - h[codes == g]).sum() for g in range(Kn)])
    sizes = np.bincount(codes, minlength=Kn).astype(float)
    Kmat = C @ np.linalg.pinv(X) @ Q
    return GroupDesign(Q, basis.q_nuisance, codes, M, Kmat, tr, sizes, int(C.shape[0]))


def groups_without_variance(X, groups, tol=1e-8) -> list:
    """The variance groups without residual degrees of freedom (``tr_g`` ~ 0): their
    variance cannot be estimated (a group of one participant, or one the design fits
    exactly).  Returns their labels."""
    Q = glm._orth(X)
    h = (Q * Q).sum(axis=1)
    labels = np.asarray(groups).astype(str)
    return [str(g) for g in np.unique(labels) if (1.0 - h[labels == g]).sum() <= tol]


@njit(**_JIT)
def _vg_rows(U, u_lo, n_rows, w, rrg, M, K, tr, sizes, stat, nu, est, se, sdav, ws):
    """Per row i < n_rows and feature j < w: from ``U[u_lo + i, g r + k, j]`` (the
    projections ``U_g``) and ``rrg[g, j]`` (``||r_g||^2``), the statistic (v for one
    contrast row, G for more), its df ``nu``, the estimate ``C psi`` (first row), its
    standard error and the root mean group variance, into ``stat[i, j]`` etc.  float64
    inside, whatever ``U``'s type; see the module docstring for the formulas.

    Every step is a loop over contiguous features (the compiler vectorises them), the
    small r x r algebra unrolled over features: ``ws`` is the work array of
    :func:`vg_workspace`.  With ``s = 1`` one solve per feature: ``c = A^-1 K'`` gives
    ``C psi = c' b`` and ``V = K c``."""
    Kn = M.shape[0]
    r = M.shape[1]
    s = K.shape[0]
    if Kn == 2 and s == 1:
        _vg2t_rows(U, u_lo, n_rows, w, rrg, M, K, tr, sizes, stat, nu, est, se, sdav, ws)
        return
    if Kn == 2:
        _vg2_rows(U, u_lo, n_rows, w, rrg, M, K, tr, sizes, stat, nu, est, se, sdav, ws)
        return
    tw = min(w, _TILE)
    views = _views(ws, Kn, r, s, tw)
    for i in range(n_rows):
        for j0 in range(0, w, _TILE):
            _vg_tile(U, u_lo + i, j0, min(w, j0 + _TILE) - j0, rrg, M, K, tr, sizes, stat,
                     nu, est, se, sdav, i, views)


@njit(**_JIT)
def _vg2_rows(U, u_lo, n_rows, w, rrg, M, K, tr, sizes, stat, nu, est, se, sdav, ws):
    """:func:`_vg_rows` for two groups, in a basis where ``M_1`` and ``M_2`` are
    diagonal (:func:`group_design`): ``A`` is diagonal, every solve a division."""
    r = M.shape[1]
    s = K.shape[0]
    d1 = np.empty(r)
    d2 = np.empty(r)
    for k in range(r):
        d1[k] = M[0, k, k]
        d2[k] = M[1, k, k]
    tr1, tr2 = tr[0], tr[1]
    n1, n2 = sizes[0], sizes[1]
    u1 = np.empty(r)
    u2 = np.empty(r)
    ia = np.empty(r)
    bq = np.empty(r)
    e = np.empty(s)
    V = np.empty((s, s))
    L = np.empty((s, s))
    y = np.empty(s)
    for i in range(n_rows):
        row = u_lo + i
        for j in range(w):
            rr1 = np.float64(rrg[0, j])
            rr2 = np.float64(rrg[1, j])
            q1 = rr1
            q2 = rr2
            for k in range(r):
                a = np.float64(U[row, k, j])
                b = np.float64(U[row, r + k, j])
                u1[k] = a
                u2[k] = b
                uk = a + b
                q1 += uk * (d1[k] * uk - 2.0 * a)
                q2 += uk * (d2[k] * uk - 2.0 * b)
            f1 = 1e-7 * rr1 if rr1 > 0.0 else 1e-300
            f2 = 1e-7 * rr2 if rr2 > 0.0 else 1e-300
            q1 = q1 if q1 > f1 else f1          # float32 cancellation; never negative
            q2 = q2 if q2 > f2 else f2
            w1 = tr1 / q1
            w2 = tr2 / q2
            for k in range(r):
                ia[k] = 1.0 / (w1 * d1[k] + w2 * d2[k])
                bq[k] = (w1 * u1[k] + w2 * u2[k]) * ia[k]
            for a in range(s):
                acc = 0.0
                for k in range(r):
                    acc += K[a, k] * bq[k]
                e[a] = acc
                for c in range(a + 1):
                    acc = 0.0
                    for k in range(r):
                        acc += K[a, k] * K[c, k] * ia[k]
                    V[a, c] = acc
            trw = n1 * w1 + n2 * w2
            x1 = 1.0 - n1 * w1 / trw
            x2 = 1.0 - n2 * w2 / trw
            ysum = x1 * x1 / tr1 + x2 * x2 / tr2
            if ysum <= 0.0:
                ysum = 1e-300
            nu[i, j] = s * (s + 2.0) / (3.0 * ysum)
            sej = np.sqrt(V[0, 0]) if V[0, 0] > 0.0 else 0.0
            se[i, j] = sej
            est[i, j] = e[0]
            sdav[i, j] = np.sqrt(0.5 * (q1 / tr1 + q2 / tr2))
            if s == 1:
                stat[i, j] = e[0] / sej if sej > 0.0 else 0.0
            else:
                stat[i, j] = _wald(V, e, L, y, s) / ((1.0 + 2.0 * (s - 1.0) * ysum
                                                     / (s * (s + 2.0))) * s)


@njit(**_JIT)
def _vg2t_rows(U, u_lo, n_rows, w, rrg, M, K, tr, sizes, stat, nu, est, se, sdav, ws):
    """:func:`_vg2_rows` for one contrast row (Welch's v), as passes over contiguous
    features that the compiler vectorises (the divisions pipelined); ``ws`` holds
    at least 6 ``w`` float64."""
    r = M.shape[1]
    tr1, tr2 = tr[0], tr[1]
    n1, n2 = sizes[0], sizes[1]
    q1 = ws[0:w]
    q2 = ws[w:2 * w]
    w1 = ws[2 * w:3 * w]
    w2 = ws[3 * w:4 * w]
    ee = ws[4 * w:5 * w]
    vv = ws[5 * w:6 * w]
    for i in range(n_rows):
        row = u_lo + i
        for j in range(w):
            q1[j] = np.float64(rrg[0, j])
            q2[j] = np.float64(rrg[1, j])
            ee[j] = 0.0
            vv[j] = 0.0
        for k in range(r):
            d1 = M[0, k, k]
            d2 = M[1, k, k]
            ua = U[row, k]
            ub = U[row, r + k]
            for j in range(w):
                a = np.float64(ua[j])
                b = np.float64(ub[j])
                uk = a + b
                q1[j] += uk * (d1 * uk - 2.0 * a)
                q2[j] += uk * (d2 * uk - 2.0 * b)
        for j in range(w):
            rr1 = np.float64(rrg[0, j])
            rr2 = np.float64(rrg[1, j])
            f1 = 1e-7 * rr1 if rr1 > 0.0 else 1e-300
            f2 = 1e-7 * rr2 if rr2 > 0.0 else 1e-300
            a = q1[j] if q1[j] > f1 else f1     # float32 cancellation; never negative
            b = q2[j] if q2[j] > f2 else f2
            w1[j] = tr1 / a
            w2[j] = tr2 / b
            sdav[i, j] = np.sqrt(0.5 * (a / tr1 + b / tr2))
            trw = n1 * w1[j] + n2 * w2[j]
            x1 = 1.0 - n1 * w1[j] / trw
            x2 = 1.0 - n2 * w2[j] / trw
            ysum = x1 * x1 / tr1 + x2 * x2 / tr2
            nu[i, j] = 1.0 / ysum if ysum > 0.0 else 1e300
        for k in range(r):
            d1 = M[0, k, k]
            d2 = M[1, k, k]
            c = K[0, k]
            if c == 0.0:
                continue
            ua = U[row, k]
            ub = U[row, r + k]
            for j in range(w):
                ia = 1.0 / (w1[j] * d1 + w2[j] * d2)
                ee[j] += c * (w1[j] * np.float64(ua[j]) + w2[j] * np.float64(ub[j])) * ia
                vv[j] += c * c * ia
        for j in range(w):
            sej = np.sqrt(vv[j]) if vv[j] > 0.0 else 0.0
            se[i, j] = sej
            est[i, j] = ee[j]
            stat[i, j] = ee[j] / sej if sej > 0.0 else 0.0


@njit(**_JIT)
def _wald(V, e, L, y, s):
    """``e' V^-1 e`` through the Cholesky factor of the s x s ``V``."""
    for a in range(s):
        for c in range(a + 1):
            acc = V[a, c]
            for m in range(c):
                acc -= L[a, m] * L[c, m]
            if a == c:
                L[a, a] = np.sqrt(acc) if acc > 0.0 else 1e-300
            else:
                L[a, c] = acc / L[c, c]
    q = 0.0
    for a in range(s):
        acc = e[a]
        for m in range(a):
            acc -= L[a, m] * y[m]
        y[a] = acc / L[a, a]
        q += y[a] * y[a]
    return q


#: features per tile of :func:`_vg_rows`: the tile's work arrays stay in the core's cache
_TILE = 256


@njit(**_JIT)
def _vg_tile(U, row, j0, w, rrg, M, K, tr, sizes, stat, nu, est, se, sdav, i, views):
    """One row's statistic on the features ``j0 .. j0 + w - 1`` (:func:`_vg_rows`)."""
    Kn = M.shape[0]
    r = M.shape[1]
    s = K.shape[0]
    ut, ug, wg, A, L, bv, KX, V, e, tmp = views
    for k in range(r):
        for j in range(w):
            ut[k, j] = 0.0
    for g in range(Kn):
        for k in range(r):
            src = U[row, g * r + k, j0:j0 + w]
            dst = ug[g, k]
            acc = ut[k]
            for j in range(w):
                v = np.float64(src[j])
                dst[j] = v
                acc[j] += v
    for j in range(w):
        tmp[0, j] = 0.0                       # mean group variance
        tmp[1, j] = 0.0                       # tr(W) = sum_g n_g w_g
    for g in range(Kn):
        q = tmp[2]
        for j in range(w):
            q[j] = np.float64(rrg[g, j0 + j])
        for k in range(r):
            ugk = ug[g, k]
            utk = ut[k]
            for j in range(w):
                q[j] -= 2.0 * ugk[j] * utk[j]
            for l in range(r):
                m = M[g, k, l]
                if m != 0.0:
                    utl = ut[l]
                    for j in range(w):
                        q[j] += m * utk[j] * utl[j]
        wgg = wg[g]
        trg = tr[g]
        ng = sizes[g]
        for j in range(w):
            rr = np.float64(rrg[g, j0 + j])
            floor = 1e-7 * rr if rr > 0.0 else 1e-300
            rss = q[j] if q[j] > floor else floor    # float32 cancellation
            wgg[j] = trg / rss
            tmp[0, j] += rss / trg
            tmp[1, j] += ng * wgg[j]
    # A = sum_g w_g M_g, bv = sum_g w_g U_g
    for k in range(r):
        for l in range(k + 1):
            akl = A[k, l]
            for j in range(w):
                akl[j] = 0.0
            for g in range(Kn):
                m = M[g, k, l]
                if m != 0.0:
                    wgg = wg[g]
                    for j in range(w):
                        akl[j] += m * wgg[j]
        bk = bv[k]
        for j in range(w):
            bk[j] = 0.0
        for g in range(Kn):
            wgg = wg[g]
            ugk = ug[g, k]
            for j in range(w):
                bk[j] += wgg[j] * ugk[j]
    _chol_rows(A, L, r, w)
    # KX[c] = A^-1 K[c]'; V = K KX; e = KX' bv
    for c in range(s):
        _solve_rows(L, K[c], KX[c], r, w)
    for a in range(s):
        ea = e[a]
        for j in range(w):
            ea[j] = 0.0
        for k in range(r):
            xk = KX[a, k]
            bk = bv[k]
            for j in range(w):
                ea[j] += xk[j] * bk[j]
        for c in range(a + 1):
            vac = V[a, c]
            for j in range(w):
                vac[j] = 0.0
            for k in range(r):
                kak = K[a, k]
                if kak != 0.0:
                    xk = KX[c, k]
                    for j in range(w):
                        vac[j] += kak * xk[j]
    ysum = tmp[2]
    for j in range(w):
        ysum[j] = 0.0
    for g in range(Kn):
        wgg = wg[g]
        ng = sizes[g]
        trg = tr[g]
        for j in range(w):
            d = 1.0 - ng * wgg[j] / tmp[1, j]
            ysum[j] += d * d / trg
    for j in range(w):
        y = ysum[j] if ysum[j] > 0.0 else 1e-300
        nu[i, j0 + j] = s * (s + 2.0) / (3.0 * y)
        v00 = V[0, 0, j]
        sej = np.sqrt(v00) if v00 > 0.0 else 0.0
        se[i, j0 + j] = sej
        est[i, j0 + j] = e[0, j]
        sdav[i, j0 + j] = np.sqrt(tmp[0, j] / Kn)
        if s == 1:
            stat[i, j0 + j] = e[0, j] / sej if sej > 0.0 else 0.0
    if s > 1:
        _g_rows(V, e, ysum, s, w, L, tmp, stat[i, j0:j0 + w])


@njit(**_JIT)
def _views(ws, Kn, r, s, w):
    """The work arrays of :func:`_vg_rows`, carved from one flat float64 array."""
    sizes = (r * w, Kn * r * w, Kn * w, r * r * w, r * r * w, r * w, s * r * w, s * s * w,
             s * w, 3 * w)
    out = []
    a = 0
    for n in sizes:
        out.append(ws[a:a + n])
        a += n
    return (out[0].reshape((r, w)), out[1].reshape((Kn, r, w)), out[2].reshape((Kn, w)),
            out[3].reshape((r, r, w)), out[4].reshape((r, r, w)), out[5].reshape((r, w)),
            out[6].reshape((s, r, w)), out[7].reshape((s, s, w)), out[8].reshape((s, w)),
            out[9].reshape((3, w)))


def vg_workspace(Kn, r, s, w):
    """The flat work array :func:`_vg_rows` needs for ``w`` features."""
    return np.empty(max((r + Kn * r + Kn + 2 * r * r + r + s * r + s * s + s + 3) * w
                        + max(s, r) * max(s, r) * w, 6 * w))


@njit(**_JIT)
def _chol_rows(A, L, r, w):
    """Cholesky factors ``L[:, :, j]`` of ``A[:, :, j]`` (lower triangles used)."""
    for k in range(r):
        for l in range(k + 1):
            lkl = L[k, l]
            akl = A[k, l]
            for j in range(w):
                lkl[j] = akl[j]
            for m in range(l):
                lkm = L[k, m]
                llm = L[l, m]
                for j in range(w):
                    lkl[j] -= lkm[j] * llm[j]
            if k == l:
                for j in range(w):
                    lkl[j] = np.sqrt(lkl[j]) if lkl[j] > 0.0 else 1e-300
            else:
                lll = L[l, l]
                for j in range(w):
                    lkl[j] /= lll[j]


@njit(**_JIT)
def _solve_rows(L, b, out, r, w):
    """``out[:, j] = (L L')^-1 b`` per feature, ``b`` (r,) shared by every feature."""
    for k in range(r):
        ok = out[k]
        bk = b[k]
        for j in range(w):
            ok[j] = bk
        for m in range(k):
            lkm = L[k, m]
            om = out[m]
            for j in range(w):
                ok[j] -= lkm[j] * om[j]
        lkk = L[k, k]
        for j in range(w):
            ok[j] /= lkk[j]
    for k in range(r - 1, -1, -1):
        ok = out[k]
        for m in range(k + 1, r):
            lmk = L[m, k]
            om = out[m]
            for j in range(w):
                ok[j] -= lmk[j] * om[j]
        lkk = L[k, k]
        for j in range(w):
            ok[j] /= lkk[j]


@njit(**_JIT)
def _g_rows(V, e, ysum, s, w, L, tmp, stat):
    """G = e' V^-1 e / (Lambda s) per feature (s > 1), into ``stat``; ``L`` and ``tmp``
    are scratch."""
    for j in range(w):
        for a in range(s):
            for c in range(a + 1):
                acc = V[a, c, j]
                for m in range(c):
                    acc -= L[a, m, j] * L[c, m, j]
                if a == c:
                    L[a, a, j] = np.sqrt(acc) if acc > 0.0 else 1e-300
                else:
                    L[a, c, j] = acc / L[c, c, j]
        q = 0.0
        for a in range(s):                    # forward solve L y = e (y in tmp[1]); q = y'y
            acc = e[a, j]
            for m in range(a):
                acc -= L[a, m, j] * tmp[1, m]
            yv = acc / L[a, a, j]
            tmp[1, a] = yv
            q += yv * yv
        lam = 1.0 + 2.0 * (s - 1.0) * ysum[j] / (s * (s + 2.0))
        stat[j] = q / (lam * s)


@njit(**_JIT)
def _chol_solve(L, b, out):
    """``out = (L L')^-1 b`` for lower-triangular ``L``."""
    n = L.shape[0]
    for k in range(n):
        acc = b[k]
        for m in range(k):
            acc -= L[k, m] * out[m]
        out[k] = acc / L[k, k]
    for k in range(n - 1, -1, -1):
        acc = out[k]
        for m in range(k + 1, n):
            acc -= L[m, k] * out[m]
        out[k] = acc / L[k, k]


def v_to_z(v, nu):
    """z of equal one-sided tail probability for v with nu df (sign of v): Hill's
    transformation where it is accurate (nu >= 4, |z| < 3), the exact tail elsewhere --
    the same function for the observed map and every resample."""
    v = np.asarray(v, float)
    nu = np.asarray(nu, float)
    with np.errstate(invalid="ignore", divide="ignore"):
        z = hill_z(v, np.maximum(nu, _HILL_MIN_DF))
    exact = (np.abs(z) >= _Z_EXACT) | (nu < _HILL_MIN_DF) | ~np.isfinite(z)
    if exact.any():
        z[exact] = z_of_t(v[exact], nu[exact])
    return z


def statistic_z(stat, nu, s):
    """The z used for maps and maxima: of v (s = 1) or of G with (s, nu) df."""
    return v_to_z(stat, nu) if s == 1 else z_of_f(stat, s, nu)


@dataclass
class GroupContrast:
    """Observed per-feature results (float64, flat features)."""

    statistic: np.ndarray   # v (s = 1) or G
    nu: np.ndarray
    z: np.ndarray
    estimate: np.ndarray    # C psi, first row
    se: np.ndarray
    sd_mean: np.ndarray     # root of the unweighted mean group variance
    degenerate: np.ndarray


def group_contrast(Y, X, contrast, groups, chunk=8192) -> GroupContrast:
    """Welch's v or G at every feature of ``Y`` (N, F), float64 (module docstring)."""
    d = group_design(X, contrast, groups)
    Y = np.asarray(Y) if not isinstance(Y, np.memmap) else Y
    F = Y.shape[1]
    out = {k: np.zeros(F) for k in ("stat", "nu", "est", "se", "sd")}
    bad = np.zeros(F, bool)
    Qx = d.Qext
    for a in range(0, F, chunk):
        b = min(F, a + chunk)
        y = np.asarray(Y[:, a:b], np.float64)
        rz = y - d.q_nuisance @ (d.q_nuisance.T @ y)
        U = (Qx.T @ rz)[None]                                      # (1, K r, f)
        rrg = np.stack([(rz[d.codes == g] ** 2).sum(axis=0) for g in range(len(d.tr))])
        parts = [np.zeros((1, b - a)) for _ in range(5)]
        _vg_rows(U, 0, 1, b - a, rrg, d.M, d.K, d.tr, d.sizes, *parts,
                 vg_workspace(len(d.tr), d.Q.shape[1], d.s, b - a))
        for key, part in zip(("stat", "nu", "est", "se", "sd"), parts):
            out[key][a:b] = part[0]
        bad[a:b] = _degenerate_groups(y, d)
        if isinstance(Y, np.memmap):
            _release(Y)
    for key in ("stat", "nu"):
        out[key][bad] = np.nan
    z = np.full(F, np.nan)
    ok = ~bad
    z[ok] = statistic_z(out["stat"][ok], out["nu"][ok], d.s)
    se = np.where(bad, 0.0, out["se"])
    return GroupContrast(out["stat"], out["nu"], z, out["est"], se, out["sd"], bad)


def weighted_residuals(Y, d: GroupDesign, allocate=None, chunk=8192):
    """Residuals (float32, like ``Y`` (N, F)) of the model restricted to ``C b = 0``,
    fitted at every feature by weighted least squares with the weights the statistic
    gives that feature's observed data (``w_g = tr_g / e_g'e_g``, OLS residuals of the
    full model) -- Freedman-Lane in the statistic's metric, as the mixed model does in
    its own (module docstring).  ``allocate(shape)`` gives the output array."""
    N, F = Y.shape
    R = np.empty((N, F), np.float32) if allocate is None else allocate((N, F))
    Z, Q, codes = d.q_nuisance, d.Q, d.codes
    for a in range(0, F, chunk):
        y = np.asarray(Y[:, a:a + chunk], np.float64)
        e = y - Q @ (Q.T @ y)
        rss = np.stack([(e[codes == g] ** 2).sum(axis=0) for g in range(len(d.tr))])
        floor = 1e-300 + 1e-14 * np.maximum((y * y).sum(axis=0), 1e-300)
        w = (d.tr[:, None] / np.maximum(rss, floor))[codes]               # (N, f)
        ZWZ = np.einsum("nk,nf,nl->fkl", Z, w, Z)
        ZWy = np.einsum("nk,nf->fk", Z, w * y)
        b = np.linalg.solve(ZWZ, ZWy[..., None])[..., 0]                  # (f, r0)
        R[:, a:a + chunk] = y - Z @ b.T
        _release(Y)
        _release(R)
    return R


def _degenerate_groups(y, d: GroupDesign):
    """Features where some group has no residual variance (float64, (f,)): the weights
    would be infinite; the same rule as :func:`.glm.degenerate`, group by group."""
    H = d.Q @ d.Q.T
    e = y - H @ y
    bad = np.zeros(y.shape[1], bool)
    for g in range(len(d.tr)):
        rows = d.codes == g
        bad |= glm.degenerate((e[rows] ** 2).sum(axis=0), (y[rows] ** 2).sum(axis=0))
    return bad


class GroupVarianceKernel(OLSKernel):
    """The GLM contrast with variance groups: v or G as z, sign flips of the
    Freedman-Lane residuals (module docstring).  Products, blocks, chunks, lists and
    threads are those of :class:`.ols.OLSKernel`; only the statistic after each
    product differs (:meth:`_stat_block`).

    Parameters
    ----------
    Y : (N, n_features) float32 data; X : (N, p) design; contrast : (p,) or (k, p);
    groups : (N,) variance-group labels; info : dict for the run record (the grouping
    column, the levels' sizes, why the groups are used).
    """

    #: resampled maps need the exact z only at or above this |v| (set by inference for
    #: cluster corrections, whose scores read only points beyond the forming threshold;
    #: 0 -- every point -- for TFCE and max-stat; see :func:`_hill_rows`)
    z_floor = 0.0

    def __init__(self, Y, X, contrast, groups, *, info=None):
        super().__init__(Y, X, contrast, scheme="sign-flip")
        self.groups = np.asarray(groups).astype(str)
        self.design = group_design(self.X, self.C, self.groups)
        self.s = self.design.s
        self.group_info = dict(info or {})
        self._scratch = PerThread()
        self.df = (float("nan"),) if self.kind == "t" else (self.s, float("nan"))

    # -- observed -------------------------------------------------------------
    def observed(self, tails):
        gc = group_contrast(self.Y, self.X, self.C, self.groups)
        self._degenerate = gc.degenerate
        nuf = gc.nu[np.isfinite(gc.nu)]
        med = round(float(np.median(nuf)), 3) if nuf.size else 0.0
        self.df = (med,) if self.kind == "t" else (self.s, med)
        if self.kind == "t":
            if tails == "two":
                p = np.minimum(1.0, 2.0 * special.stdtr(gc.nu, -np.abs(gc.statistic)))
            elif tails == "greater":
                p = special.stdtr(gc.nu, -gc.statistic)
            else:
                p = special.stdtr(gc.nu, gc.statistic)
            est, se = gc.estimate, gc.se
            effect = np.where(gc.sd_mean > 0, gc.estimate / np.where(gc.sd_mean > 0,
                                                                     gc.sd_mean, 1.0), np.nan)
        else:
            p = special.fdtrc(self.s, gc.nu, np.maximum(gc.statistic, 0.0))
            est = se = np.full(self.n_features, np.nan)
            effect = gc.statistic * self.s / (gc.statistic * self.s + gc.nu)
        p = np.where(gc.degenerate, np.nan, p)
        effect = np.where(gc.degenerate, np.nan, effect)
        return Observed(self.kind, self.df, gc.z, est, se, effect, p, scale="z",
                        test_statistic=gc.statistic, df_map=gc.nu)

    def threshold(self, forming_p, tails):
        """The cluster-forming threshold on the z scale (the same for every feature)."""
        if self.kind == "t" and tails == "two":
            return float(-special.ndtri(forming_p / 2.0))
        return float(-special.ndtri(forming_p))

    def info(self):
        b = self.basis
        return FitInfo("ordinary least squares with variance groups (weighted by group)",
                       float(self.df[-1]), int(b.rank), int(b.q_nuisance.shape[1]))

    def describe(self):
        return {"statistic": "welch_v" if self.kind == "t" else "G",
                "df_rule": "welch_satterthwaite", "effect_size": "d_mean_group_variance",
                "variance_groups": self.group_info or None}

    # -- resampling -----------------------------------------------------------
    def rearrangements(self, n_resamples, seed, blocks=None):
        return sign_flips(self.Y.shape[0], int(n_resamples), seed)

    def prepare(self, rearr):
        """Freedman-Lane residuals in the statistic's own metric (always: the flips move
        the nuisance space unless it is empty; :func:`weighted_residuals`), their
        per-group sums of squares, the extended basis."""
        d, Yf = self.design, self.Y
        self.rearr = rearr
        self.freedman_lane = d.q_nuisance.shape[1] > 0
        R = weighted_residuals(Yf, d, allocate=self.allocate) if self.freedman_lane else Yf
        Kn = len(d.tr)
        rrg = np.zeros((Kn, self.n_features), np.float32)
        for a in range(0, self.n_features, 8192):
            r = np.asarray(R[:, a:a + 8192], np.float64)
            for g in range(Kn):
                rrg[g, a:a + 8192] = (r[d.codes == g] ** 2).sum(axis=0)
            _release(R)
        if getattr(self, "_degenerate", None) is None:
            self._degenerate = group_contrast(Yf, self.X, self.C, self.groups).degenerate
        self.degenerate = self._degenerate
        self.rrg = rrg
        self.R, self.Q = R, d.Qext.astype(np.float32)
        self.fc = min(self.feature_chunk(), self.n_features)
        self._Md, self._Kd = d.M.astype(np.float64), d.K.astype(np.float64)

    def feature_chunk(self):
        from . import ols
        return ols.FEATURE_CHUNK

    @property
    def scheme_name(self):
        return "sign-flip" + (" / Freedman-Lane" if self.freedman_lane else "")

    def _stat_block(self, U, u_lo, n_rows, a, b, out, o_lo, o_col):
        """z of v or G for ``n_rows`` rows of one product block (features a..b-1)."""
        w = b - a
        d = self.design
        r = d.Q.shape[1]
        fc = self.fc
        ws, parts = self._scratch.get(
            lambda: (vg_workspace(len(d.tr), r, self.s, fc),
                     [np.empty((self.block, fc)) for _ in range(5)]),
            fits=lambda v: v[1][0].shape[0] >= self.block)
        _vg_rows(U, u_lo, n_rows, w, self.rrg[:, a:b], self._Md, self._Kd, d.tr, d.sizes,
                 *parts, ws)
        stat, nu = parts[0], parts[1]
        if self.s == 1:
            n_exact = _hill_rows(stat, nu, n_rows, w, self.degenerate[a:b], out, o_lo, o_col,
                                 self.z_floor)
            if n_exact:                  # the few values the approximation does not cover
                blk = out[o_lo:o_lo + n_rows, o_col:o_col + w]
                ii, jj = np.nonzero(np.isnan(blk))
                blk[ii, jj] = z_of_t(stat[ii, jj], nu[ii, jj])
        else:
            z = z_of_f(stat[:n_rows, :w], self.s, nu[:n_rows, :w])
            z[:, self.degenerate[a:b]] = 0.0
            out[o_lo:o_lo + n_rows, o_col:o_col + w] = z


@njit(**_JIT)
def _hill_rows(stat, nu, n_rows, w, degenerate, out, o_lo, o_col, floor):
    """``out[o_lo + i, o_col + j]`` = the z of v = ``stat[i, j]`` with ``nu[i, j]`` df by
    Hill's transformation (the formula of :func:`.mixed.inference.hill_z`), 0 at
    degenerate features, NaN where the exact tail is needed (nu < 4 or |z| >= 3);
    returns how many NaN were written.  Where |v| < ``floor`` v itself is written: a
    t's z is never larger than the t (its tails are heavier), so such a point stays
    below a threshold of ``floor`` either way (:attr:`GroupVarianceKernel.z_floor`)."""
    n_exact = 0
    for i in range(n_rows):
        o = out[o_lo + i]
        for j in range(w):
            if degenerate[j]:
                o[o_col + j] = 0.0
                continue
            t = stat[i, j]
            if t < floor and -t < floor:
                o[o_col + j] = t
                continue
            v = nu[i, j]
            a = v - 0.5
            b = 48.0 * a * a
            z2 = a * np.log1p(t * t / v)
            z = np.sqrt(z2)
            z = (((((-0.4 * z2 - 3.3) * z2 - 24.0) * z2 - 85.5)
                  / (0.8 * z2 * z2 + 100.0 + b) + z2 + 3.0) / b + 1.0) * z
            if v < _HILL_MIN_DF or z >= _Z_EXACT or not np.isfinite(z):
                o[o_col + j] = np.nan
                n_exact += 1
            else:
                o[o_col + j] = z if t >= 0.0 else -z
    return n_exact
