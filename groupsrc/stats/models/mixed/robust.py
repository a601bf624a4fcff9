"""Variance groups in the mixed model: a participant-level CR2 cluster-robust statistic.

Why (see DEVELOPERS.md, "The mixed model").  When groups of participants differ in
their variances (patients more variable than controls) and in size, the model-based
standard error, which pools one residual and one participant variance over everyone,
is wrong in the Behrens-Fisher way for between effects, and for within effects whose
condition differences vary more in one group.  The cluster-robust ("sandwich")
variance with participants as clusters is right whatever each participant's
covariance, as long as participants are independent; its bias-reduced form CR2 (Bell
& McCaffrey 2002, Survey Methodology 28:169-181; Pustejovsky & Tipton 2018, J Bus
Econ Stat 36:672-683; both cited from memory) is exactly unbiased when the working
covariance is right, and close otherwise.  The model's fit still chooses the GLS
weights (the working covariance), so efficiency is kept where the model is right.

Notation (the model's of :mod:`.model`; whitened quantities carry a tilde: ``X~_i =
Vbar_i^(-1/2) X_i``):

* ``C = (X'Vbar^-1 X)^-1``, ``beta = C X'Vbar^-1 y``, full-model residuals
  ``e~ = (I - H~) y~`` with ``H~ = X~ C X~'``;
* CR2 adjustment ``A_i = (I - H~_ii)^(-1/2)`` (symmetric root);
* ``u_i = X~_i' A_i e~_i`` (p per participant), ``V_CR2 = C (sum_i u_i u_i') C``;
* t: ``L beta / sqrt(L V_CR2 L')``; F (k rows): ``(L beta)' (L V_CR2 L')^-1 (L beta) / k``.

Everything a participant contributes is a function of its score ``h_i = X_i'Vbar_i^-1
y_i`` and of the design: ``u_i = rho_i - K_i C h`` with ``rho_i = X~_i' A_i y~_i`` and
``K_i = X~_i' A_i X~_i`` (:func:`participant_parts`; ``A_i`` acts inside the span of
participant i's design, as in :mod:`.leverage`), ``h = sum_i h_i``.  The same holds
for any vector whose full-model residual is ``e~`` -- in particular the Freedman-Lane
restricted residuals and their whole-participant sign flips.

Sign flips (the only rearrangement with variance groups: participants of different
variance are not exchangeable, but symmetric).  For flips ``s`` of the (leverage-
adjusted) restricted residual scores ``h*_i``, in the coordinates ``g = L_A^-1 h``
(``L_A`` the Cholesky factor of ``C^-1``) and with ``a`` the orthonormal effect
directions there::

    c_i = s_i Phi_i - Kt_i' g,   Phi_i = a' L_A^-1 rho_i,   Kt_i = L_A^-1 K_i L_A^-T a
    M   = sum_i c_i c_i' = P0 - T(g) - T(g)' + Q(g, g),   U = a' g

with ``P0 = sum_i Phi_i Phi_i'``, ``T(g)[j, l] = sum_x (sum_i s_i Phi_i[j] Kt_i[x, l]) g_x``
(one more product of the flips with per-participant data, beside the one giving
``g``) and ``Q(g, g)[j, l] = g' (sum_i Kt_i[:, j] Kt_i[:, l]') g`` (a fixed tensor per
feature).  Per resample and feature that is ``(1 + k^2) p`` products' columns
instead of ``p``, and ``O(k^2 p^2)`` arithmetic.

Degrees of freedom (for the parametric p and for the z of equal p that puts features
on one scale; the sign-flip test does not rest on them).  Bell & McCaffrey's
Satterthwaite df of ``V_CR2`` for a direction ``l``: ``c_i = alpha_i' y~`` with
``alpha_i = (I - H~) E_i A_i X~_i C l``; under a working covariance ``Omega``
(participant i's maps scaled by ``omega_i``), ``nu = (tr M)^2 / tr(M^2)``,
``M_ij = alpha_i' Omega alpha_j``.  With ``d_i = l'C X~_i'A_i^2 X~_i C l``,
``kappa_i = K_i C l`` and ``B = sum_k omega_k X~_k'X~_k``::

    M_ij = delta_ij omega_i d_i - (omega_i + omega_j) kappa_i'C kappa_j
           + kappa_i' C B C kappa_j

(``O(N^2)`` per feature, once).  ``omega_i`` is the residual variance of i's variance
group relative to the pooled one, estimated from the CR2-adjusted residuals (an
"empirical" working model: with equal omegas these are the df of the working model,
which overstate the df when the groups' variances differ, as Welch's df do not).  For
F: one df per eigen-direction of ``L C L'`` combined by the Fai & Cornelius rule, as
for the model-based F (:mod:`.inference`).
"""

