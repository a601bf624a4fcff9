"""Resampling inference engine: GLM statistic, null distribution, correction.

:func:`run_inference` takes per-participant maps ``Y`` (n, n_sources,
n_times), a design ``X`` (n, p) and a contrast, and returns an
:class:`~groupsrc.stats.results.InferenceResult`.

Method
------
* Statistic: OLS t (contrast vector) or F (contrast matrix), see
  :mod:`groupsrc.stats.glm`.
* Nuisance: the design is split by the contrast into the tested space and the
  nuisance space ``Z = {X b : C b = 0}`` (Winkler et al. 2014, NeuroImage
  92:381-397, Appendix A).  Freedman-Lane: the residuals of ``Y`` on ``Z`` are
  rearranged, the fitted nuisance added back and the full model refitted.  Two
  facts make this cheap.  (1) The contrast estimate of the full model ignores
  the added-back part (the tested space is orthogonal to ``Z``), and (2) the
  full-model residual of ``P R_z + H_z Y`` is ``(I - H) P R_z``.  So with an
  orthonormal basis ``Q = [Q_effect, Q_nuisance]`` of the design and
  ``U = Q' P R_z``, ``RSS = ||R_z||^2 - ||U||^2``, ``t = U_0 / sqrt(RSS/df)``
  and ``F = (||U_effect||^2 / q) / (RSS/df)``.  For a batch of B
  rearrangements the matrices ``(P_b' Q)'`` are stacked into one (B r, n)
  float32 matrix and multiplied with feature chunks of ``R_z`` -- one GEMM per
  chunk, no per-permutation or per-feature loop.  Without nuisance columns
  (intercept-only with sign flips) ``R_z = Y``; when the nuisance space is
  invariant under the rearrangements (e.g. the intercept under permutations,
  as in a plain two-group comparison) the procedure equals plain permutation
  of ``Y``.
* Null: one maximum per rearrangement (identity first) of the cluster score,
  TFCE value or |statistic|; FWER-corrected p = fraction of maxima >= the
  observed value (identity counted, Phipson & Smyth 2010).
* Clusters over space x time (Maris & Oostenveld 2007) with the grid's
  source adjacency plus adjacent samples; TFCE per Smith & Nichols 2009;
  FDR per Benjamini & Hochberg 1995 (on the parametric p-values, no
  resampling).
* Reproducibility (bit for bit): all rearrangements are generated from the
  seed before any work starts, and each resample's arithmetic is the same
  whatever batch or worker it falls in, so the null and the p-values do not
  depend on ``batch_size``, ``n_jobs`` or ``backend``.  The rule that makes
  this hold: BLAS may round a product element differently depending on the
  product's shape and on its number of threads, so every product has one
  fixed shape, ``(RES_BLOCK r, n) @ (n, fc)`` with ``fc = min(FEATURE_CHUNK,
  n_features)``; resample ``i`` always occupies row block ``i //
  RES_BLOCK`` at row ``i % RES_BLOCK`` (rows of absent resamples are zero),
  feature ``j`` always lies in chunk ``j // fc`` (the last chunk is
  zero-padded), and BLAS runs on one thread during the products
  (threadpoolctl).  Everything after the products is element-wise IEEE
  arithmetic, maxima and per-map labelling, which do not depend on the
  batch.  Any new code path must keep this rule; the test
  ``test_seed_determinism_across_batches_and_jobs`` checks it exactly.
* Ties: resampled statistics are float32; a resampled value within a relative
  2e-5 of the observed one counts as reaching it (``resampling.RTOL``).
* Memory: besides the caller's data, at most one float32 copy of the
  reduced-model residuals (skipped when the nuisance space is invariant and
  the data are not dominated by their nuisance fit), plus about
  ``MEMORY_BUDGET`` bytes of resampled maps for the cluster / TFCE
  corrections (but at least ``RES_BLOCK`` maps per worker buffer).
* F statistics are upper-tailed whatever ``tails`` says; cluster tables for
  F have sign +1.  ``null.max_pos`` / ``max_neg`` are the largest positive
  and most negative score (cluster mass, signed extent, TFCE or statistic)
  of each resample (0 when a sign has no cluster).
* ``fdr`` / ``none`` do not resample (``n_resamples = 0``, empty null);
  for ``none`` the cluster table outlines components of p_uncorrected <=
  alpha and its p_corrected column is NaN.

Examples
--------
>>> import numpy as np
>>> from scipy import sparse
>>> rng = np.random.default_rng(0)
>>> Y = (rng.standard_normal((8, 3, 4)) + 1.5).astype(np.float32)
>>> adj = sparse.csr_matrix(np.eye(3, k=1) + np.eye(3, k=-1))
>>> res = run_inference(Y, np.ones((8, 1)), [1.0], adj, scheme="sign-flip",
...                     correction="max-stat", n_resamples=256, seed=1)
>>> res.exact, res.n_resamples, res.p_corrected.shape
(True, 256, (3, 4))
"""

