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
from . import unionfind
from .clusters import _up_csr, cluster_scores, components_by_sign, cluster_table
from .exceedances import Exceedances
from .fdr import fdr_bh
from ..engine.perthread import PerThread
from ..resampling import null_p_values
from .tfce import E_DEFAULT, H_DEFAULT, check_parameters
from .tfce import tfce as tfce_map
from .tfce import tfce_batch
from .unionfind import tfce_workspace

#: points per map the compiled loops can index (int32)
MAX_POINTS = 2 ** 31


@dataclass(frozen=True)
class TfceOptions:
    """TFCE settings: ``extent_power`` and ``height_power`` are the exponents the
    paper writes E and H (Smith & Nichols 2009: E = 0.5, H = 2); the height
    integral is exact (heights at the data values) unless ``steps`` steps per
    map, or the fixed ``step``, ask for the stepped sum (see :mod:`.tfce`)."""

    extent_power: float = E_DEFAULT
    height_power: float = H_DEFAULT
    steps: int | None = None
    step: float | None = None

    def __post_init__(self):
        check_parameters(self.extent_power, self.height_power, self.steps, self.step)

    def keywords(self) -> dict:
        """The arguments of :func:`groupsrc.stats.corrections.tfce.tfce`."""
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
    lists = False
    #: bytes per feature of each scoring thread's scratch arrays (for the memory plan)
    scratch_bytes = 0

    def __init__(self, kind, tails, shape, adjacency, threshold=None, tfce=None):
        self.n_points = int(shape[0]) * int(shape[1])
        if self.n_points >= MAX_POINTS:
            raise ValueError(f"{shape[0]:,} sources x {shape[1]:,} samples is more than the "
                             f"{MAX_POINTS - 1:,} points a map may have -> analyse a shorter "
                             f"time window or fewer sources per run")
        self.kind, self.tails, self.shape = kind, tails, tuple(shape)
        self.adj = adjacency
        self.threshold = threshold
        self.tfce = tfce
        self._scratch = PerThread()     # allocated once per thread and contrast

    def scratch(self, make):
        """The calling thread's scratch arrays, ``make()`` on its first call."""
        return self._scratch.get(make)

    def release_scratch(self):
        """Drop every thread's scratch arrays (after the null distribution)."""
        self._scratch.clear()

    # -- resampling side ------------------------------------------------------
    def null_extremes(self, maps, lo, hi):  # pragma: no cover - map-based corrections
        """(max_pos, max_neg) score arrays of maps[lo:hi] (maps: (B, S*T))."""
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
    #: scores a resample from its supra-threshold points only (:mod:`.exceedances`)
    lists = True
    score = "mass"
    scratch_bytes = unionfind.CLUSTER_SCRATCH_BYTES

    def _values(self, sc):
        return sc.mass if self.score == "mass" else sc.sign * sc.extent.astype(float)

    def exceedances(self, rows, n_features, parts=1):
        """A batch buffer of supra-threshold lists for this correction's threshold."""
        want = signs(self.kind, self.tails)
        return Exceedances(rows, n_features, self.threshold, 1 in want, -1 in want, parts)

    def null_extremes(self, maps, lo, hi):
        """Compiled labelling and scoring of the resamples lo..hi-1 of a batch, given by
        their maps (B, S*T) or their supra-threshold lists (:mod:`.unionfind`); a
        resample whose list overflowed gets NaN."""
        pos, neg = np.zeros(hi - lo), np.zeros(hi - lo)
        ptr, ind = _up_csr(self.adj)
        ws = self.scratch(lambda: unionfind.cluster_workspace(self.n_points))
        mass = self.score == "mass"
        if isinstance(maps, Exceedances):
            unionfind.listed_cluster_extremes(maps.idx, maps.val, maps.count, maps.bases, lo,
                                              hi, maps.threshold, maps.want_pos, mass, ptr, ind,
                                              self.shape[1], pos, neg, ws)
            return pos, neg
        want = signs(self.kind, self.tails)
        unionfind.cluster_extremes(maps[lo:hi], float(self.threshold), 1 in want, -1 in want,
                                   mass, ptr, ind, self.shape[1], pos, neg, ws)
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
    scratch_bytes = unionfind.TFCE_SCRATCH_BYTES

    def enhance(self, st):
        """TFCE of one map (S, T), signed like the statistic."""
        st = np.asarray(st, dtype=np.float64)
        kw = self.tfce.keywords()
        if self.kind == "F" or self.tails == "greater":
            return tfce_map(st, self.adj, two_sided=False, **kw)
        if self.tails == "less":
            return -tfce_map(-st, self.adj, two_sided=False, **kw)
        return tfce_map(st, self.adj, two_sided=True, **kw)

    def null_extremes(self, maps, lo, hi):
        """Compiled one-pass TFCE of maps[lo:hi], extremes only (:mod:`.tfce`)."""
        two = not (self.kind == "F" or self.tails in ("greater", "less"))
        less = self.kind == "t" and self.tails == "less"
        ws = self.scratch(lambda: tfce_workspace(self.n_points))
        pos, neg = tfce_batch(maps[lo:hi], self.adj, two_sided=two, scale=-1.0 if less else 1.0,
                              extremes=True, workspace=ws, **self.tfce.keywords())
        return pos, neg

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