from __future__ import annotations

import numpy as np

from . import linalg as la


class SpanParts:
    """What the CR2 adjustment needs of one chunk of features at fixed weights (design and
    variance components only), in the coordinates of ``L_A``.

    With participant i's design ``X_i = Q_i R_i`` (:class:`~.leverage.ParticipantSpans`),
    ``S_i = Q_i'Vbar_i^-1 Q_i = L_S L_S'`` and ``Y`` an orthonormal basis of the whitened
    span: ``X~_i = Y L_S' R_i``; in ``g``-coordinates the span is ``B_i = L_A^-1 R_i' L_S``
    (p x r), ``H~_ii = Y B_i'B_i Y'`` and ``B_i'B_i = W diag(lam) W'``, so ``A_i = I + Y W
    diag(psi) W' Y'`` with ``psi = (1 - lam)^(-1/2) - 1``."""

    def __init__(self, spans, Ki, LA):
        R, ZQ = spans.R, spans.ZQ                                   # (N, r, p), (q, N, r)
        r = R.shape[1]
        S = la.eye_like(r, (1, 1)) - np.einsum("aij,abif,bik->jkif", ZQ, Ki, ZQ)
        self.LS, _ = la.chol(S)
        RL = np.einsum("ijk,jlif->klif", R, self.LS)                # R_i' L_S (p, r, N, f)
        LAb = LA[:, :, None, :]
        self.B = np.stack([la.solve_lower(LAb, RL[:, a]) for a in range(r)], axis=1)
        E = np.einsum("xaif,xbif->abif", self.B, self.B)
        lam, self.W = np.linalg.eigh(np.moveaxis(E, (0, 1), (-2, -1)))    # (N, f, r)
        self.leverage = lam.sum(axis=-1)                            # tr H~_ii (N, f)
        lam = np.clip(lam, 0.0, 1.0 - 1e-3)
        self.half = 1.0 / np.sqrt(1.0 - lam) - 1.0
        self.full = 1.0 / (1.0 - lam) - 1.0
        self.spans = spans
        BW = np.einsum("xaif,ifab->xbif", self.B, self.W)
        BB = np.einsum("xaif,yaif->xyif", self.B, self.B)
        self.K = BB + np.einsum("xbif,ifb,ybif->xyif", BW, self.half, BW)
        self.D = BB + np.einsum("xbif,ifb,ybif->xyif", BW, self.full, BW)

    def adjusted_residuals(self, h_e):
        """For the full-model residual scores ``h_e`` (p, N, f) (``X_i'Vbar_i^-1 e_i``):
        the scores of the CR2-adjusted residuals ``r*_i = Vbar_i^(1/2) A_i e~_i`` in data
        units, ``X_i'Vbar_i^-1 r*_i = X~_i'A_i e~_i`` (p, N, f), and their ``rho~``
        (``L_A^-1 X~_i'A_i A_i e~_i``)."""
        R = self.spans.R
        y = la.solve_lower(self.LS, self.spans.RRinv.T[:, :, None]
                           * np.einsum("ijk,kif->jif", R, h_e))     # Y' e~_i
        Wy = np.einsum("ifab,aif->ifb", self.W, y)
        z1 = y + np.einsum("ifab,ifb->aif", self.W, Wy * self.half)   # A_i on the span
        z2 = y + np.einsum("ifab,ifb->aif", self.W, Wy * self.full)   # A_i^2
        RL = np.einsum("ijk,jlif->klif", R, self.LS)                  # R_i' L_S
        return np.einsum("xaif,aif->xif", RL, z1), np.einsum("xaif,aif->xif", self.B, z2)

    def rho(self, h):
        """``L_A^-1 X~_i' A_i y~_i`` (p, N, f) from the participant scores ``h_i = X_i'
        Vbar_i^-1 y_i`` (p, N, f)."""
        R = self.spans.R
        y = la.solve_lower(self.LS, self.spans.RRinv.T[:, :, None]
                           * np.einsum("ijk,kif->jif", R, h))       # Y' y~_i
        Wy = np.einsum("ifab,aif->ifb", self.W, y)
        z = y + np.einsum("ifab,ifb->aif", self.W, Wy * self.half)
        return np.einsum("xaif,aif->xif", self.B, z)


