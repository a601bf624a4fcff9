"""Mass-univariate ordinary least squares with t and F contrasts.

Every feature (source x sample) shares one design matrix ``X`` (n x p), so the
design is decomposed once and each feature costs a few dot products.  Data are
taken as ``(n, ...)`` arrays (usually float32) and processed in feature chunks
with float64 arithmetic.

Conventions
-----------
* ``df = n - rank(X)``; the residual variance is ``sigma^2 = RSS / df``.
* t contrast ``c`` (p,): ``estimate = c @ beta``,
  ``se = sigma * sqrt(c (X'X)^- c')``, ``t = estimate / se``.
* F contrast ``C`` (k, p): ``F = (C beta)' [C (X'X)^- C']^- (C beta) / (q sigma^2)``
  with ``q = rank(C (X'X)^- C')`` numerator degrees of freedom.
* Standardised effect for t: ``d = estimate / sigma`` times Hedges' small-sample
  correction ``J = 1 - 3 / (4 df - 1)`` (Hedges 1981, J Educ Stat 6:107-128).
  For a one-sample design this is mean / sd; for a two-group difference it is
  the difference over the pooled sd.
* Standardised effect for F: partial eta squared ``F q / (F q + df)``.

Degenerate features.  A feature whose residuals vanish -- the same value (or
the same difference) in every participant, up to the float32 rounding of the
data -- has no variance to test against: its t or F would be a ratio of
rounding errors (once 2e16).  Where ``RSS <= DEGENERATE_RTOL^2 * sum(y^2)``
(residual SD below a millionth of the data's root mean square; an all-zero
feature included) the statistic is undefined: NaN, with ``degenerate`` True;
the estimate is kept, the standard error is 0.

Examples
--------
>>> import numpy as np
>>> y = np.array([[1.0], [2.0], [3.0], [6.0]])
>>> res = t_contrast(y, np.ones((4, 1)), [1.0])
>>> round(float(res.t[0]), 4), res.df
(2.7775, 3)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: relative tolerance for rank decisions on the design
_RANK_RTOL = 1e-10
#: features processed per chunk in the float64 passes (~ n * chunk * 8 bytes)
_CHUNK = 8192
#: a feature whose residual SD is below this share of its root mean square value is
#: degenerate (module docstring); float32 data carry about 6e-8 relative precision
DEGENERATE_RTOL = 1e-6


# ----------------------------------------------------------------------------
# design decomposition
# ----------------------------------------------------------------------------

def _orth(A, rtol=_RANK_RTOL):
    """Orthonormal basis of the column space of ``A`` (SVD, rank-revealing)."""
    A = np.asarray(A, dtype=np.float64)
    if A.size == 0 or A.shape[1] == 0:
        return np.zeros((A.shape[0], 0))
    u, s, _ = np.linalg.svd(A, full_matrices=False)
    if s.size == 0 or s[0] == 0:
        return np.zeros((A.shape[0], 0))
    keep = s > rtol * s[0] * max(A.shape)
    return u[:, keep]


@dataclass(frozen=True)
class ContrastBasis:
    """Orthonormal bases of a design split by a contrast.

    ``q_effect`` (n, q) spans ``X (X'X)^- C'`` -- the part of the column space
    the contrast tests; ``q_nuisance`` (n, r - q) spans the rest of the column
    space, i.e. ``{X b : C b = 0}`` (the reduced model).  ``scale`` is
    ``sqrt(c (X'X)^- c')`` for a t contrast (1 for F).  For a t contrast the
    single effect column is oriented so that ``q_effect' y`` has the sign of
    the estimate: ``estimate = scale * q_effect' y`` and
    ``t = q_effect' y / sigma``.
    """

    kind: str
    q_effect: np.ndarray
    q_nuisance: np.ndarray
    scale: float
    df: int
    rank: int

    @property
    def q(self):
        """All of the column space: ``[q_effect, q_nuisance]`` (n, r)."""
        return np.hstack([self.q_effect, self.q_nuisance])

    @property
    def df1(self):
        return self.q_effect.shape[1]


def check_design(X, contrast):
    """Validate ``X`` (n, p) and a contrast (p,) or (k, p); return float64 copies."""
    X = np.asarray(X, dtype=np.float64)
    if X.ndim != 2:
        raise ValueError(f"the design matrix must be 2D (n, p), got shape {X.shape}")
    if not np.all(np.isfinite(X)):
        raise ValueError("the design matrix holds NaN or infinite values")
    C = np.asarray(contrast, dtype=np.float64)
    if C.ndim not in (1, 2) or C.shape[-1] != X.shape[1]:
        raise ValueError(
            f"contrast must have shape ({X.shape[1]},) or (k, {X.shape[1]}), got {C.shape}")
    if not np.all(np.isfinite(C)) or not np.any(C):
        raise ValueError("contrast weights must be finite and not all zero")
    pinv = np.linalg.pinv(X)
    C2 = np.atleast_2d(C)
    # estimable: C lies in the row space of X (C X^+ X = C)
    if not np.allclose(C2 @ pinv @ X, C2, atol=1e-8 * max(1.0, np.abs(C2).max())):
        raise ValueError("the contrast is not estimable on this design "
                         "(its weights are not a combination of the design's rows)")
    rank = np.linalg.matrix_rank(X)
    if X.shape[0] - rank < 1:
        raise ValueError(f"no residual degrees of freedom: {X.shape[0]} observations, "
                         f"design rank {rank}")
    return X, C, pinv, int(rank)


def contrast_basis(X, contrast) -> ContrastBasis:
    """Split the column space of ``X`` into tested and nuisance parts.

    This is the partition of Winkler et al. 2014 (NeuroImage 92:381-397,
    Appendix A): effect regressors ``X (X'X)^- C'`` and nuisance regressors
    spanning the model restricted to ``C b = 0``; both spaces are returned as
    orthonormal bases, which is all the statistics need.
    """
    X, C, pinv, rank = check_design(X, contrast)
    A = (np.atleast_2d(C) @ pinv).T              # (n, k): estimate = A' y
    Qx = _orth(X)
    if C.ndim == 1:
        scale = float(np.linalg.norm(A[:, 0]))
        q_eff = A / scale
        kind = "t"
    else:
        q_eff = _orth(A)
        scale = 1.0
        kind = "F"
    rest = Qx - q_eff @ (q_eff.T @ Qx)
    q_nui = _orth(rest, rtol=1e-8)[:, : rank - q_eff.shape[1]]
    return ContrastBasis(kind, q_eff, q_nui, scale, X.shape[0] - rank, rank)


# ----------------------------------------------------------------------------
# contrasts
# ----------------------------------------------------------------------------

@dataclass
class TContrastResult:
    """Per-feature t contrast: arrays have the feature shape of the input."""

    estimate: np.ndarray
    se: np.ndarray
    t: np.ndarray
    sigma: np.ndarray
    df: int
    #: no residual variance (module docstring): t is NaN there
    degenerate: np.ndarray | None = None


@dataclass
class FContrastResult:
    """Per-feature F contrast."""

    F: np.ndarray
    df1: int
    df2: int
    sigma: np.ndarray
    #: no residual variance (module docstring): F is NaN there
    degenerate: np.ndarray | None = None


def _as_features(Y, n):
    Y = np.asarray(Y)
    if Y.ndim < 1 or Y.shape[0] != n:
        raise ValueError(f"data must have the design's {n} rows first, got shape {Y.shape}")
    shape = Y.shape[1:]
    return Y.reshape(n, -1), shape


def _chunked_fit(Yf, basis: ContrastBasis, chunk=_CHUNK):
    """Yield (slice, effect coordinates (q, f), rss (f,), degenerate (f,)) in float64."""
    Q = basis.q
    qe = basis.q_effect.shape[1]
    for a in range(0, Yf.shape[1], chunk):
        sl = slice(a, min(Yf.shape[1], a + chunk))
        y = np.asarray(Yf[:, sl], dtype=np.float64)
        coef = Q.T @ y
        resid = y - Q @ coef
        rss = np.einsum("ij,ij->j", resid, resid)
        yield sl, coef[:qe], rss, degenerate(rss, np.einsum("ij,ij->j", y, y))


def degenerate_mask(Y, X, contrast, chunk=_CHUNK, release=None) -> np.ndarray:
    """The degenerate features of ``Y`` (n, F) under the full model (bool, (F,)): the
    same decision as :func:`t_contrast` / :func:`f_contrast` make, from the same
    float64 pass.  ``release(Y)`` is called after each chunk (memory-mapped data)."""
    basis = contrast_basis(X, contrast)
    out = np.empty(Y.shape[1], bool)
    for a in range(0, Y.shape[1], chunk):
        part = np.asarray(Y[:, a:a + chunk])
        for sl, _, _, deg in _chunked_fit(part, basis, chunk):
            out[a + sl.start:a + sl.stop] = deg
        if release is not None:
            release(Y)
    return out


def degenerate(rss, yy):
    """Features without residual variance: ``rss <= DEGENERATE_RTOL^2 * yy`` (float64)."""
    return rss <= (DEGENERATE_RTOL * DEGENERATE_RTOL) * yy


def _safe_ratio(num, den):
    out = np.zeros(np.broadcast(num, den).shape)
    ok = den > 0
    np.divide(num, den, out=out, where=ok)
    return out


def t_contrast(Y, X, contrast, *, chunk=_CHUNK) -> TContrastResult:
    """OLS fit of every feature of ``Y`` (n, ...) and a t contrast.

    Parameters
    ----------
    Y : (n, ...) array
        Observations in rows; any trailing feature shape.
    X : (n, p) design matrix
    contrast : (p,) weights

    Returns
    -------
    TContrastResult with ``estimate``, ``se``, ``t``, ``sigma`` (float64,
    shape ``Y.shape[1:]``) and ``df``.

    Examples
    --------
    >>> import numpy as np
    >>> X = np.c_[np.ones(4), [0, 0, 1, 1]]
    >>> r = t_contrast(np.array([1.0, 2.0, 4.0, 5.0]), X, [0, 1])
    >>> float(r.estimate), r.df
    (3.0, 2)
    """
    c = np.asarray(contrast, dtype=float)
    if c.ndim != 1:
        raise ValueError("a t contrast is a single weight vector (p,)")
    basis = contrast_basis(X, c)
    Yf, shape = _as_features(Y, basis.q.shape[0])
    est = np.empty(Yf.shape[1])
    sig = np.empty(Yf.shape[1])
    tt = np.empty(Yf.shape[1])
    bad = np.empty(Yf.shape[1], bool)
    for sl, coef, rss, deg in _chunked_fit(Yf, basis, chunk):
        s = np.where(deg, 0.0, np.sqrt(rss / basis.df))
        est[sl] = basis.scale * coef[0]
        sig[sl] = s
        tt[sl] = np.where(deg, np.nan, _safe_ratio(coef[0], s))
        bad[sl] = deg
    se = sig * basis.scale
    return TContrastResult(est.reshape(shape), se.reshape(shape), tt.reshape(shape),
                           sig.reshape(shape), basis.df, bad.reshape(shape))


def f_contrast(Y, X, contrast, *, chunk=_CHUNK) -> FContrastResult:
    """OLS fit of every feature of ``Y`` (n, ...) and an F contrast ``C`` (k, p).

    Examples
    --------
    >>> import numpy as np
    >>> X = np.c_[np.ones(6), [0, 0, 1, 1, 0, 0], [0, 0, 0, 0, 1, 1]]
    >>> r = f_contrast(np.array([1.0, 2, 4, 5, 1, 3]), X, [[0, 1, 0], [0, 0, 1]])
    >>> (r.df1, r.df2)
    (2, 3)
    """
    C = np.atleast_2d(np.asarray(contrast, dtype=float))
    basis = contrast_basis(X, C)
    Yf, shape = _as_features(Y, basis.q.shape[0])
    F = np.empty(Yf.shape[1])
    sig = np.empty(Yf.shape[1])
    bad = np.empty(Yf.shape[1], bool)
    q = basis.df1
    for sl, coef, rss, deg in _chunked_fit(Yf, basis, chunk):
        ss_eff = np.einsum("ij,ij->j", coef, coef)
        F[sl] = np.where(deg, np.nan, _safe_ratio(ss_eff / q, rss / basis.df))
        sig[sl] = np.where(deg, 0.0, np.sqrt(rss / basis.df))
        bad[sl] = deg
    return FContrastResult(F.reshape(shape), q, basis.df, sig.reshape(shape), bad.reshape(shape))


def hedges_j(df):
    """Hedges' small-sample bias correction ``J = 1 - 3 / (4 df - 1)``.

    Hedges 1981 (J Educ Stat 6:107-128), the usual approximation to the
    exact gamma-function factor.
    """
    df = np.asarray(df, dtype=float)
    return 1.0 - 3.0 / (4.0 * df - 1.0)


def cohens_d(estimate, sigma, df, *, hedges=True):
    """Standardised contrast ``estimate / sigma`` (optionally Hedges-corrected); NaN
    where ``sigma`` is 0 (no variance: undefined)."""
    sigma = np.asarray(sigma, float)
    d = _safe_ratio(np.asarray(estimate, float), sigma)
    d = np.where(sigma > 0, d, np.nan)
    return d * hedges_j(df) if hedges else d


def partial_eta_squared(F, df1, df2):
    """Partial eta squared from an F statistic: ``F df1 / (F df1 + df2)``."""
    F = np.asarray(F, dtype=float)
    return F * df1 / (F * df1 + df2)
