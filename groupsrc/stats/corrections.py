"""Multiple-comparison corrections: one scorer per correction, chosen from a table.

Every correction answers two questions.  During resampling: what is the
largest positive and the most negative *score* of one resampled statistic
map (``null_extremes``)?  After it: given the null distribution of the
map-wide maximum, what is each observed point's corrected p, and which
points form the clusters reported (``outcome``)?

============== ========================================================= =========
correction     score                                                     resamples
============== ========================================================= =========
cluster-mass   sum of the statistic over each supra-threshold component  yes
               (Maris & Oostenveld 2007, J Neurosci Methods 164:177-190)
cluster-extent number of points of each supra-threshold component        yes
tfce           threshold-free cluster enhancement (Smith & Nichols 2009) yes
max-stat       the statistic itself (point-wise FWER)                    yes
fdr            Benjamini-Hochberg adjusted parametric p (1995)           no
none           parametric p, uncorrected                                 no
============== ========================================================= =========

Conventions: F statistics are upper-tailed whatever ``tails`` says and their
clusters have sign +1; the FWER-corrected p of a value is the share of
resamples (identity included) whose maximum reaches it (Phipson & Smyth
2010); for the point-wise corrections the reported clusters are the
connected components of ``p <= alpha``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import sparse

from .clusters import (cluster_scores, components_by_sign, cluster_table,
                       signed_cluster_scores)
from .fdr import fdr_bh
from .resampling import null_p_values
from .tfce import E_DEFAULT, H_DEFAULT, STEPS_DEFAULT, check_parameters
from .tfce import tfce as tfce_map
from .tfce import tfce_stack

#: maps smaller than this many features are labelled several at a time
STACK_FEATURES = 100_000


@dataclass(frozen=True)
class TfceOptions:
    """TFCE settings: ``extent_power`` and ``height_power`` are the exponents the
    paper writes E and H (Smith & Nichols 2009: E = 0.5, H = 2); the height
    integral uses ``steps`` steps per map, or the fixed ``step`` when given."""

    extent_power: float = E_DEFAULT
    height_power: float = H_DEFAULT
    steps: int = STEPS_DEFAULT
    step: float | None = None

    def __post_init__(self):
        check_parameters(self.extent_power, self.height_power, self.steps, self.step)

    def keywords(self) -> dict:
        """The arguments of :func:`groupsrc.stats.tfce.tfce`."""
        return {"E": self.extent_power, "H": self.height_power, "steps": self.steps,
                "dh": self.step}


@dataclass
class Outcome:
    """What a correction makes of the observed map."""

    p_corrected: np.ndarray | None      # (S, T), None without correction
    clusters: pd.DataFrame
    labels: np.ndarray                  # (S, T) int32, 0 = none
    cluster_rule: str                   # how the reported clusters were formed
    enhanced: np.ndarray | None = None  # (S, T) TFCE map


def signs(kind, tails):
    if kind == "F" or tails == "greater":
        return (1,)
    if tails == "less":
        return (-1,)
    return (1, -1)


def max_from(pos, neg, kind, tails):
    """Per-resample FWER maximum on the scale of the observed values."""
    if kind == "F" or tails == "greater":
        return np.asarray(pos, float)
    if tails == "less":
        return -np.asarray(neg, float)
    return np.maximum(np.asarray(pos, float), -np.asarray(neg, float))


def observed_scale(values, kind, tails):
    values = np.asarray(values, float)
    if kind == "F" or tails == "greater":
        return values
    if tails == "less":
        return -values
    return np.abs(values)


class Correction:
    """Base scorer.  ``shape`` is (n_sources, n_times); ``adjacency`` the sources'."""

    name = ""
    resamples = True
    needs_maps = False

    def __init__(self, kind, tails, shape, adjacency, threshold=None, tfce=None):
        self.kind, self.tails, self.shape = kind, tails, tuple(shape)
        self.adj = adjacency
        self.threshold = threshold
        self.tfce = tfce
        self._stacked = {}

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_stacked"] = {}
        return state

    # -- resampling side ------------------------------------------------------
    def group_size(self, n_maps):
        """Maps labelled together (small maps are stacked into one labelling)."""
        F = self.shape[0] * self.shape[1]
        return max(1, min(n_maps, STACK_FEATURES // max(1, F)))

    def stacked_adjacency(self, copies):
        """Block-diagonal adjacency of ``copies`` source spaces (cached per size)."""
        adj = self._stacked.get(copies)
        if adj is None:
            adj = sparse.csr_matrix(sparse.block_diag([self.adj] * copies, format="csr"))
            adj.sort_indices()
            self._stacked[copies] = adj
        return adj

    def null_extremes(self, maps, lo, hi):
        """(max_pos, max_neg) score arrays of maps[lo:hi] (maps: (B, S*T))."""
        B = hi - lo
        pos, neg = np.zeros(B), np.zeros(B)
        group = self.group_size(B)
        for a in range(0, B, group):
            b = min(B, a + group)
            pos[a:b], neg[a:b] = self._score_stack(maps[lo + a:lo + b])
        return pos, neg

    def _score_stack(self, maps):  # pragma: no cover - map-based corrections override
        raise NotImplementedError

    # -- observed side --------------------------------------------------------
    def outcome(self, stat_map, null_max, alpha) -> Outcome:  # pragma: no cover
        raise NotImplementedError

    def _pointwise(self, stat_map, p_corr, alpha, rule, enhanced=None):
        parts = components_by_sign(p_corr <= alpha, stat_map, p_corr, self.adj, self.kind)
        table, labels = cluster_table(parts, self.shape)
        return Outcome(p_corr, table, labels, rule, enhanced)


class ClusterMass(Correction):
    name = "cluster-mass"
    needs_maps = True
    score = "mass"

    def _values(self, sc):
        return sc.mass if self.score == "mass" else sc.sign * sc.extent.astype(float)

    def _score_stack(self, maps):
        g = maps.shape[0]
        S, T = self.shape
        st = maps.reshape(g * S, T)
        sc = signed_cluster_scores(st, self.threshold, self.stacked_adjacency(g),
                                   signs(self.kind, self.tails))
        pos, neg = np.zeros(g), np.zeros(g)
        if sc.mass.size:
            owner = np.zeros(sc.mass.size, np.int64)
            owner[sc.comp] = sc.idx // (S * T)
            vals = self._values(sc)
            np.maximum.at(pos, owner, vals)
            np.minimum.at(neg, owner, vals)
        return pos, neg

    def outcome(self, stat_map, null_max, alpha):
        parts = []
        pmap = np.ones(stat_map.size)
        for sign in signs(self.kind, self.tails):
            c = cluster_scores(stat_map, self.threshold, self.adj, sign)
            n_c = c.mass.size
            val = np.abs(c.mass) if self.score == "mass" else c.extent.astype(float)
            p = null_p_values(null_max, val) if n_c else np.zeros(0)
            if n_c:
                pmap[c.idx] = p[c.comp]
            parts.append((sign, c.idx, c.comp, n_c, c.mass, c.extent, p))
        table, labels = cluster_table(parts, self.shape)
        return Outcome(pmap.reshape(self.shape), table, labels,
                       "points beyond the cluster-forming threshold")


class ClusterExtent(ClusterMass):
    name = "cluster-extent"
    score = "extent"


class Tfce(Correction):
    name = "tfce"
    needs_maps = True

    def enhance(self, st):
        """TFCE of one map (S, T), signed like the statistic."""
        st = np.asarray(st, dtype=np.float64)
        kw = self.tfce.keywords()
        if self.kind == "F" or self.tails == "greater":
            return tfce_map(st, self.adj, two_sided=False, **kw)
        if self.tails == "less":
            return -tfce_map(-st, self.adj, two_sided=False, **kw)
        return tfce_map(st, self.adj, two_sided=True, **kw)

    def _score_stack(self, maps):
        g = maps.shape[0]
        st = maps.reshape((g,) + self.shape)
        two = not (self.kind == "F" or self.tails in ("greater", "less"))
        less = self.kind == "t" and self.tails == "less"
        tf = tfce_stack(-st if less else st, self.stacked_adjacency(2 * g if two else g),
                        two_sided=two, **self.tfce.keywords())
        tf = (-tf if less else tf).reshape(g, -1)
        return np.maximum(tf.max(axis=1), 0.0), np.minimum(tf.min(axis=1), 0.0)

    def outcome(self, stat_map, null_max, alpha):
        obs = self.enhance(stat_map)
        p = null_p_values(null_max, observed_scale(obs, self.kind, self.tails))
        return self._pointwise(stat_map, p.reshape(self.shape), alpha,
                               "points with corrected p <= alpha", obs.astype(np.float32))


class MaxStat(Correction):
    name = "max-stat"

    def outcome(self, stat_map, null_max, alpha):
        p = null_p_values(null_max, observed_scale(stat_map, self.kind, self.tails))
        return self._pointwise(stat_map, p.reshape(self.shape), alpha,
                               "points with corrected p <= alpha")


class Fdr(Correction):
    name = "fdr"
    resamples = False

    def parametric(self, stat_map, p_uncorrected, alpha):
        p = fdr_bh(p_uncorrected).reshape(self.shape)
        return self._pointwise(stat_map, p, alpha, "points with FDR-adjusted p <= alpha")


class Uncorrected(Correction):
    name = "none"
    resamples = False

    def parametric(self, stat_map, p_uncorrected, alpha):
        p = np.asarray(p_uncorrected).reshape(self.shape)
        parts = components_by_sign(p <= alpha, stat_map, None, self.adj, self.kind)
        table, labels = cluster_table(parts, self.shape)
        return Outcome(None, table, labels, "p_uncorrected <= alpha (no correction)")


#: the corrections, by the name used in the analysis file
CORRECTIONS = {c.name: c for c in (ClusterMass, ClusterExtent, Tfce, MaxStat, Fdr, Uncorrected)}


def make_correction(name, kind, tails, shape, adjacency, threshold=None, tfce=None):
    """The scorer for correction ``name`` (a key of ``CORRECTIONS``)."""
    try:
        cls = CORRECTIONS[name]
    except KeyError:
        raise ValueError(f"correction must be one of {tuple(CORRECTIONS)}, got {name!r}") \
            from None
    return cls(kind, tails, shape, adjacency, threshold=threshold,
               tfce=tfce if cls is Tfce else None)