from __future__ import annotations


import numpy as np
import pandas as pd
from scipy import sparse
from scipy import stats as sps

from . import glm
from .clusters import check_adjacency, cluster_scores, components, signed_cluster_scores
from .fdr import fdr_bh
from .resampling import null_p_values, rearrangements
from .results import InferenceResult
from .tfce import E_DEFAULT, H_DEFAULT, STEPS_DEFAULT
from .tfce import check_parameters as check_tfce_parameters
from .tfce import tfce as tfce_map, tfce_stack

CORRECTIONS = ("cluster-mass", "cluster-extent", "tfce", "max-stat", "fdr", "none")
SCHEMES = ("sign-flip", "permutation")
TAILS = ("two", "greater", "less")

#: memory budget (bytes) for the resampled maps held at once (all workers
#: together); the engine also keeps one float32 copy of the data (reduced-model
#: residuals) next to the caller's array
MEMORY_BUDGET = 128e6
#: resamples per product block: every product has (RES_BLOCK r) rows, resample
#: ``i`` always sits in block ``i // RES_BLOCK`` at row ``i % RES_BLOCK``
RES_BLOCK = 16
#: features per product block (fewer only when the map itself is smaller);
#: feature ``j`` always sits in chunk ``j // FEATURE_CHUNK``, the last chunk is
#: zero-padded to the full width
FEATURE_CHUNK = 4096
#: maps smaller than this many features are labelled several at a time
_STACK_FEATURES = 100_000
_CLUSTER_COLUMNS = ["cluster", "sign", "mass", "extent", "n_sources", "n_samples",
                    "p_corrected"]


# ----------------------------------------------------------------------------
# validation
# ----------------------------------------------------------------------------

def _check_seed(seed):
    """None or a non-negative integer (the seed of numpy's default generator)."""
    if seed is None:
        return
    if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, (int, np.integer)):
        raise ValueError(f"seed must be a non-negative integer or None, got {seed!r} "
                         f"-> give a whole number such as 20261201")
    if seed < 0:
        raise ValueError(f"seed must be a non-negative integer or None, got {seed} "
                         f"-> drop the minus sign or pick another whole number >= 0")


def _validate(Y, X, contrast, adjacency, scheme, correction, n_resamples, forming_p,
              tails, alpha, blocks, batch_size, n_jobs, nuisance, seed=None,
              tfce_params=(E_DEFAULT, H_DEFAULT, STEPS_DEFAULT, None)):
    _check_seed(seed)
    check_tfce_parameters(*tfce_params)
    Y = np.asarray(Y)
    if Y.ndim != 3:
        raise ValueError(f"Y must be (n, n_sources, n_times), got shape {Y.shape}")
    if Y.dtype != np.float32:
        Y = Y.astype(np.float32)
    X = np.asarray(X, dtype=np.float64)
    if X.ndim != 2 or X.shape[0] != Y.shape[0]:
        raise ValueError(f"X must be (n, p) with n = {Y.shape[0]} rows, got {X.shape}")
    if scheme not in SCHEMES:
        raise ValueError(f"scheme must be one of {SCHEMES}, got {scheme!r}")
    if correction not in CORRECTIONS:
        raise ValueError(f"correction must be one of {CORRECTIONS}, got {correction!r}")
    if tails not in TAILS:
        raise ValueError(f"tails must be one of {TAILS}, got {tails!r}")
    if not 0 < float(forming_p) < 1:
        raise ValueError(f"forming_p must lie in (0, 1), got {forming_p}")
    if not 0 < float(alpha) < 1:
        raise ValueError(f"alpha must lie in (0, 1), got {alpha}")
    if int(n_resamples) < 1:
        raise ValueError(f"n_resamples must be at least 1, got {n_resamples}")
    if batch_size is not None and int(batch_size) < 1:
        raise ValueError(f"batch_size must be a positive integer, got {batch_size}")
    if int(n_jobs) == 0:
        raise ValueError("n_jobs must be a positive integer or -1")
    if nuisance not in (None, True, False, "auto"):
        raise ValueError(f"nuisance must be None/'auto', True or False, got {nuisance!r}")
    if blocks is not None:
        blocks = np.asarray(blocks)
        if blocks.shape[0] != Y.shape[0]:
            raise ValueError(f"blocks must have one entry per row of Y ({Y.shape[0]}), "
                             f"got {blocks.shape[0]}")
    if not np.all(np.isfinite(Y)):
        raise ValueError("Y holds NaN or infinite values; mask them out before inference")
    adjacency = check_adjacency(adjacency, Y.shape[1])
    return Y, X, adjacency, blocks


# ----------------------------------------------------------------------------
# statistic kernels
# ----------------------------------------------------------------------------

