"""Leverage-adjusted participant residuals for whole-participant sign flips.

Participant i's whitened restricted residual has covariance ``I - H0_ii`` (``H0`` the
whitened hat matrix of the model restricted to ``L b = 0``), not ``I``; sign flips
move ``r*_i = (I - H0_ii)^(-1/2) r_i`` instead (the HC2 / CR2 residual of the
restricted wild bootstrap; the reasons are in :mod:`.kernel`).  ``H0_ii`` lives in the
span of participant i's design, so the adjustment costs a few r x r products per
participant and feature (r the number of distinct rows of a participant's design).
"""

from __future__ import annotations

import numpy as np

from . import linalg as la


class ParticipantSpans:
    """Design-only parts of the leverage adjustment (once per kernel).

    Participant i's design ``X_i = Q_i R_i`` (thin SVD: ``Q_i`` orthonormal, n_i x r_i;
    ``R_i`` r_i x p), padded to the largest rank r with zero rows; ``ZQ_i = Z_i' Q_i``
    (the model's scaled random-effect columns).  r is the number of distinct rows of
    a participant's design (2 for two conditions), usually far below p."""

    def __init__(self, core):
        X, Z, g = core.X, core.Z, core.groups
        parts = []
        for i in range(core.N):
            U, sv, Vt = np.linalg.svd(X[g == i], full_matrices=False)
            keep = sv > 1e-10 * sv.max(initial=0.0)
            parts.append((U[:, keep], sv[keep, None] * Vt[keep], Z[g == i]))
        r = max(1, max(Q.shape[1] for Q, _, _ in parts))
        self.R = np.zeros((core.N, r, core.p))
        self.RRinv = np.ones((core.N, r))
        self.ZQ = np.zeros((core.q, core.N, r))
        for i, (Q, R, Zi) in enumerate(parts):
            k = Q.shape[1]
            self.R[i, :k] = R
            self.RRinv[i, :k] = 1.0 / (R * R).sum(axis=1)       # R_i R_i' is diagonal
            self.ZQ[:, i, :k] = Zi.T @ Q


def leverage_adjust(h, Nz, Lz, spans, Ki, cap=1.0 - 1e-3):
    """Leverage-adjusted participant scores for sign flips (see the module docstring).

    ``h`` (p, N, f) holds ``X_i' Vbar_i^-1 r_z,i``.  Returns ``X_i' Vbar_i^-1 r*_i``,
    with ``r*_i`` participant i's restricted residual scaled by ``(I - H0_ii)^(-1/2)``
    in the whitened metric, and per feature the growth ``||r*||^2 - ||r_z||^2`` of
    its whitened norm.

    ``H0_ii = U U'`` with ``U = Vbar_i^(-1/2) X_i C``, ``C = Nz Lz^-T`` (so ``C C' =
    Nz A0^-1 Nz'``, ``Lz`` the Cholesky factor of the null model's ``A0``).  With
    ``X_i = Q_i R_i`` (:class:`ParticipantSpans`), ``S_i = Q_i' Vbar_i^-1 Q_i =
    L_S L_S'`` and the orthonormal basis ``Y = Vbar_i^(-1/2) Q_i L_S^-T`` of the
    whitened span: ``H0_ii = Y E Y'`` with ``E = T T'``, ``T = L_S' R_i C`` (r x r,
    ``E = W diag(lam) W'``).  So ``(I - H0_ii)^(-1/2) = I + Y W diag(psi) W' Y'``,
    ``psi = (1 - lam)^(-1/2) - 1``; ``Y' r~_i = y = L_S^-1 (R_i R_i')^-1 R_i h_i``;
    ``X~_i' Y = R_i' L_S``; hence ``h*_i = h_i + R_i' L_S W diag(psi) W' y`` and the
    norm grows by ``sum_a (W'y)_a^2 (1 / (1 - lam_a) - 1)``.  Leverages are capped at
    ``cap`` (a participant that alone fixes a nuisance direction has no residual
    there to scale)."""
    p, N, f = h.shape
    p0 = Nz.shape[1]
    Ct = la.solve_lower(Lz, np.broadcast_to(Nz.T[:, :, None], (p0, p, f)))   # C' (p0, p, f)
    R, ZQ = spans.R, spans.ZQ
    r = R.shape[1]
    S = la.eye_like(r, (1, 1)) - np.einsum("aij,abif,bik->jkif", ZQ, Ki, ZQ)  # (r, r, N, f)
    LS, _ = la.chol(S)
    P = np.einsum("ijk,akf->jaif", R, Ct)                                      # R_i C
    T = np.einsum("kjif,kaif->jaif", LS, P)                                    # L_S' R_i C
    lam, W = np.linalg.eigh(np.einsum("jaif,kaif->ifjk", T, T))                # (N, f, r)
    lam = np.clip(lam, 0.0, cap)
    y = la.solve_lower(LS, spans.RRinv.T[:, :, None] * np.einsum("ijk,kif->jif", R, h))
    d = np.einsum("ifab,aif->ifb", W, y)                                       # W' y
    extra = (d * d * (1.0 / (1.0 - lam) - 1.0)).sum(axis=(0, 2))
    back = np.einsum("ifab,ifb->aif", W, d * (1.0 / np.sqrt(1.0 - lam) - 1.0))
    return h + np.einsum("ijk,jlif,lif->kif", R, LS, back), extra
