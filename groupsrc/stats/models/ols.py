"""The ordinary least-squares statistic kernel (the contract it honours: :mod:`.base`).

Model ``y = X b + e`` at every feature, one design ``X`` (n, p) shared by all
features.  With the contrast split of the design into a tested space and
the nuisance space ``Z = {X b : C b = 0}`` (Winkler et al. 2014, NeuroImage
92:381-397, Appendix A; :func:`.glm.contrast_basis`), Freedman-Lane
resampling (Freedman & Lane 1983, J Bus Econ Stat 1:292-298) rearranges the
residuals ``R_z`` of ``Y`` on ``Z``, adds the nuisance fit back and refits.
Two facts make this cheap: the contrast estimate ignores the added-back part
(the tested space is orthogonal to ``Z``), and the full-model residual of
``P R_z + H_z Y`` is ``(I - H) P R_z``.  So with an orthonormal basis
``Q = [Q_effect, Q_nuisance]`` of the design and ``U = Q' P R_z``:
``RSS = ||R_z||^2 - ||U||^2``, ``t = U_0 / sqrt(RSS / df)`` and
``F = (||U_effect||^2 / q) / (RSS / df)``.  For a block of rearrangements
the matrices ``(P_b' Q)'`` are stacked into one float32 matrix and
multiplied with feature chunks of ``R_z``: matrix products, no
per-permutation refit.  When every rearrangement maps the nuisance space
onto itself (the intercept under permutations) Freedman-Lane equals plain
rearrangement of ``Y``.

Reproducibility (bit for bit).  BLAS may round a product element
differently depending on the product's shape and its number of threads, so
every product has one fixed shape ``(block r, n) @ (n, fc)`` with
``fc = min(FEATURE_CHUNK, n_features)``: resample ``i`` always sits in row
block ``i // block`` at row ``i % block`` (rows of absent resamples are
zero), feature ``j`` always in chunk ``j // fc`` (the last chunk is
zero-padded), and BLAS runs on one thread during the products
(threadpoolctl).  Everything after the products is element-wise IEEE
arithmetic.  ``block`` is ``RES_BLOCK`` (16), or ``LIST_BLOCK`` (64) when the
job holds its batches as supra-threshold lists (:mod:`..corrections.exceedances`) or
needs no maps at all (set by :class:`..engine.backends.NullJob` before any product):
fixed for a job, so one job's null distribution is the same on every
backend, whatever its batch size; the two block sizes round the last bit of
some products differently, so the two ways of holding a batch are compared at
one block size in ``tests/test_scale_lists.py``.
"""

from __future__ import annotations

import dataclasses

import numpy as np
from numba import njit

from . import glm
from .base import (FEATURE_CHUNK, LIST_BLOCK, RES_BLOCK, FitInfo, Observed,  # noqa: F401
                   StatisticKernel, forming_threshold, parametric_p)
from ..corrections.exceedances import Exceedances, list_rows
from ..engine.blas import one_blas_thread
from ..engine.perthread import PerThread
from ..resampling import rearrangements

#: largest ||y|| / ||r_z|| (raw over residual norm) for running the products on Y
_RAW_RATIO = 30.0


def _residualise(Yf, q_nui, chunk=8192, allocate=None):
    """Residuals of Yf (n, F) on the orthonormal columns ``q_nui`` (float32), in an
    array from ``allocate(shape)`` (default in memory; see :mod:`..engine.memory`)."""
    from ..engine.pages import release
    R = np.empty_like(Yf) if allocate is None else allocate(Yf.shape)
    for a in range(0, Yf.shape[1], chunk):
        y = Yf[:, a:a + chunk].astype(np.float64)
        R[:, a:a + chunk] = y - q_nui @ (q_nui.T @ y)
        release(Yf)
        release(R)
    return R


def _sum_squares(R, chunk=8192):
    from ..engine.pages import release
    rr = np.empty(R.shape[1], np.float64)
    for a in range(0, R.shape[1], chunk):
        y = R[:, a:a + chunk].astype(np.float64)
        rr[a:a + chunk] = np.einsum("ij,ij->j", y, y)
        release(R)
    return rr.astype(np.float32)