def _stat_from_u(U, rr, kind, df, q, out=None):
    """Statistic (B, f) float32 from projections U (B, r, f) and ||R||^2 (f,).

    Written into ``out`` (B, f) when given.
    """
    r = U.shape[1]
    ss = np.multiply(U[:, 0], U[:, 0], out=out)
    for j in range(1, r):
        ss += U[:, j] * U[:, j]
    if kind == "t":
        eff = U[:, 0]
    else:
        eff = U[:, 0] * U[:, 0]
        for j in range(1, q):
            eff += U[:, j] * U[:, j]
    np.subtract(rr, ss, out=ss)                    # rss, in place
    # rss <= 0 only for constant features (then U = 0 and the statistic is 0)
    # or from float32 rounding of a perfect fit
    np.maximum(ss, np.float32(1e-30), out=ss)
    np.divide(np.float32(df), ss, out=ss)
    if kind == "t":
        np.sqrt(ss, out=ss)
        np.multiply(ss, eff, out=ss)
    else:
        np.multiply(ss, eff, out=ss)
        ss *= np.float32(1.0 / q)
    return ss


class _Engine:
    """Everything a batch worker needs; read-only once built."""

    def __init__(self, R, rr, Q, kind, df, q, shape, rearr, adjacency, correction,
                 tails, threshold, tfce_opts, batch_size):
        self.R, self.rr, self.Q = R, rr, Q.astype(np.float32)
        self.kind, self.df, self.q = kind, df, q
        self.shape = shape
        self.rearr = rearr
        self.adj = adjacency
        self.correction = correction
        self.tails = tails
        self.threshold = threshold
        self.tfce_opts = tfce_opts
        self.batch_size = batch_size
        self.needs_maps = correction in ("cluster-mass", "cluster-extent", "tfce")
        self._buffers = {}

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_buffers"] = {}
        return state

    def _buffer(self, B, F):
        """A (B, F) float32 work array reused by the calling thread.

        Reuse avoids page-faulting a fresh ~100 MB array for every batch.
        """
        import threading
        key = threading.get_ident()
        buf = self._buffers.get(key)
        if buf is None or buf.shape[0] < B:
            buf = np.empty((max(B, self.batch_size), F), np.float32)
            self._buffers[key] = buf
        return buf[:B]

    def gemm_rows(self, rows):
        """Stacked (B r, n) float32 matrix so that G @ R gives Q' P_b R."""
        n, r = self.Q.shape
        B = rows.shape[0]
        if self.rearr.kind == "sign-flip":
            G = rows[:, :, None].astype(np.float32) * self.Q[None, :, :]     # (B, n, r)
        else:
            inv = np.argsort(rows, axis=1)
            G = self.Q[inv]                                                 # (B, n, r)
        return np.ascontiguousarray(G.transpose(0, 2, 1)).reshape(B * r, n)

    def block_rows(self, k):
        """The (RES_BLOCK r, n) product matrix of resample block ``k``.

        Rows past the last resample are zero (padding): a product row depends
        only on its own row of G, so padding never changes a real resample.
        """
        n, r = self.Q.shape
        m = self.rearr.n_resamples
        a, b = k * RES_BLOCK, min(m, (k + 1) * RES_BLOCK)
        G = np.zeros((RES_BLOCK * r, n), np.float32)
        G[:(b - a) * r] = self.gemm_rows(self.rearr.matrix[a:b])
        return G

    def feature_chunks(self):
        """Fixed feature chunks ``(a, b)`` and the common product width."""
        F = self.R.shape[1]
        fc = min(FEATURE_CHUNK, F)
        return [(a, min(F, a + fc)) for a in range(0, F, fc)], fc

    def stat_maps(self, lo, hi, out=None):
        """Statistics for resamples lo..hi-1: (B, F) float32 maps (or None) and
        per-resample max / min of the statistic.

        Every product is ``G_k @ R_c`` with fixed shapes ``(RES_BLOCK r, n) @
        (n, fc)``: resample ``i`` in row block ``k = i // RES_BLOCK``, feature
        chunks at fixed offsets (last one zero-padded), BLAS held to one
        thread.  A resample's statistic therefore never depends on the batch
        it falls in, nor on the worker that computes it.
        """
        B = hi - lo
        r = self.Q.shape[1]
        n = self.R.shape[0]
        F = self.R.shape[1]
        ks = range(lo // RES_BLOCK, (hi - 1) // RES_BLOCK + 1)
        if self.needs_maps:
            out = self._buffer(B, F) if out is None else out[:B]
        else:
            out = None
        mx = np.full(B, -np.inf)
        mn = np.full(B, np.inf)
        chunks, fc = self.feature_chunks()
        with _one_blas_thread():
            Gs = [self.block_rows(k) for k in ks]
            pad = None
            for a, b in chunks:
                Rc = self.R[:, a:b]
                if b - a < fc:                      # last chunk: zero-padded copy
                    pad = np.zeros((n, fc), np.float32) if pad is None else pad
                    pad[:, :b - a] = Rc
                    pad[:, b - a:] = 0.0
                    Rc = pad
                for k, G in zip(ks, Gs):
                    i0 = max(lo, k * RES_BLOCK)
                    i1 = min(hi, (k + 1) * RES_BLOCK)
                    U = (G @ Rc).reshape(RES_BLOCK, r, fc)
                    U = U[i0 - k * RES_BLOCK:i1 - k * RES_BLOCK, :, :b - a]
                    st = _stat_from_u(U, self.rr[a:b], self.kind, self.df, self.q,
                                      out=None if out is None else out[i0 - lo:i1 - lo, a:b])
                    if out is None:
                        np.maximum(mx[i0 - lo:i1 - lo], st.max(axis=1),
                                   out=mx[i0 - lo:i1 - lo])
                        np.minimum(mn[i0 - lo:i1 - lo], st.min(axis=1),
                                   out=mn[i0 - lo:i1 - lo])
        return out, mx, mn

    def score_map(self, st):
        """(max_pos, max_neg) of one resampled map for the map-based corrections."""
        st = st.reshape(self.shape)
        if self.correction == "tfce":
            return _tfce_extremes(st, self.adj, self.kind, self.tails, self.tfce_opts)
        sc = signed_cluster_scores(st, self.threshold, self.adj,
                                   _signs(self.kind, self.tails))
        if sc.mass.size == 0:
            return 0.0, 0.0
        if self.correction == "cluster-mass":
            vals = sc.mass
        else:
            vals = sc.sign * sc.extent.astype(float)
        return float(max(vals.max(), 0.0)), float(min(vals.min(), 0.0))

    def stacked_adjacency(self, copies):
        """Block-diagonal adjacency of ``copies`` grids (cached per size)."""
        key = ("adj", copies)
        adj = self._buffers.get(key)
        if adj is None:
            adj = sparse.csr_matrix(sparse.block_diag([self.adj] * copies, format="csr"))
            adj.sort_indices()
            self._buffers[key] = adj
        return adj

    def score_stack(self, maps):
        """(max_pos, max_neg) per map for a few small maps labelled together.

        The maps are stacked along the source axis with a block-diagonal
        adjacency, so one labelling serves them all; scores are identical to
        :meth:`score_map` map by map.
        """
        g = maps.shape[0]
        S, T = self.shape
        F = S * T
        st = maps.reshape(g, S, T)
        if self.correction == "tfce":
            two = not (self.kind == "F" or self.tails in ("greater", "less"))
            x = -st if (self.kind == "t" and self.tails == "less") else st
            tf = tfce_stack(x, self.stacked_adjacency(2 * g if two else g),
                            two_sided=two, **self.tfce_opts)
            if self.kind == "t" and self.tails == "less":
                tf = -tf
            tf = tf.reshape(g, -1)
            return np.maximum(tf.max(axis=1), 0.0), np.minimum(tf.min(axis=1), 0.0)
        sc = signed_cluster_scores(st.reshape(g * S, T), self.threshold,
                                   self.stacked_adjacency(g), _signs(self.kind, self.tails))
        pos = np.zeros(g)
        neg = np.zeros(g)
        if sc.mass.size:
            owner = np.zeros(sc.mass.size, np.int64)
            owner[sc.comp] = sc.idx // F
            vals = sc.mass if self.correction == "cluster-mass" else sc.sign * sc.extent.astype(float)
            np.maximum.at(pos, owner, vals)
            np.minimum.at(neg, owner, vals)
        return pos, neg

    def score_range(self, maps, lo, hi):
        """(max_pos, max_neg) arrays for maps[lo:hi]."""
        B = hi - lo
        pos = np.zeros(B)
        neg = np.zeros(B)
        F = maps.shape[1]
        group = max(1, min(B, _STACK_FEATURES // F))
        if group == 1:
            for i in range(B):
                pos[i], neg[i] = self.score_map(maps[lo + i])
        else:
            for a in range(0, B, group):
                b = min(B, a + group)
                pos[a:b], neg[a:b] = self.score_stack(maps[lo + a:lo + b])
        return pos, neg

    def run_batch(self, lo, hi):
        maps, mx, mn = self.stat_maps(lo, hi)
        if maps is None:
            return lo, mx, mn
        pos, neg = self.score_range(maps, 0, hi - lo)
        return lo, pos, neg

    def pieces(self, B, n_workers):
        """Split B maps into work items for ``n_workers`` (whole stacking groups)."""
        group = max(1, min(B, _STACK_FEATURES // max(1, self.R.shape[1])))
        n_groups = -(-B // group)
        per = max(1, -(-n_groups // n_workers))
        step = per * group
        return [(a, min(B, a + step)) for a in range(0, B, step)]


_BLAS_CONTROLLER = None


def _one_blas_thread():
    """Context that holds BLAS to one thread (threadpoolctl).

    OpenBLAS splits a product differently for different thread counts, and
    the split changes float32 rounding; one thread everywhere (calling
    thread, thread pool, process workers) keeps the products bit-identical.
    """
    global _BLAS_CONTROLLER
    if _BLAS_CONTROLLER is None:
        from threadpoolctl import ThreadpoolController
        _BLAS_CONTROLLER = ThreadpoolController()
    return _BLAS_CONTROLLER.limit(limits=1, user_api="blas")


def _signs(kind, tails):
    if kind == "F" or tails == "greater":
        return (1,)
    if tails == "less":
        return (-1,)
    return (1, -1)


def _tfce_extremes(st, adj, kind, tails, opts):
    tf = _tfce_signed(st, adj, kind, tails, opts)
    return float(max(tf.max(), 0.0)), float(min(tf.min(), 0.0))


def _tfce_signed(st, adj, kind, tails, opts):
    st = np.asarray(st, dtype=np.float64)
    if kind == "F" or tails == "greater":
        return tfce_map(st, adj, two_sided=False, **opts)
    if tails == "less":
        return -tfce_map(-st, adj, two_sided=False, **opts)
    return tfce_map(st, adj, two_sided=True, **opts)


def _max_from(pos, neg, kind, tails):
    """Per-resample FWER maximum on the scale of the observed values."""
    if kind == "F" or tails == "greater":
        return np.asarray(pos, float)
    if tails == "less":
        return -np.asarray(neg, float)
    return np.maximum(np.asarray(pos, float), -np.asarray(neg, float))


def _observed_scale(values, kind, tails):
    values = np.asarray(values, float)
    if kind == "F" or tails == "greater":
        return values
    if tails == "less":
        return -values
    return np.abs(values)


def _threshold(kind, forming_p, tails, df):
    if kind == "F":
        return float(sps.f.isf(forming_p, df[0], df[1]))
    if tails == "two":
        return float(sps.t.isf(forming_p / 2.0, df[0]))
    return float(sps.t.isf(forming_p, df[0]))


def _parametric_p(stat, kind, tails, df):
    if kind == "F":
        return sps.f.sf(stat, df[0], df[1])
    if tails == "two":
        return np.minimum(1.0, 2.0 * sps.t.sf(np.abs(stat), df[0]))
    if tails == "greater":
        return sps.t.sf(stat, df[0])
    return sps.t.cdf(stat, df[0])


def _auto_batch(n_res, F, r, needs_maps, n_jobs):
    """Default batch: a whole number of product blocks (at least one) that
    fits the map budget, so that no product row is padding except at the end."""
    fit = MEMORY_BUDGET / max(1, n_jobs) // (4.0 * F) if needs_maps else 256
    B = max(RES_BLOCK, int(fit) // RES_BLOCK * RES_BLOCK)
    return int(max(1, min(n_res, B)))


def _progress_wrap(progress, total):
    if callable(progress):
        return progress
    if progress:
        try:
            from tqdm import tqdm
        except ImportError:  # pragma: no cover
            return None
        bar = tqdm(total=total, desc="resamples", unit="resample")

        def update(done, total_):
            bar.n = done
            bar.refresh()
            if done >= total_:
                bar.close()
        return update
    return None


def _residualise(Yf, q_nui, chunk=8192):
    """Residuals of Yf (n, F) on the orthonormal columns ``q_nui`` (float32)."""
    R = np.empty_like(Yf)
    for a in range(0, Yf.shape[1], chunk):
        y = Yf[:, a:a + chunk].astype(np.float64)
        R[:, a:a + chunk] = y - q_nui @ (q_nui.T @ y)
    return R


def _sum_squares(R, chunk=8192):
    rr = np.empty(R.shape[1], np.float64)
    for a in range(0, R.shape[1], chunk):
        y = R[:, a:a + chunk].astype(np.float64)
        rr[a:a + chunk] = np.einsum("ij,ij->j", y, y)
    return rr.astype(np.float32)


#: largest ||y|| / ||r_z|| (raw over residual norm) for running the products on Y
_RAW_RATIO = 30.0


def _norms_raw_and_residual(Yf, q_nui, chunk=8192):
    """Per-feature ||y||^2 and ||y - H_z y||^2 in float64, without storing residuals."""
    yy = np.empty(Yf.shape[1])
    rr = np.empty(Yf.shape[1])
    for a in range(0, Yf.shape[1], chunk):
        y = Yf[:, a:a + chunk].astype(np.float64)
        r = y - q_nui @ (q_nui.T @ y)
        yy[a:a + chunk] = np.einsum("ij,ij->j", y, y)
        rr[a:a + chunk] = np.einsum("ij,ij->j", r, r)
    return yy, rr


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


# ----------------------------------------------------------------------------
# cluster tables
# ----------------------------------------------------------------------------

def _table_and_labels(parts, shape):
    """Cluster table and label map from per-sign components (vectorised).

    ``parts``: list of (sign, flat idx, comp, n, mass, extent, p).  Rows are
    sorted by p, then |mass| descending; labels 1..K follow the rows.
    """
    S, T = shape
    labels = np.zeros(S * T, np.int32)
    parts = [pt for pt in parts if pt[3] > 0]
    if not parts:
        return pd.DataFrame(columns=_CLUSTER_COLUMNS), labels.reshape(shape)
    signs, masses, extents, ps, nsrc, nsmp, idx_all, comp_all = [], [], [], [], [], [], [], []
    offset = 0
    for sign, idx, comp, n, mass, extent, p in parts:
        comp = np.asarray(comp, np.int64)
        src, smp = idx // T, idx % T
        nsrc.append(np.bincount(np.unique(comp * S + src) // S, minlength=n))
        nsmp.append(np.bincount(np.unique(comp * T + smp) // T, minlength=n))
        signs.append(np.full(n, int(sign)))
        masses.append(np.asarray(mass, float))
        extents.append(np.asarray(extent, np.int64))
        ps.append(np.asarray(p, float))
        idx_all.append(idx)
        comp_all.append(comp + offset)
        offset += n
    mass = np.concatenate(masses)
    p = np.concatenate(ps)
    order = np.lexsort((-np.abs(mass), np.where(np.isnan(p), np.inf, p)))
    rank = np.empty(offset, np.int64)
    rank[order] = np.arange(offset)
    labels[np.concatenate(idx_all)] = rank[np.concatenate(comp_all)] + 1
    df = pd.DataFrame({
        "cluster": np.arange(1, offset + 1),
        "sign": np.concatenate(signs)[order],
        "mass": mass[order],
        "extent": np.concatenate(extents)[order],
        "n_sources": np.concatenate(nsrc)[order],
        "n_samples": np.concatenate(nsmp)[order],
        "p_corrected": p[order]})
    return df[_CLUSTER_COLUMNS], labels.reshape(shape)


def _components_of(mask_map, stat, pmap, adjacency, kind):
    """Connected components of a boolean map split by the statistic's sign."""
    parts = []
    flat_stat = stat.reshape(-1)
    for sign in ((1,) if kind == "F" else (1, -1)):
        sel = mask_map & ((stat > 0) if sign > 0 else (stat < 0))
        idx, comp, n = components(sel, adjacency)
        vals = flat_stat[idx]
        mass = np.bincount(comp, weights=vals, minlength=n)
        extent = np.bincount(comp, minlength=n)
        if pmap is None:
            p = np.full(n, np.nan)
        else:
            p = np.full(n, np.inf)
            np.minimum.at(p, comp, pmap.reshape(-1)[idx])
        parts.append((sign, idx, comp, n, mass, extent, p))
    return parts


# ----------------------------------------------------------------------------
# public entry point
# ----------------------------------------------------------------------------

def run_inference(Y, X, contrast, adjacency, *, scheme="sign-flip",
                  correction="cluster-mass", n_resamples=1000, seed=0, forming_p=0.05,
                  tails="two", alpha=0.05, nuisance=None, blocks=None, batch_size=None,
                  n_jobs=1, progress=False, tfce_e=0.5, tfce_h=2.0, tfce_steps=100,
                  tfce_dh=None, backend="threads") -> InferenceResult:
    """GLM contrast with resampling-based multiple-comparison correction.

    Parameters
    ----------
    Y : (n, n_sources, n_times) float32
        One map per participant (already reduced within participant).
    X : (n, p) design matrix.
    contrast : (p,) weights -> t statistic, or (k, p) -> F statistic.
    adjacency : (n_sources, n_sources) sparse symmetric source adjacency.
    scheme : "sign-flip" (one-sample / paired data) or "permutation".
    correction : "cluster-mass", "cluster-extent", "tfce", "max-stat",
        "fdr" or "none".  "fdr" and "none" use parametric p-values and do not
        resample.
    n_resamples : requested number of rearrangements, identity included
        (fewer are used when all distinct ones fit: exact test).
    seed : non-negative int, or None (a fresh seed, recorded in ``extra``)
    forming_p : cluster-forming p; two-sided for ``tails="two"``
        (threshold ``t.isf(forming_p / 2, df)``), one-sided otherwise, upper
        tail for F.
    tails : "two", "greater" or "less" (F statistics are always upper tail).
    alpha : level used to outline significant components for the
        point-wise corrections.
    nuisance : None/"auto" -> Freedman-Lane whenever the design has columns
        outside the contrast's space; False -> rearrange the raw data.
    blocks : (n,) exchangeability blocks (permutations stay within blocks).
    batch_size : resamples per batch (default: a multiple of ``RES_BLOCK``
        that fits ``MEMORY_BUDGET``).  It changes memory and speed only,
        never the result.
    n_jobs : number of workers (-1: all cores).  ``backend="threads"``
        (default): products in the calling thread (one BLAS thread),
        labelling of each batch's maps on a thread pool, pipelined with the
        next batch's products.
        ``backend="loky"`` (or another joblib backend): whole batches on
        joblib process workers.
    progress : False, True (tqdm bar) or a callable ``f(done, total)``.
    tfce_e, tfce_h, tfce_steps, tfce_dh : TFCE parameters (see
        :mod:`groupsrc.stats.tfce`); exponents must be finite and positive.
        Invalid parameters raise ValueError before any work is done.

    Returns
    -------
    InferenceResult
    """
    Y, X, adjacency, blocks = _validate(Y, X, contrast, adjacency, scheme, correction,
                                        n_resamples, forming_p, tails, alpha, blocks,
                                        batch_size, n_jobs, nuisance, seed,
                                        (tfce_e, tfce_h, tfce_steps, tfce_dh))
    n, S, T = Y.shape
    shape = (S, T)
    C = np.asarray(contrast, dtype=np.float64)
    basis = glm.contrast_basis(X, C)
    kind = basis.kind
    Yf = Y.reshape(n, S * T)

    # ---- observed statistic (float64) -------------------------------------
    if kind == "t":
        fit = glm.t_contrast(Yf, X, C)
        df = (fit.df,)
        stat = fit.t
        estimate, se = fit.estimate, fit.se
        std_effect = glm.cohens_d(fit.estimate, fit.sigma, fit.df)
    else:
        fit = glm.f_contrast(Yf, X, C)
        df = (fit.df1, fit.df2)
        stat = fit.F
        estimate = se = np.full(S * T, np.nan)
        std_effect = glm.partial_eta_squared(fit.F, fit.df1, fit.df2)
    p_unc = _parametric_p(stat, kind, tails, df)
    stat_map = stat.reshape(shape)

    extra = {"df_residual": basis.df, "design_rank": basis.rank,
             "nuisance_columns": int(basis.q_nuisance.shape[1])}
    threshold = None
    if correction in ("cluster-mass", "cluster-extent"):
        threshold = _threshold(kind, forming_p, tails, df)

    # ---- parametric-only corrections --------------------------------------
    if correction in ("fdr", "none"):
        p_corr = fdr_bh(p_unc).reshape(shape) if correction == "fdr" else None
        base = p_corr if p_corr is not None else p_unc.reshape(shape)
        parts = _components_of(base <= alpha, stat_map, p_corr, adjacency, kind)
        table, labels = _table_and_labels(parts, shape)
        if correction == "none":
            extra["clusters_from"] = "p_uncorrected <= alpha (no correction)"
        null = pd.DataFrame(columns=["resample", "max_stat", "max_pos", "max_neg"])
        return _result(kind, df, stat, estimate, std_effect, se, p_unc, p_corr, labels,
                       table, null, threshold, 0, False, scheme, correction, tails,
                       shape, extra)

    # ---- rearrangements and residual-forming ------------------------------
    rearr = rearrangements(scheme, n, int(n_resamples), seed, labels=X, blocks=blocks)
    extra["seed"] = rearr.seed
    # the rearrangement set itself, so that the results record what was used
    extra["rearrangements"] = rearr.matrix
    extra["rearrangement_kind"] = rearr.kind
    use_fl = nuisance is not False and basis.q_nuisance.shape[1] > 0
    freedman_lane = use_fl and not _invariant(basis.q_nuisance, rearr)
    if freedman_lane:
        R = _residualise(Yf, basis.q_nuisance)
        Q = basis.q
        rr = _sum_squares(R)
    elif use_fl:
        # Nuisance space invariant under every rearrangement (e.g. the intercept
        # under permutations): Q_nuisance' P R_z = 0 and q_effect' P Y =
        # q_effect' P R_z, so the products can run on Y itself with only the
        # effect basis, and ||R_z||^2 is computed once in float64.  Float32
        # products on Y lose about eps * ||y|| / ||r_z|| relative precision, so
        # this path is taken only when that ratio stays below _RAW_RATIO for
        # every feature; otherwise a float32 copy of R_z is made.
        Q = basis.q_effect
        yy, rr64 = _norms_raw_and_residual(Yf, basis.q_nuisance)
        if np.all(yy <= _RAW_RATIO ** 2 * rr64):
            R, rr = Yf, rr64.astype(np.float32)
        else:
            R = _residualise(Yf, basis.q_nuisance)
            rr = _sum_squares(R)
    else:
        R = Yf
        Q = basis.q
        rr = _sum_squares(R)
    scheme_name = scheme + (" / Freedman-Lane" if freedman_lane else "")
    extra["freedman_lane"] = freedman_lane

    needs_maps = correction in ("cluster-mass", "cluster-extent", "tfce")
    n_jobs_eff = int(n_jobs) if int(n_jobs) > 0 else max(1, __import__("os").cpu_count())
    m = rearr.n_resamples
    # map buffers alive at once: one per process worker, or two alternating
    # buffers for the pipelined thread mode
    n_buffers = 1 if n_jobs_eff == 1 else (2 if backend == "threads" else n_jobs_eff)
    B = int(batch_size) if batch_size else _auto_batch(m, S * T, Q.shape[1], needs_maps,
                                                       n_buffers)
    extra["batch_size"] = B
    tfce_opts = {"E": tfce_e, "H": tfce_h, "steps": tfce_steps, "dh": tfce_dh}
    if correction == "tfce":
        extra["tfce"] = dict(tfce_opts)
    eng = _Engine(R, rr, Q, kind, basis.df, basis.df1, shape, rearr, adjacency,
                  correction, tails, threshold, tfce_opts, B)
    batches = [(a, min(m, a + B)) for a in range(0, m, B)]
    report = _progress_wrap(progress, m)
    pos = np.zeros(m)
    neg = np.zeros(m)
    done = 0
    def collect(lo, bpos, bneg):
        nonlocal done
        pos[lo:lo + bpos.size] = bpos
        neg[lo:lo + bneg.size] = bneg
        done += bpos.size
        if report is not None:
            report(done, m)

    if n_jobs_eff == 1:
        for a, b in batches:
            collect(*eng.run_batch(a, b))
    elif backend == "threads":
        # Pipelined: the products for batch i run in this thread (on one
        # BLAS thread, see stat_maps) while worker threads label batch
        # i - 1's maps.
        # Two map buffers alternate; a buffer is refilled only after the
        # labelling that reads it has finished.
        from concurrent.futures import ThreadPoolExecutor

        def finish(job):
            a0, futs = job
            outs = [f.result() for f in futs]
            collect(a0, np.concatenate([o[0] for o in outs]),
                    np.concatenate([o[1] for o in outs]))

        bufs = [np.empty((B, S * T), np.float32) for _ in range(2)] if needs_maps else None
        pending = None
        with ThreadPoolExecutor(max_workers=n_jobs_eff) as pool:
            for i, (a, b) in enumerate(batches):
                maps, mx, mn = eng.stat_maps(a, b, out=None if bufs is None else bufs[i % 2])
                if pending is not None:
                    finish(pending)
                    pending = None
                if maps is None:
                    collect(a, mx, mn)
                    continue
                pending = (a, [pool.submit(eng.score_range, maps, u, v)
                               for u, v in eng.pieces(b - a, n_jobs_eff)])
            if pending is not None:
                finish(pending)
    else:
        from joblib import Parallel, delayed
        par = Parallel(n_jobs=n_jobs_eff, backend=backend, return_as="generator")
        for out in par(delayed(eng.run_batch)(a, b) for a, b in batches):
            collect(*out)
    null_max = _max_from(pos, neg, kind, tails)
    null = pd.DataFrame({"resample": np.arange(m), "max_stat": null_max,
                         "max_pos": pos, "max_neg": neg})
    extra["critical_value"] = float(np.quantile(null_max, 1 - alpha, method="higher"))

    # ---- observed scores and corrected p ----------------------------------
    if correction in ("cluster-mass", "cluster-extent"):
        parts = []
        pmap = np.ones(S * T)
        for sign in _signs(kind, tails):
            c = cluster_scores(stat_map, threshold, adjacency, sign)
            n_c = c.mass.size
            val = np.abs(c.mass) if correction == "cluster-mass" else c.extent.astype(float)
            p = null_p_values(null_max, val) if n_c else np.zeros(0)
            if n_c:
                pmap[c.idx] = p[c.comp]
            parts.append((sign, c.idx, c.comp, n_c, c.mass, c.extent, p))
        table, labels = _table_and_labels(parts, shape)
        p_corr = pmap.reshape(shape)
    else:
        if correction == "tfce":
            obs = _tfce_signed(stat_map, adjacency, kind, tails, tfce_opts)
            extra["tfce_observed"] = obs.astype(np.float32)
        else:
            obs = stat_map
        p_corr = null_p_values(null_max, _observed_scale(obs, kind, tails)).reshape(shape)
        parts = _components_of(p_corr <= alpha, stat_map, p_corr, adjacency, kind)
        table, labels = _table_and_labels(parts, shape)

    return _result(kind, df, stat, estimate, std_effect, se, p_unc, p_corr, labels, table,
                   null, threshold, m, rearr.exact, scheme_name, correction, tails, shape,
                   extra)


def _result(kind, df, stat, estimate, std_effect, se, p_unc, p_corr, labels, table, null,
            threshold, m, exact, scheme, correction, tails, shape, extra):
    def shaped(a):
        return None if a is None else np.asarray(a, dtype=np.float64).reshape(shape)
    return InferenceResult(
        kind=kind, df=tuple(int(d) for d in df), statistic=shaped(stat),
        estimate=shaped(estimate), std_effect=shaped(std_effect), se=shaped(se),
        p_uncorrected=shaped(p_unc), p_corrected=shaped(p_corr), cluster_labels=labels,
        clusters=table, null=null, threshold=threshold, n_resamples=int(m),
        exact=bool(exact), scheme=scheme, correction=correction, tails=tails, extra=extra)
