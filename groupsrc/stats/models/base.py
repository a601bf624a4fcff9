"""Statistic kernels: the observed statistic of a contrast and its resampled copies.

A kernel owns one model fitted at every feature (source x sample) and one
contrast.  Inference (:mod:`..inference`) asks it for the observed statistic
and, once the rearrangements are drawn, for the statistic of every
rearranged data set; corrections (:mod:`..corrections.scorers`) turn those into
corrected p-values.  ``tests/test_kernel_contract.py`` checks every kernel:
the observed and the resampled statistic agree with a direct refit on small
data.

The contract
------------
``kind`` ("t" or "F"), ``df`` (tuple), ``n_features``, ``n_units`` (the
rows that rearrangements move: participants), ``scheme_name`` (how they were
rearranged, for the methods text), ``freedman_lane``, and

* ``observed(tails) -> Observed`` -- statistic, estimate, standard error,
  standardized effect and parametric p, flat over features;
* ``threshold(forming_p, tails) -> float`` -- the cluster-forming threshold
  on the statistic's scale;
* ``rearrangements(n_resamples, seed, blocks) -> Rearrangements`` -- the
  rearrangement set that respects the model's exchangeability;
* ``prepare(rearrangements)`` -- precompute what the resamples share;
* ``resampled(lo, hi, out=None, part=None) -> (maps or None, max, min)`` --
  the statistic of resamples ``lo..hi-1``: (B, n_features) float32 maps
  written into ``out`` when given, else only each resample's maximum and
  minimum.  ``part = (j, J)`` computes only the j-th of J contiguous runs of
  feature chunks (:meth:`StatisticKernel.chunk_range`), so J threads can
  share one batch; the maxima and minima are then those of that part.  The
  arithmetic of resample ``i`` must not depend on ``lo``, ``hi``, ``part`` or
  the process computing it (bit-for-bit reproducibility, see
  :mod:`.ols`);
* ``describe() -> dict`` -- what the run record says about the statistic.

Undefined features.  Where a feature has no variance to test against (the same
value in every unit), ``observed`` gives a NaN statistic and p, and every
resampled statistic there is 0 (never beyond a threshold);
:func:`..inference.infer` scores the observed map with 0 there and leaves the
corrected p NaN.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass

import numpy as np
from scipy import special
from scipy import stats as sps

from ..engine.perthread import PerThread
from ..resampling import Rearrangements

#: resamples per product block
RES_BLOCK = 16
#: resamples per product block when the batch is held as supra-threshold lists
#: (:mod:`..corrections.exceedances`): a list batch takes a quarter of a map batch's memory,
#: and products of 64 rows run about 1.4x faster per resample than of 16
LIST_BLOCK = 64
#: features per product block (fewer only when the map itself is smaller)
FEATURE_CHUNK = 4096


@dataclass(frozen=True)
class Observed:
    """The observed statistic and its companions, flat over features (float64).

    ``estimate`` and ``se`` are NaN for F contrasts; ``std_effect`` is Hedges'
    g for t contrasts and partial eta squared for F contrasts.

    ``scale`` says what ``statistic`` holds: ``"statistic"`` the t or F itself
    (one df for every feature, ``df``), or ``"z"`` the z of equal p, for
    kernels whose df differ by feature; then ``test_statistic`` holds the t or
    F and ``df_map`` the per-feature (denominator) df, and ``df`` a summary.
    """

    kind: str
    df: tuple
    statistic: np.ndarray
    estimate: np.ndarray
    se: np.ndarray
    std_effect: np.ndarray
    p_uncorrected: np.ndarray
    scale: str = "statistic"
    test_statistic: np.ndarray | None = None
    df_map: np.ndarray | None = None


@dataclass(frozen=True)
class FitInfo:
    """What the run record says about the fitted model."""

    method: str                    # "ordinary least squares", ...
    df_residual: float | None = None
    rank: int | None = None
    nuisance_columns: int | None = None


class StatisticKernel(ABC):
    """Abstract kernel; see the module docstring for the contract."""

    kind: str
    df: tuple
    n_features: int
    n_units: int
    freedman_lane: bool = False
    scheme_name: str = ""

    @abstractmethod
    def observed(self, tails: str) -> Observed: ...

    @abstractmethod
    def threshold(self, forming_p: float, tails: str) -> float: ...

    @abstractmethod
    def rearrangements(self, n_resamples: int, seed, blocks=None) -> Rearrangements: ...

    @abstractmethod
    def prepare(self, rearr: Rearrangements) -> None: ...

    @abstractmethod
    def resampled(self, lo: int, hi: int, out=None, part=None): ...

    @staticmethod
    def chunk_range(n_chunks, part):
        """The feature chunks ``range(c0, c1)`` that ``part = (j, J)`` covers (all when None)."""
        if part is None:
            return range(n_chunks)
        j, J = part
        return range(n_chunks * j // J, n_chunks * (j + 1) // J)

    @abstractmethod
    def info(self) -> FitInfo: ...

    def describe(self) -> dict:
        """What the run record says about the statistic (JSON-ready): ``statistic``
        (``t`` or ``F`` pooled; ``welch_v`` / ``G`` with variance groups; ``z`` of a
        mixed model), ``df_rule`` and ``variance_groups`` (None, or the column and its
        levels' sizes); kernels add their own keys."""
        return {"statistic": self.kind, "df_rule": "residual", "variance_groups": None}

    # -- per-thread work arrays (shared by every kernel) ----------------------
    _buffers: PerThread             # set by each kernel's __init__; not pickled

    def release_buffers(self):
        """Drop every thread's work array (after the null distribution)."""
        self._buffers.clear()

    def buffer(self, B):
        """A (B, n_features) float32 work array reused by the calling thread."""
        buf = self._buffers.get(lambda: np.empty((B, self.n_features), np.float32),
                                fits=lambda b: b.shape[0] >= B)
        return buf[:B]


# ----------------------------------------------------------------------------
# helpers shared by kernels
# ----------------------------------------------------------------------------

def parametric_p(stat, kind, tails, df):
    """Parametric p of a t or F statistic for the given tails (F: upper tail).

    The t tails are Student's distribution function (``scipy.special.stdtr``, what
    ``scipy.stats.t.sf`` / ``cdf`` evaluate) computed in place: one result array,
    no temporaries the size of the map.
    """
    if kind == "F":
        return sps.f.sf(stat, df[0], df[1])
    p = np.array(stat, dtype=np.float64)
    if tails == "two":                       # 2 P(T >= |t|) = 2 P(T <= -|t|)
        np.abs(p, out=p)
        np.negative(p, out=p)
    elif tails == "greater":                 # P(T >= t) = P(T <= -t)
        np.negative(p, out=p)
    special.stdtr(df[0], p, out=p)
    if tails == "two":
        p *= 2.0
        np.minimum(p, 1.0, out=p)
    return p


def forming_threshold(kind, forming_p, tails, df):
    """Statistic value equivalent to the cluster-forming p (two-sided for t and tails two)."""
    if kind == "F":
        return float(sps.f.isf(forming_p, df[0], df[1]))
    if tails == "two":
        return float(sps.t.isf(forming_p / 2.0, df[0]))
    return float(sps.t.isf(forming_p, df[0]))