def meat(Phi, Kt, g, s=None):
    """``M = sum_i c_i c_i'`` (k, k, f), ``c_i = s_i Phi_i - Kt_i' g``: Phi (k, N, f),
    Kt (p, k, N, f), g (p, f); ``s`` (N,) signs (default +1).  Direct form, for the
    observed data and for tests."""
    sPhi = Phi if s is None else Phi * np.asarray(s, float)[None, :, None]
    c = sPhi - np.einsum("xjif,xf->jif", Kt, g)
    return np.einsum("jif,lif->jlf", c, c)


def bm_coefficients(d, kappa, Bg, codes, G):
    """Bell & McCaffrey df as a function of the variance groups' scales ``omega_g``:
    ``nu = (a'omega)^2 / (omega' b omega)`` (module docstring), per feature, for one
    direction: ``d`` (N, f), ``kappa`` (p, N, f), ``Bg`` (G, p, p, f) the groups' sums of
    ``X~_k'X~_k``, all in the coordinates of ``L_A``; returns ``a`` (G, f), ``b`` (G, G, f)."""
    kk = np.einsum("xif,xjf->ijf", kappa, kappa)                 # kappa_i' C kappa_j
    N = kk.shape[0]
    onehot = (codes[None, :] == np.arange(G)[:, None]).astype(float)       # (G, N)
    idx = np.arange(N)
    Ms = []
    for g in range(G):
        Bk = np.einsum("xyf,yjf->xjf", Bg[g], kappa)
        M = np.einsum("xif,xjf->ijf", kappa, Bk) \
            - (onehot[g][:, None, None] + onehot[g][None, :, None]) * kk
        M[idx, idx] += onehot[g][:, None] * d
        Ms.append(M)
    a = np.stack([np.einsum("iif->f", M) for M in Ms])
    b = np.stack([np.stack([np.einsum("ijf,ijf->f", Mg, Mh) for Mh in Ms]) for Mg in Ms])
    return a, b


def bm_nu(a, b, omega):
    """``(a'omega)^2 / (omega' b omega)`` over the leading group axis (any trailing axes)."""
    num = np.einsum("g...,g...->...", a, omega)
    den = np.einsum("g...,gh...,h...->...", omega, b, omega)
    return np.where(den > 0, num * num / np.where(den > 0, den, 1.0), 1.0)


def directions(LA, Lmat):
    """Orthonormal effect directions ``a`` (p, k, f) in the coordinates of ``L_A``."""
    p, k, f = Lmat.shape[1], Lmat.shape[0], LA.shape[2]
    At = la.solve_lower(LA[:, :, None, :], np.broadcast_to(Lmat.T[:, :, None], (p, k, f)))
    return la.orthonormal_columns(At)


def fai_cornelius(nus, k):
    """Combined denominator df of an F from one df per direction (Fai & Cornelius 1996,
    as :mod:`.inference` applies it)."""
    if k == 1:
        return nus[0]
    Esum = np.where(nus > 2, nus / np.where(nus > 2, nus - 2, 1.0), 0.0).sum(axis=0)
    return np.where(Esum > k, 2 * Esum / np.where(Esum > k, Esum - k, 1.0), nus.min(axis=0))


class Design:
    """Per-participant design products the robust statistic needs (once per kernel)."""

    def __init__(self, core, groups):
        from scipy import sparse
        X, g, N, p, n = core.X, core.groups, core.N, core.p, core.n
        rows = (g[:, None] * p + np.arange(p)[None, :]).ravel()
        self.Sx = sparse.csr_matrix((X.ravel(), (rows, np.repeat(np.arange(n), p))),
                                    shape=(N * p, n))
        self.XX = np.zeros((N, p, p))
        np.add.at(self.XX, g, X[:, :, None] * X[:, None, :])
        from .leverage import ParticipantSpans
        self.spans = ParticipantSpans(core)
        _, codes = np.unique(np.asarray(groups).astype(str), return_inverse=True)
        self.codes = codes.reshape(-1)
        self.G = int(self.codes.max()) + 1
        self.sizes = np.bincount(g, minlength=N).astype(float)
        self.core = core

    def group_sum(self, x):
        """Sum over each variance group's participants: (..., N, f) -> (G, ..., f)."""
        return np.stack([x[..., self.codes == g, :].sum(axis=-2) for g in range(self.G)])

    def scores(self, Yc, st, Ki):
        """``h_i = X_i'Vbar_i^-1 y_i`` (p, N, f)."""
        core = self.core
        N, p, f = core.N, core.p, Yc.shape[1]
        Xy = np.asarray(self.Sx @ Yc).reshape(N, p, f).transpose(1, 0, 2)
        return Xy - np.einsum("aik,abif,bif->kif", core.H, Ki, st.u)