def _norms_raw_and_residual(Yf, q_nui, chunk=8192):
    """Per-feature ||y||^2 and ||y - H_z y||^2 in float64, without storing residuals."""
    yy = np.empty(Yf.shape[1])
    rr = np.empty(Yf.shape[1])
    for a in range(0, Yf.shape[1], chunk):
        y = Yf[:, a:a + chunk].astype(np.float64)
        r = y - q_nui @ (q_nui.T @ y)
        yy[a:a + chunk] = np.einsum("ij,ij->j", y, y)
        rr[a:a + chunk] = np.einsum("ij,ij->j", r, r)
        _release(Yf)
    return yy, rr


def _release(a):
    from ..engine.pages import release
    release(a)


def _by_chunks(fit, Yf, X, C, chunk=65536):
    """``fit(Yf, X, C)`` over feature chunks of a memory-mapped ``Yf`` (pages handed
    back after each chunk), the per-feature arrays joined; in one call otherwise."""
    if not isinstance(Yf, np.memmap) and not isinstance(getattr(Yf, "base", None), np.memmap):
        return fit(Yf, X, C)
    parts = []
    for a in range(0, Yf.shape[1], chunk):
        parts.append(fit(np.array(Yf[:, a:a + chunk]), X, C))
        _release(Yf)
    first = parts[0]
    joined = {f.name: (np.concatenate([getattr(p, f.name) for p in parts])
                       if isinstance(getattr(first, f.name), np.ndarray)
                       else getattr(first, f.name))
              for f in dataclasses.fields(first)}
    return type(first)(**joined)


def _invariant(q_nui, rearr, tol=1e-8):
    """True when every rearrangement maps the nuisance space onto itself."""
    if q_nui.shape[1] == 0:
        return True
    M = rearr.matrix
    for a in range(0, M.shape[0], 512):
        rows = M[a:a + 512]
        if rearr.kind == "sign-flip":
            moved = rows[:, :, None] * q_nui[None]
        else:
            moved = q_nui[rows]
        resid = moved - q_nui[None] @ (q_nui.T[None] @ moved)
        if np.abs(resid).max() > tol:
            return False
    return True


@njit(nogil=True, cache=True)
def _stat_rows(U, u_lo, n_rows, w, rr, is_t, df, q, q_inv, out, o_lo, o_col):
    """Statistic of projections, compiled: ``out[o_lo + i, o_col:o_col + w]``
    from ``U[u_lo + i, :, :w]`` (U: (rows, r, fc) float32) and ``rr[:w]``
    (||R||^2 of those features) for ``i < n_rows``.

    ``ss = sum_j U_j^2``, ``rss = max(rr - ss, 1e-30)`` (rss <= 0 only for
    constant features, where U = 0 and the statistic is 0, or from float32
    rounding of a perfect fit); t: ``sqrt(df / rss) U_0``; F:
    ``(df / rss) (sum_{j<q} U_j^2) / q``.  Every operation is one float32 IEEE
    operation in a fixed order (no fused multiply-add), so the values do not
    depend on where the rows sit; each row is a loop over contiguous features
    that the compiler vectorises.
    """
    r = U.shape[1]
    tiny = np.float32(1e-30)
    rw = rr[:w]
    eff = np.empty(w, np.float32)
    for i in range(n_rows):
        o = out[o_lo + i, o_col:o_col + w]
        u0 = U[u_lo + i, 0, :w]
        for j in range(w):
            o[j] = u0[j] * u0[j]
        for k in range(1, r + 1):
            if not is_t and k == q:          # F: the numerator's sum (its first q terms)
                eff[:] = o
            if k == r:
                break
            uk = U[u_lo + i, k, :w]
            for j in range(w):
                o[j] += uk[j] * uk[j]
        if is_t:
            for j in range(w):
                s = max(rw[j] - o[j], tiny)
                o[j] = np.sqrt(df / s) * u0[j]
        else:
            for j in range(w):
                s = max(rw[j] - o[j], tiny)
                o[j] = ((df / s) * eff[j]) * q_inv


# ----------------------------------------------------------------------------
# ordinary least squares
# ----------------------------------------------------------------------------

