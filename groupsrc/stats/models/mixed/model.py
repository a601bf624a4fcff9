"""Mass-univariate linear mixed model: the design, its decomposition and the REML criterion.

Model
-----
At every feature (source x sample), for the maps ``k`` of participant ``i``::

    y_ik = x_ik' beta + z_ik' b_i + e_ik,    b_i ~ N(0, sigma^2 Psi),  e_ik ~ N(0, sigma^2)

stacked per participant ``y_i = X_i beta + Z_i b_i + e_i`` with marginal covariance
``V_i = sigma^2 Vbar_i``, ``Vbar_i = I + Z_i Psi Z_i'``.

Notation (the same letters in the code):

* ``n`` maps, ``p`` fixed-effect columns (``X``), ``q`` random-effect columns
  (``Z``: the intercept, then one column per random slope), ``N`` participants;
* ``Psi`` the random-effect covariance relative to ``sigma^2``; ``theta`` the
  variance parameters the fit works in (below); ``D = sigma^2 Psi`` is the
  random-effect covariance in data units;
* ``A = X' Vbar^{-1} X``, ``C = A^{-1}``, ``beta_hat = C X' Vbar^{-1} y`` (GLS),
  ``r2 = (y - X beta_hat)' Vbar^{-1} (y - X beta_hat)``;
* ``m = n - p`` (REML) or ``m = n`` (ML); ``sigma_hat^2 = r2 / m``.

Parameters ``theta`` (:meth:`MixedCore.psi_of`)
-----------------------------------------------
* **A random intercept only** (``q = 1``, compound symmetry): ``theta = psi``, the
  participant variance relative to ``sigma^2``, *unconstrained*: any ``psi > -1 /
  max n_i`` (every ``Vbar_i`` positive definite).  A negative participant variance is a
  negative within-participant correlation.  In a balanced design the REML estimates
  are then the classical analysis-of-variance estimates and the contrast tests the
  classical ones (paired t, two-sample t of the participant means, one-way F),
  whatever the data: a variance estimated below zero does not switch the test to
  another stratum's error term and degrees of freedom, as a fit held at zero does
  (Searle, Casella & McCulloch 1992, Variance Components, ch. 3-4; Molenberghs &
  Verbeke 2011, Stat Modelling 11:389-408; both cited from memory).
* **Random slopes** (``q >= 2``): ``Psi = Lambda Lambda'`` positive semi-definite,
  ``Lambda`` lower triangular with a non-negative diagonal and ``theta`` its entries
  row by row ((0,0), (1,0), (1,1), ...), lme4's parameterization (Bates et al. 2015, J
  Stat Softw 67(1)).  Unconstrained here, the criterion stays finite as a
  participant's covariance turns singular along a direction the fixed effects can fit
  (``log|Vbar|`` and ``log|A|`` cancel), and with two or three random effects per
  participant the fits drift there (DEVELOPERS.md, "The mixed model").  A negative
  correlation between conditions is a positive semi-definite ``Psi`` in this model.
  Fits on the boundary (a variance of zero, a correlation of +-1) are counted, and
  their degrees of freedom floored (:mod:`.inference`).

Profiled criterion (``-2`` log-likelihood with ``sigma^2`` profiled out)::

    REML:  d(theta) = log|Vbar| + log|A| + m (1 + log(2 pi r2 / m))
    ML:    d(theta) = log|Vbar| + n (1 + log(2 pi r2 / n))

the definitions of lme4 and statsmodels' ``MixedLM`` (whose tests quote the
lme4 values on the dietox data that ``tests/test_mixed_dietox.py`` matches).

One decomposition, then O(N) per feature
-----------------------------------------
The design is shared by every feature.  It is reduced once to per-participant
cross-products ``G_i = Z_i'Z_i`` (q x q), ``H_i = Z_i'X_i`` (q x p) and
``X'X``; a feature enters only through ``X'y`` (p), ``u_i = Z_i'y_i`` (q per
participant) and ``y'y``.  With ``S_i = G_i^{1/2}`` (symmetric,
design only), ``M_i = I + S_i Psi S_i`` (positive definite exactly when ``Vbar_i``
is), ``Gt_i = Z_i'Vbar_i^{-1}Z_i = S_i M_i^{-1} S_i`` and the Woodbury identity
``Vbar_i^{-1} = I - Z_i K_i Z_i'``, ``K_i = Psi - Psi Gt_i Psi``::

    log|Vbar| = sum_i log|M_i|
    A   = X'X - sum_i H_i' K_i H_i          X'Vbar^{-1}y = X'y - sum_i H_i' K_i u_i
    y'Vbar^{-1}y = y'y - sum_i u_i' K_i u_i

so a criterion evaluation costs O(N q^3 + N q^2 p^2 + p^3) per feature,
whatever the number of maps.  The sums over participants of design tensors
times per-feature coefficients are matrix products (``DH @ K``), and every
other step is element-wise over all features at once (:mod:`.linalg`).

Derivatives (analytic).  With ``Ht_i =
Z_i'Vbar_i^{-1}X_i``, ``P_i = Ht_i C Ht_i'``, ``g_i = Z_i'Vbar_i^{-1}(y_i - X_i
beta_hat)`` and, for a direction ``E`` of ``Psi``, ``Omega_E = sum_i Ht_i' E
Ht_i`` and ``phi_E = sum_i Ht_i' E g_i``::

    d d[E]    = tr(E sum_i (Gt_i - P_i)) - (m / r2) sum_i g_i' E g_i
    d2 d[E,F] = - sum_i tr(Gt_i F Gt_i E) + 2 sum_i tr(Gt_i F P_i E) - tr(C Omega_F C Omega_E)
                - (m / r2^2)(sum_i g_i'F g_i)(sum_i g_i'E g_i)
                + (2 m / r2) (sum_i g_i' E Gt_i F g_i - phi_E' C phi_F)

(ML: without the ``P`` and ``Omega`` terms, which come from ``log|A|``).  The
derivatives in ``theta`` follow by the chain rule through ``Psi(theta)``: for the
intercept's ``psi`` the direction is constant; for ``Lambda`` the directions ``E_k =
dPsi/dtheta_k = e_a e_b' Lambda' + Lambda e_b e_a'`` and the constant second
derivatives of ``Psi``.  ``tests/test_mixed_core.py`` checks them against
finite differences and the criterion against statsmodels.

Conditioning.  ``Z`` is used internally as ``Z R^{-1}`` with ``R'R = Z'Z /
n``; for an unstructured ``Psi`` this is a reparameterization (``Psi =
R^{-1} Psi_scaled R^{-T}``) that leaves the fit unchanged and makes the
optimizer's units comparable whatever the slope covariate's scale.  The start
values, the Newton iteration and the fit codes are in :mod:`.fit`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import sparse

from . import linalg as la

#: largest number of random-effect columns (intercept + slopes)
MAX_RANDOM = 3


def lower_index(q):
    """Positions of ``theta`` in ``Psi`` or ``Lambda``: (0,0), (1,0), (1,1), (2,0), ..."""
    return [(a, b) for a in range(q) for b in range(a + 1)]


def psi_matrix(psi, q):
    """The symmetric ``Psi`` (q, q, F) from its lower-triangular entries ``psi`` (npar, F)."""
    Psi = np.zeros((q, q) + psi.shape[1:])
    for k, (a, b) in enumerate(lower_index(q)):
        Psi[a, b] = psi[k]
        Psi[b, a] = psi[k]
    return Psi


def lambda_of(theta, q):
    """``Lambda`` (q, q, F) from ``theta`` (npar, F)."""
    Lam = np.zeros((q, q) + theta.shape[1:])
    for k, (a, b) in enumerate(lower_index(q)):
        Lam[a, b] = theta[k]
    return Lam


def canonical_theta(theta, q):
    """Flip the sign of every column of ``Lambda`` whose diagonal is negative
    (``Psi = Lambda Lambda'`` is unchanged), so the diagonal is non-negative."""
    theta = np.array(theta, dtype=float)
    idx = lower_index(q)
    for j in range(q):
        neg = theta[idx.index((j, j))] < 0
        for k, (a, b) in enumerate(idx):
            if b == j:
                theta[k] = np.where(neg, -theta[k], theta[k])
    return theta


def psi_entries(Psi):
    """The entries ``psi`` (npar, F) of symmetric matrices ``Psi`` (q, q, F)."""
    return np.stack([Psi[a, b] for a, b in lower_index(Psi.shape[0])])


def symmetric_sqrt(G):
    """``G^{1/2}`` of symmetric positive semi-definite matrices (q, q, C)."""
    w, V = np.linalg.eigh(np.moveaxis(G, 2, 0))
    w = np.clip(w, 0.0, None)
    return np.moveaxis(np.einsum("cij,cj,ckj->cik", V, np.sqrt(w), V), 0, 2)


@dataclass(frozen=True)
class MixedDesign:
    """The arrays of one mixed model, one row per map.

    ``X`` (n, p) fixed effects, ``Z`` (n, q) random effects (column 0 the
    intercept), ``groups`` (n,) participant index 0..N-1 (every participant at
    least one map).  For whole-participant permutations the kernel also needs
    the layout ``X[k] = [between[groups[k]] (x) within[k], maps_cols[k]]``
    (Kronecker product, between index slowest): ``between`` (N, p_b),
    ``within`` (n, p_w), ``map_cols`` (n, p_m), and ``layout`` (N,) a label
    per participant, equal for participants whose maps have the same
    within/map-covariate/random-effect rows.
    """

    X: np.ndarray
    Z: np.ndarray
    groups: np.ndarray
    x_names: tuple = ()
    z_names: tuple = ()
    between: np.ndarray | None = None
    within: np.ndarray | None = None
    map_cols: np.ndarray | None = None
    layout: np.ndarray | None = None

    def __post_init__(self):
        X, Z, g = np.asarray(self.X, float), np.asarray(self.Z, float), np.asarray(self.groups)
        if X.ndim != 2 or Z.ndim != 2 or g.shape != (X.shape[0],) or Z.shape[0] != X.shape[0]:
            raise ValueError("X (n, p), Z (n, q) and groups (n,) must share n rows")
        if not 1 <= Z.shape[1] <= MAX_RANDOM:
            raise ValueError(f"Z must have 1 to {MAX_RANDOM} columns, got {Z.shape[1]}")
        if g.min() != 0 or np.unique(g).size != g.max() + 1:
            raise ValueError("groups must number the participants 0..N-1, each with a map")
        if np.linalg.matrix_rank(X) < X.shape[1]:
            raise ValueError("the fixed-effects design is rank deficient")
        if np.linalg.matrix_rank(Z) < Z.shape[1]:
            raise ValueError("the random-effects design is rank deficient")

    @property
    def n_participants(self):
        return int(np.max(self.groups)) + 1


@dataclass
class Stats:
    """What a block of features contributes: ``X'y`` (p, F), ``u`` (q, N, F), ``y'y`` (F)."""

    Xty: np.ndarray
    u: np.ndarray
    yy: np.ndarray

    def take(self, idx):
        return Stats(self.Xty[:, idx], self.u[:, :, idx], self.yy[idx])

    @property
    def n_features(self):
        return self.yy.shape[0]


@dataclass
class Evaluation:
    """The criterion at ``theta`` and what its derivatives and the inference reuse."""

    dev: np.ndarray
    r2: np.ndarray
    beta: np.ndarray
    LA: np.ndarray
    Psi: np.ndarray
    ok: np.ndarray
    theta: np.ndarray | None = None
    Kc: np.ndarray | None = None
    b: np.ndarray | None = None
    grad: np.ndarray | None = None
    hess: np.ndarray | None = None
    parts: dict = field(default_factory=dict)


class MixedCore:
    """The decomposed design: per-participant cross-products, shared by every feature.

    Participants whose ``G_i = Z_i'Z_i`` are equal (the same random-effect
    layout, e.g. the same conditions and sessions) share every quantity that
    depends on ``G_i`` and ``theta`` only (``K``, ``Vbar`` determinants,
    ``Gt``); those are computed once per *class* of equal ``G_i``, and the
    design sums over participants are pre-summed per class.
    """

    def __init__(self, design: MixedDesign):
        self.design = design
        X = np.asarray(design.X, float)
        Zraw = np.asarray(design.Z, float)
        g = np.asarray(design.groups, np.int64)
        self.n, self.p = X.shape
        self.q = Zraw.shape[1]
        self.N = design.n_participants
        self.npar = self.q * (self.q + 1) // 2
        #: a random intercept only: its variance unconstrained; else lme4's Lambda
        self.unconstrained = self.q == 1
        self.sizes = np.bincount(g, minlength=self.N)
        R = np.linalg.cholesky(Zraw.T @ Zraw / self.n).T          # upper, R'R = Z'Z / n
        self.R, self.Rinv = R, np.linalg.inv(R)
        Z = Zraw @ self.Rinv
        self.XtX = X.T @ X
        onehot = sparse.csr_matrix((np.ones(self.n), (g, np.arange(self.n))),
                                   shape=(self.N, self.n))
        q, p, N = self.q, self.p, self.N
        G = np.stack([np.stack([onehot @ (Z[:, a] * Z[:, b]) for b in range(q)])
                      for a in range(q)])                            # (q, q, N)
        self.H = np.stack([np.asarray(onehot @ (Z[:, a:a + 1] * X)).reshape(N, p)
                           for a in range(q)])                       # (q, N, p)
        key = np.round(G.reshape(q * q, N).T, 10)
        _, first, cls = np.unique(key, axis=0, return_index=True, return_inverse=True)
        self.cls = cls.reshape(-1)                                   # participant -> class
        self.n_classes = first.size
        self.G, self.Gc = G, G[:, :, first]                          # (q, q, N), (q, q, Cn)
        self.Sc = symmetric_sqrt(self.Gc)                            # G_c^{1/2}
        self.count = np.bincount(self.cls, minlength=self.n_classes).astype(float)
        self.member = sparse.csr_matrix((np.ones(N), (self.cls, np.arange(N))),
                                        shape=(self.n_classes, N))   # class x participant
        # DHc[(k, l), (a, b, c)] = sum_{i in c} H[a, i, k] H[b, i, l]
        DH = np.einsum("aik,bil->klabi", self.H, self.H).reshape(p * p * q * q, N)
        self.DHc = np.ascontiguousarray(
            np.asarray(self.member @ DH.T).T.reshape(p * p, q * q * self.n_classes))
        self.Hmat = np.ascontiguousarray(self.H.transpose(2, 0, 1).reshape(p, q * N))
        rows = (np.arange(q)[:, None] * N + g[None, :]).ravel()
        cols = np.tile(np.arange(self.n), q)
        self.Sz = sparse.csr_matrix((Z.T.ravel(), (rows, cols)), shape=(q * N, self.n))
        self.X, self.Z, self.groups, self.onehot = X, Z, g, onehot

    # -- data -------------------------------------------------------------------
    def stats(self, Y) -> Stats:
        """Sufficient statistics of the features ``Y`` (n, F) (float64 accumulation)."""
        Y = np.asarray(Y, dtype=np.float64)
        return Stats(self.X.T @ Y, np.asarray(self.Sz @ Y).reshape(self.q, self.N, -1),
                     np.einsum("ij,ij->j", Y, Y))

    def psi_raw(self, Psi_scaled):
        """``Psi`` in the coding of the given ``Z`` from the internal (scaled) one."""
        Ri = self.Rinv
        return np.einsum("ia,abf,jb->ijf", Ri, Psi_scaled, Ri)

    def m(self, reml):
        return self.n - self.p if reml else self.n

    def per_class_sum(self, X):
        """Sum over the participants of each class: (..., N, F) -> (..., Cn, F)."""
        shape = X.shape
        flat = X.reshape(-1, shape[-2], shape[-1])
        out = np.stack([self.member @ f for f in flat])
        return out.reshape(shape[:-2] + (self.n_classes, shape[-1]))

    # -- the criterion ------------------------------------------------------------
    def psi_of(self, theta):
        """``Psi`` (q, q, F) (scaled ``Z``) from the parameters ``theta`` (npar, F)."""
        if self.unconstrained:
            return psi_matrix(theta, self.q)
        Lam = lambda_of(theta, self.q)
        return la.mm(Lam, la.T(Lam))

    def theta_of(self, Psi):
        """The parameters of a positive definite ``Psi`` (q, q, F)."""
        if self.unconstrained:
            return psi_entries(Psi)
        Lam = np.moveaxis(np.linalg.cholesky(np.moveaxis(Psi, 2, 0)), 0, 2)
        return psi_entries(Lam)                 # the lower triangle's entries

    def evaluate(self, theta, st: Stats, reml=True, order=0) -> Evaluation:
        """Profiled -2 log-likelihood at ``theta`` (npar, F); ``order`` 1 adds the
        gradient, 2 the Hessian (both in ``theta``).  Where some ``Vbar_i`` is not
        positive definite the criterion is infinite (``ok`` False)."""
        q, N, p, Cn = self.q, self.N, self.p, self.n_classes
        F = theta.shape[1]
        Psi = self.psi_of(theta)
        Pb = Psi[:, :, None, :]
        Sb = self.Sc[..., None]                                        # (q, q, Cn, 1)
        Gb = self.Gc[..., None]
        Ms = la.mm(Sb, la.mm(Pb, Sb)) + la.eye_like(q, (1, 1))
        Lm, okc = la.chol(Ms)
        logdetV = self.count @ la.chol_logdet(Lm)
        Gtc = la.mm(Sb, la.mm(la.chol_inv(Lm), Sb))                   # Z'Vbar^-1 Z per class
        Kc = Pb - la.mm(Pb, la.mm(Gtc, Pb))                            # (q, q, Cn, F)
        A = self.XtX.reshape(p * p, 1) - self.DHc @ Kc.reshape(q * q * Cn, F)
        A = A.reshape(p, p, F)
        u = st.u
        Ku = la.mv(Kc[:, :, self.cls], u)                              # (q, N, F)
        b = st.Xty - self.Hmat @ Ku.reshape(q * N, F)
        c = st.yy - (u * Ku).sum(axis=(0, 1))
        LA, ok = la.chol(A)
        ok &= okc.all(axis=0)
        beta = la.chol_solve(LA, b)
        r2 = c - (b * beta).sum(axis=0)
        ok &= r2 > 0
        r2s = np.where(ok, r2, 1.0)
        m = self.m(reml)
        dev = logdetV + m * (1.0 + np.log(2.0 * np.pi * r2s / m))
        if reml:
            dev = dev + la.chol_logdet(LA)
        ev = Evaluation(dev=np.where(ok, dev, np.inf), r2=r2, beta=beta, LA=LA, Psi=Psi, ok=ok,
                        Kc=Kc, b=b, theta=theta)
        if order:
            self._derivatives(ev, Kc, Gb, u, reml, order)
        return ev

    def directions(self, theta):
        """dPsi/dtheta_k: the constant ``e_0 e_0'`` (intercept only), or ``E_k Lambda' +
        Lambda E_k'`` (``E_k = e_a e_b'``), each (q, q, F) or (q, q, 1)."""
        if self.unconstrained:
            return [np.ones((1, 1, 1))]
        Lam = lambda_of(theta, self.q)
        out = []
        for a, b in lower_index(self.q):
            D = np.zeros(Lam.shape)
            D[a] += Lam[:, b]          # (E_k Lambda')[a, j] = Lambda[j, b]
            D[:, a] += Lam[:, b]       # (Lambda E_k')[j, a] = Lambda[j, b]
            out.append(D)
        return out

    def second_directions(self):
        """d2Psi/dtheta_k dtheta_l = E_k E_l' + E_l E_k' (constant; Lambda only)."""
        idx = lower_index(self.q)
        out = {}
        for k, (a, b) in enumerate(idx):
            for l, (c, d) in enumerate(idx):
                S = np.zeros((self.q, self.q, 1))
                if b == d:
                    S[a, c] += 1.0
                    S[c, a] += 1.0
                out[k, l] = S
        return out

    def _derivatives(self, ev, Kc, Gb, u, reml, order):
        q, N, p, Cn = self.q, self.N, self.p, self.n_classes
        F = ev.r2.shape[0]
        m = self.m(reml)
        r2 = np.where(ev.ok, ev.r2, 1.0)
        cnt = self.count[:, None]
        J = la.eye_like(q, (1, 1)) - la.mm(Gb, Kc)                    # I - G K  (class level)
        Gt = la.mm(J, Gb)                                              # G - G K G
        C = la.chol_inv(ev.LA)
        Hb = (self.Hmat.T @ ev.beta).reshape(q, N, F)
        Ji = J[:, :, self.cls]
        g = la.mv(Ji, u - Hb)                                          # (q, N, F)
        gg = np.einsum("anf,bnf->abf", g, g)
        Gm = (Gt * cnt).sum(axis=2) - (m / r2) * gg                    # gradient matrix in Psi
        P = None
        if reml:
            P0 = (self.DHc.T @ C.reshape(p * p, F)).reshape(q, q, Cn, F)   # sum_{i in c} H_i C H_i'
            P = la.mm(J, la.mm(P0, la.T(J)))
            Gm = Gm - P.sum(axis=2)
        Ds = self.directions(ev.theta)
        npar = len(Ds)
        ev.grad = np.stack([la.trace_prod(Gm, D) for D in Ds])
        ev.parts.update(C=C, g=g, Gt=Gt, J=J, P=P, Gm=Gm, Ds=Ds, m=m)
        if order < 2:
            return
        ggc = self.per_class_sum(g[:, None] * g[None, :])               # (q, q, Cn, F)
        Db = [D[:, :, None, :] for D in Ds]
        Om, phi, s = [], [], []
        for D in Db:
            s.append(la.trace_prod(gg, D[:, :, 0]))
            JD = la.mm(la.T(J), D)                                     # J' D  (class level)
            phi.append(self.Hmat @ la.mv(JD[:, :, self.cls], g).reshape(q * N, F))
            QE = la.mm(JD, J)
            Om.append((self.DHc @ QE.reshape(q * q * Cn, F)).reshape(p, p, F))
        CO = [la.mm(C, O) for O in Om]
        Cphi = [la.mv(C, f) for f in phi]
        GtD = [la.mm(Gt, D) for D in Db]
        PD = [la.mm(P, D) for D in Db] if reml else []
        second = None if self.unconstrained else self.second_directions()
        hess = np.empty((npar, npar, F))
        for k in range(npar):
            for l in range(k, npar):
                # sum_i tr(Gt F Gt E), sum_i g'E Gt F g = sum_c tr(E Gt_c F gg_c)
                h = -(la.trace_prod(GtD[l], GtD[k]) * cnt).sum(axis=0)
                gEGtF = la.trace_prod(la.mm(Db[k], GtD[l]), ggc).sum(axis=0)
                if reml:
                    h = h + 2.0 * la.trace_prod(GtD[l], PD[k]).sum(axis=0)
                    h = h - la.trace_prod(CO[l], CO[k])
                h = h - (m / r2 ** 2) * s[k] * s[l]
                h = h + (2.0 * m / r2) * (gEGtF - (phi[k] * Cphi[l]).sum(axis=0))
                if second is not None:
                    h = h + la.trace_prod(Gm, second[k, l])
                hess[k, l] = hess[l, k] = h
        ev.hess = hess
        ev.parts.update(Om=Om, phi=phi, s=s, Cphi=Cphi, CO=CO)