def robust_block(rd: Design, psi, Yc, Lmat, reml):
    """The CR2 statistic of contrast rows ``Lmat`` (k, p) on the features ``Yc`` (n, f),
    GLS-weighted at the variance components ``psi``: a dict with ``est`` (k, f), ``se``
    (f, one row), ``stat`` (t or F), ``nu`` (f), the ``live`` mask and, for the
    resampling, ``parts`` (:class:`SpanParts`), ``a``, ``LA``, ``Ki``, ``omega``."""
    core = rd.core
    Yc = np.asarray(Yc, np.float64)
    st = core.stats(Yc)
    ev = core.evaluate(psi, st, reml, order=0)
    live = ev.ok
    p, f, k = core.p, Yc.shape[1], Lmat.shape[0]
    LA = np.where(live, ev.LA, np.eye(p)[:, :, None])
    Ki = ev.Kc[:, :, core.cls]
    h = rd.scores(Yc, st, Ki)
    parts = SpanParts(rd.spans, Ki, LA)
    g = la.solve_lower(LA, h.sum(axis=1))
    a = directions(LA, Lmat)
    rho = parts.rho(h)
    Phi = np.einsum("xjf,xif->jif", a, rho)
    Kt = np.einsum("xyif,yjf->xjif", parts.K, a)
    M = meat(Phi, Kt, g)
    U = np.einsum("xjf,xf->jf", a, g)
    # the variance groups: residual sums of squares, residual df, and the df's coefficients
    beta = ev.beta
    XWX = rd.XX.transpose(1, 2, 0)[..., None] - np.einsum(
        "aik,abif,bil->klif", core.H, Ki, core.H)                       # (p, p, N, f)
    yy = np.asarray(core.onehot @ (Yc * Yc))
    yWy = yy - np.einsum("aif,abif,bif->if", st.u, Ki, st.u)
    ess = yWy - 2 * np.einsum("kf,kif->if", beta, h) \
        + np.einsum("kf,klif,lf->if", beta, XWX, beta)
    rdf = rd.group_sum(np.maximum(rd.sizes[:, None] - parts.leverage, 1e-6))   # (G, f)
    ss_groups = rd.group_sum(np.maximum(ess, 0.0))
    omega = ss_groups / rdf
    XWXg = rd.group_sum(XWX)                                            # (G, p, p, f)
    Bg = np.stack([_sandwich_inv(LA, XWXg[g]) for g in range(rd.G)])   # L_A^-1 . L_A^-T
    coef = [bm_coefficients(np.einsum("xf,xyif,yf->if", a[:, j], parts.D, a[:, j]),
                            Kt[:, j], Bg, rd.codes, rd.G) for j in range(k)]
    nus = np.stack([bm_nu(ca, cb, omega) for ca, cb in coef])
    nu = fai_cornelius(nus, k)
    scale = np.sqrt((la.solve_lower(LA, np.broadcast_to(Lmat.T[:, :, None], (p, k, f)))
                     ** 2).sum(axis=0))                                 # |L_A^-1 l| per row
    if k == 1:
        m = np.maximum(M[0, 0], 1e-300)
        stat = U[0] / np.sqrt(m)
        se = scale[0] * np.sqrt(m)
    else:
        Lm, okm = la.chol(np.where(live, M, la.eye_like(k, (f,))))
        x = la.chol_solve(Lm, U)
        stat = (U * x).sum(axis=0) / k
        se = None
        live = live & okm
    est = Lmat @ beta
    h_e = h - np.einsum("klif,lf->kif", XWX, beta)                   # scores of e
    return dict(est=est, se=se, stat=np.where(live, stat, 0.0), nu=nu, live=live,
                parts=parts, a=a, LA=LA, Ki=Ki, Phi=Phi, Kt=Kt, omega=omega, ev=ev, st=st,
                h_e=h_e, Bg=Bg, rdf=rdf, coef=coef, ss_groups=ss_groups)


def _sandwich_inv(LA, B):
    """``L_A^-1 B L_A^-T`` (p, p, f) for symmetric ``B`` (p, p, f)."""
    left = np.stack([la.solve_lower(LA, B[:, j]) for j in range(B.shape[1])], axis=1)
    return la.solve_lower(LA, np.swapaxes(left, 0, 1))