class OLSKernel(StatisticKernel):
    """Mass-univariate OLS contrast with Freedman-Lane resampling.

    Parameters
    ----------
    Y : (n, n_features) float32 data, one row per observation.
    X : (n, p) design matrix.
    contrast : (p,) weights (t) or (k, p) (F).
    scheme : "sign-flip" (one-sample / paired) or "permutation".
    nuisance : None/"auto" -> Freedman-Lane whenever the design has columns
        outside the contrast's space and the rearrangements move them;
        False -> rearrange the raw data.
    """

    #: allocates the residuals, ``allocate(shape)`` (None: in memory; see :mod:`..engine.memory`)
    allocate = None
    #: supports :class:`..corrections.exceedances.Exceedances` as ``out`` of :meth:`resampled`
    lists = True
    #: resamples per product block (set before the first product; see the module docstring)
    block = RES_BLOCK

    def __init__(self, Y, X, contrast, *, scheme="sign-flip", nuisance=None):
        self.Y = Y
        self.X = np.asarray(X, np.float64)
        self.C = np.asarray(contrast, np.float64)
        self.basis = glm.contrast_basis(self.X, self.C)
        self.kind = self.basis.kind
        self.scheme = scheme
        self.nuisance = nuisance
        self.n_features = int(Y.shape[1])
        self.n_units = int(Y.shape[0])
        b = self.basis
        self.df = (b.df,) if self.kind == "t" else (b.df1, b.df)
        self.rearr = None
        self.freedman_lane = False
        self._buffers = PerThread()

    # -- observed -------------------------------------------------------------
    def observed(self, tails):
        Yf, X, C = self.Y, self.X, self.C
        nan = np.full(self.n_features, np.nan)
        if self.kind == "t":
            fit = _by_chunks(glm.t_contrast, Yf, X, C)
            stat, est, se = fit.t, fit.estimate, fit.se
            effect = glm.cohens_d(fit.estimate, fit.sigma, fit.df)
            del fit                                # sigma goes before the p-values come
        else:
            fit = _by_chunks(glm.f_contrast, Yf, X, C)
            stat, est, se = fit.F, nan, nan
            effect = glm.partial_eta_squared(fit.F, fit.df1, fit.df2)
        return Observed(self.kind, self.df, stat, est, se, effect,
                        parametric_p(stat, self.kind, tails, self.df))

    def threshold(self, forming_p, tails):
        return forming_threshold(self.kind, forming_p, tails, self.df)

    def info(self):
        b = self.basis
        return FitInfo("ordinary least squares", float(b.df), int(b.rank),
                       int(b.q_nuisance.shape[1]))

    # -- resampling -----------------------------------------------------------
    def rearrangements(self, n_resamples, seed, blocks=None):
        return rearrangements(self.scheme, self.Y.shape[0], int(n_resamples), seed,
                              labels=self.X, blocks=blocks)

    def prepare(self, rearr):
        """Residual-forming for the rearrangement set (Freedman-Lane when needed)."""
        b, Yf = self.basis, self.Y
        self.rearr = rearr
        use_fl = self.nuisance is not False and b.q_nuisance.shape[1] > 0
        self.freedman_lane = use_fl and not _invariant(b.q_nuisance, rearr)
        if self.freedman_lane:
            R, Q = _residualise(Yf, b.q_nuisance, allocate=self.allocate), b.q
            rr = _sum_squares(R)
        elif use_fl:
            # Nuisance space invariant under every rearrangement: Q_nuisance' P R_z = 0
            # and q_effect' P Y = q_effect' P R_z, so the products can run on Y itself
            # with the effect basis only, and ||R_z||^2 is computed once in float64.
            # Float32 products on Y lose about eps ||y|| / ||r_z|| relative precision,
            # so this path is taken only while that ratio stays below _RAW_RATIO.
            Q = b.q_effect
            yy, rr64 = _norms_raw_and_residual(Yf, b.q_nuisance)
            if np.all(yy <= _RAW_RATIO ** 2 * rr64):
                R, rr = Yf, rr64.astype(np.float32)
            else:
                R = _residualise(Yf, b.q_nuisance, allocate=self.allocate)
                rr = _sum_squares(R)
        else:
            R, Q = Yf, b.q
            rr = _sum_squares(R)
        # degenerate features (no residual variance, glm module docstring): an infinite
        # ||R||^2 makes every resampled statistic 0 there, never part of a cluster
        self.degenerate = glm.degenerate_mask(Yf, self.X, self.C, release=_release)
        rr[self.degenerate] = np.inf
        self.R, self.rr, self.Q = R, rr, Q.astype(np.float32)
        self.fc = min(FEATURE_CHUNK, self.n_features)      # travels with the kernel

    @property
    def scheme_name(self):
        return self.scheme + (" / Freedman-Lane" if self.freedman_lane else "")

    def _gemm_rows(self, rows):
        """Stacked (B r, n) float32 matrix so that G @ R gives Q' P_b R."""
        n, r = self.Q.shape
        B = rows.shape[0]
        if self.rearr.kind == "sign-flip":
            G = rows[:, :, None].astype(np.float32) * self.Q[None, :, :]     # (B, n, r)
        else:
            G = self.Q[np.argsort(rows, axis=1)]                            # (B, n, r)
        return np.ascontiguousarray(G.transpose(0, 2, 1)).reshape(B * r, n)

    def _block_rows(self, k):
        """The (block r, n) product matrix of resample block ``k`` (zero padded)."""
        n, r = self.Q.shape
        m, blk = self.rearr.n_resamples, self.block
        a, b = k * blk, min(m, (k + 1) * blk)
        G = np.zeros((blk * r, n), np.float32)
        G[:(b - a) * r] = self._gemm_rows(self.rearr.matrix[a:b])
        return G

    def _stat_block(self, U, u_lo, n_rows, a, b, out, o_lo, o_col):
        """Statistic of ``n_rows`` rows of one product block ``U`` (features a..b-1)
        into ``out`` from row ``o_lo`` and column ``o_col`` (:func:`_stat_rows`)."""
        q = self.basis.df1
        _stat_rows(U, u_lo, n_rows, b - a, self.rr[a:b], self.kind == "t",
                   np.float32(self.basis.df), q, np.float32(1.0 / q), out, o_lo, o_col)

    def resampled(self, lo, hi, out=None, part=None):
        """Statistics of resamples lo..hi-1 (see the contract in the module docstring);
        ``out`` may also be an :class:`..corrections.exceedances.Exceedances` (``lists``)."""
        B = hi - lo
        r = self.Q.shape[1]
        n, F = self.R.shape
        blk = self.block
        ks = range(lo // blk, (hi - 1) // blk + 1)
        mx = np.full(B, -np.inf)
        mn = np.full(B, np.inf)
        fc = self.fc
        chunks = self.chunk_range(-(-F // fc), part)
        listing = isinstance(out, Exceedances)
        if listing:
            j, base, slots = out.region(part)
            out.lo = lo
            out.count[j, :B] = 0
        on_disk = isinstance(self.R, np.memmap) or isinstance(getattr(self.R, "base", None),
                                                               np.memmap)
        with one_blas_thread():
            Gs = [self._block_rows(k) for k in ks]
            pad = tmp = None
            U = np.empty((blk * r, fc), np.float32)
            for a in range(chunks.start * fc, chunks.stop * fc, fc):
                b = min(F, a + fc)
                Rc = self.R[:, a:b]
                if on_disk:                         # read the chunk, hand its pages back
                    Rc = np.array(Rc)
                    _release(self.R)
                if b - a < fc:                      # last chunk: zero-padded copy
                    pad = np.zeros((n, fc), np.float32) if pad is None else pad
                    pad[:, :b - a] = Rc
                    pad[:, b - a:] = 0.0
                    Rc = pad
                for k, G in zip(ks, Gs):
                    i0, i1 = max(lo, k * blk), min(hi, (k + 1) * blk)
                    np.matmul(G, Rc, out=U)
                    Uk = U.reshape(blk, r, fc)
                    if out is None or listing:
                        tmp = np.empty((blk, fc), np.float32) if tmp is None else tmp
                        self._stat_block(Uk, i0 - k * blk, i1 - i0, a, b, tmp, 0, 0)
                        if listing:
                            list_rows(tmp, i1 - i0, b - a, a, out.upper, out.lower, out.idx,
                                      out.val, out.count[j], i0 - lo, base, slots)
                            continue
                        st = tmp[:i1 - i0, :b - a]
                        seg = slice(i0 - lo, i1 - lo)
                        np.maximum(mx[seg], st.max(axis=1), out=mx[seg])
                        np.minimum(mn[seg], st.min(axis=1), out=mn[seg])
                    else:
                        self._stat_block(Uk, i0 - k * blk, i1 - i0, a, b, out, i0 - lo, a)
        return out, mx, mn