def robust_statistics(rd: Design, psi, Y, Lmat, reml, chunk=1024):
    """Per feature over ``Y`` (n, F): estimate (k, F), SE (F; NaN for F contrasts), the
    CR2 t or F, its df and the mask of features it is defined at (chunks of ``chunk``
    features: the per-participant arrays are p x p per feature)."""
    Lmat = np.atleast_2d(np.asarray(Lmat, float))
    k, F = Lmat.shape[0], Y.shape[1]
    est, se = np.zeros((k, F)), np.full(F, np.nan)
    stat, nu, live = np.zeros(F), np.ones(F), np.zeros(F, bool)
    for a in range(0, F, chunk):
        b = min(F, a + chunk)
        out = robust_block(rd, psi[:, a:b], Y[:, a:b], Lmat, reml)
        est[:, a:b], stat[a:b], nu[a:b], live[a:b] = out["est"], out["stat"], out["nu"], \
            out["live"]
        if k == 1:
            se[a:b] = out["se"]
    return est, se, stat, nu, live


def flip_data(rd: Design, out, k):
    """What sign flips of the CR2-adjusted full-model residuals need (module docstring),
    from a :func:`robust_block` result at the same weights: per participant the
    group-masked ``v_i = L_A^-1 h*_i`` (one copy per variance group) and ``T_i = Phi_i (x)
    Kt_i`` ((G p + k p k), N, f), and per feature what turns a resample's products into
    its statistic and df (:class:`FlipParts`)."""
    LA, a, parts, Kt = out["LA"], out["a"], out["parts"], out["Kt"]
    h_star, rho = parts.adjusted_residuals(out["h_e"])
    v = la.solve_lower(LA[:, :, None, :], h_star)
    Phi = np.einsum("xjf,xif->jif", a, rho)                               # (k, N, f)
    p, N, f = v.shape
    G = rd.G
    masked = np.concatenate([np.where((rd.codes == g)[None, :, None], v, 0.0)
                             for g in range(G)])                          # (G p, N, f)
    T = np.einsum("jif,xlif->jxlif", Phi, Kt).reshape(k * p * k, N, f)
    # ||A_i e~_i||^2 of every participant, summed per variance group
    y = la.solve_lower(parts.LS, parts.spans.RRinv.T[:, :, None]
                       * np.einsum("ijk,kif->jif", parts.spans.R, out["h_e"]))
    Wy = np.einsum("ifab,aif->ifb", parts.W, y)
    extra = (Wy * Wy * parts.full).sum(axis=-1)                            # (N, f)
    fp = FlipParts(P0=np.einsum("jif,lif->jlf", Phi, Phi),
                   S=np.einsum("xjif,ylif->xjylf", Kt, Kt),
                   Bg=out["Bg"], ss0=out["ss_groups"] + rd.group_sum(extra),
                   rdf=out["rdf"], coef_a=np.stack([c[0] for c in out["coef"]]),
                   coef_b=np.stack([c[1] for c in out["coef"]]))
    return np.concatenate([masked, T]), fp


class FlipParts:
    """Per feature: ``P0`` (k, k, f), ``S`` (p, k, p, k, f), the groups' ``Bg`` (G, p, p,
    f), the flipped residuals' sums of squares per group ``ss0`` (G, f), the groups'
    residual df ``rdf`` (G, f) and the df coefficients (k, G, f), (k, G, G, f)."""

    def __init__(self, **kw):
        self.__dict__.update(kw)

    def take(self, a, b):
        return FlipParts(**{k: v[..., a:b] for k, v in self.__dict__.items()})


def flip_statistic(gg, T, a, fp: FlipParts):
    """The CR2 t (k = 1) or F of resamples and its df, from their group-wise ``gg`` (G, p,
    R, f), ``T`` (k, p, k, R, f) (module docstring) and the feature's :class:`FlipParts`;
    float64.  The df are each resample's own: its residual sums of squares per variance
    group give its ``omega``."""
    k = a.shape[1]
    g = gg.sum(axis=0)
    U = np.einsum("xjf,xrf->jrf", a, g)
    cross = np.einsum("jxlrf,xrf->jlrf", T, g)
    Q = np.einsum("xrf,xjylf,yrf->jlrf", g, fp.S, g)
    M = fp.P0[:, :, None, :] - cross - np.swapaxes(cross, 0, 1) + Q
    ss = fp.ss0[:, None, :] - 2 * np.einsum("gxrf,xrf->grf", gg, g) \
        + np.einsum("xrf,gxyf,yrf->grf", g, fp.Bg, g)
    omega = np.maximum(ss, 0.0) / fp.rdf[:, None, :]
    nus = np.stack([bm_nu(fp.coef_a[j][:, None, :], fp.coef_b[j][:, :, None, :], omega)
                    for j in range(k)])
    nu = fai_cornelius(nus, k)
    if k == 1:
        return U[0] / np.sqrt(np.maximum(M[0, 0], 1e-300)), nu
    Lm, _ = la.chol(M)
    return (U * la.chol_solve(Lm, U)).sum(axis=0) / k, nu
