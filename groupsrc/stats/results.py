"""Small result objects passed from the statistics stages to the output stage.

Arrays over sources and time are ``(n_sources, n_times)``; ``n_times`` is the
analysed window (``time_axis``), not necessarily the whole input.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..sources import TimeAxis, VolumeGrid
from .corrections.scorers import TfceOptions
from .models.base import FitInfo


@dataclass(frozen=True)
class ResamplingRecord:
    """How the null distribution of one contrast was made (checkpoints keep exactly this).

    Attributes
    ----------
    seed : int
        Seed of the rearrangements (drawn fresh and recorded when none was given).
    kind : "sign-flip" or "permutation"
    n_resamples : int
        Rearrangements used, identity included.
    exact : bool
        True when every distinct rearrangement was enumerated once.
    batch_size : int
        Resamples per batch (memory and speed only; never the result).
    freedman_lane : bool
        Whether nuisance regressors were handled by Freedman-Lane.
    critical_value : float
        The (1 - alpha) quantile of the map-wide maximum (``method="higher"``).
    """

    seed: int
    kind: str
    n_resamples: int
    exact: bool
    batch_size: int
    freedman_lane: bool
    critical_value: float


@dataclass
class InferenceResult:
    """What inference returns for one contrast.

    Attributes
    ----------
    kind : "t" or "F"
    df : tuple
        (df,) for t, (df1, df2) for F.
    statistic, estimate, std_effect, se, p_uncorrected, p_corrected
        (n_sources, n_times) float arrays.  ``estimate`` and ``se`` are the
        contrast estimate and its standard error in input units (NaN for F);
        ``std_effect`` is Hedges-corrected Cohen's d for t contrasts, partial
        eta squared for F.  ``p_corrected`` is None for ``correction="none"``.
    cluster_labels : (n_sources, n_times) int32, 0 = not in a cluster
        Clusters numbered 1..K in the order of ``clusters`` rows.
    clusters : DataFrame
        One row per observed cluster: cluster, sign (+1/-1), mass, extent
        (points), n_sources, n_samples, p_corrected.
    null : DataFrame
        One row per resample (identity first): resample, max_stat (the
        maximum over both signs of the cluster score, TFCE or |statistic|
        used for FWER), and, where defined, max_pos / max_neg.
    threshold : float or None
        Cluster-forming threshold on the statistic scale.
    n_resamples : int
        Number of rearrangements used, identity included (0: parametric).
    exact : bool
        True when every distinct rearrangement was enumerated.
    scheme : str
        "sign-flip" or "permutation" (+ " / Freedman-Lane" when nuisance).
    correction, tails : str
    fit : FitInfo
        The fitted model (method, residual df, rank, nuisance columns).
    cluster_rule : str
        How the reported clusters were formed.
    resampling : ResamplingRecord or None
        None for the parametric corrections (fdr, none).
    rearrangements : (m, n) array or None
        The rearrangement set used, identity first.
    tfce : TfceOptions or None
    enhanced : (n_sources, n_times) float32 or None
        The observed TFCE map.
    scale : "statistic" or "z"
        What ``statistic`` holds (see :class:`~groupsrc.stats.models.ols.Observed`).
    test_statistic, df_map : (n_sources, n_times) or None
        With ``scale = "z"``: the t or F, and its per-feature denominator df.
    statistic_info : dict
        What the run record says about the statistic: the kernel's ``describe()``
        (``statistic``, ``df_rule``, ``variance_groups``, ...) and
        ``degenerate_features`` (features without variance: statistic NaN).
    """

    kind: str
    df: tuple
    statistic: np.ndarray
    estimate: np.ndarray
    std_effect: np.ndarray
    se: np.ndarray
    p_uncorrected: np.ndarray
    p_corrected: np.ndarray | None
    cluster_labels: np.ndarray
    clusters: pd.DataFrame
    null: pd.DataFrame
    threshold: float | None
    n_resamples: int
    exact: bool
    scheme: str
    correction: str
    tails: str
    fit: FitInfo | None = None
    cluster_rule: str = ""
    resampling: ResamplingRecord | None = None
    rearrangements: np.ndarray | None = None
    tfce: TfceOptions | None = None
    enhanced: np.ndarray | None = None
    scale: str = "statistic"
    test_statistic: np.ndarray | None = None
    df_map: np.ndarray | None = None
    statistic_info: dict = field(default_factory=dict)


@dataclass
class ContrastResult:
    """One contrast's full result, ready for writing."""

    name: str
    description: str
    inference: InferenceResult
    #: per-participant data the between model ran on: (n_participants, n_sources, n_times)
    data: np.ndarray
    #: participant ids in the row order of ``data``
    participants: list
    #: design matrix used (participants x coefficients) with column names
    design: pd.DataFrame
    #: contrast weights over ``design`` columns: (n_coef,) for t, (k, n_coef) for F
    weights: np.ndarray
    #: within-participant weights over conditions, e.g. {"rare": 1, "frequent": -1}
    within: dict | None = None
    #: "glm" (``design``: participants x coefficients) or "mixed" (``design``: maps x
    #: coefficients, index the participant of each map; ``participants``: the units
    #: that were rearranged)
    model: str = "glm"
    #: participant ids in the row order of ``data`` when they differ from ``participants``
    #: (mixed model: only participants with the conditions the within weights use)
    data_participants: list | None = None


@dataclass
class AnalysisResult:
    """Everything a run produced, before writing."""

    title: str
    grid: VolumeGrid
    time_axis: TimeAxis
    contrasts: list
    participants: pd.DataFrame
    maps: pd.DataFrame
    settings: dict
    timings: dict = field(default_factory=dict)
    #: the mixed model's per-feature fit (``mixed = true``): variance components, ICC,
    #: fit codes and their counts (see ``pipeline._fit_mixed``)
    model: dict | None = None
    #: every map's data (maps x sources x all samples, e.g. the loading cache) and the
    #: analysed samples' indices, for the outputs' per-condition cluster time courses
    maps_data: np.ndarray | None = None
    maps_time_index: np.ndarray | None = None
    #: the anatomical underlay on its display grid (volume analyses with
    #: ``[cohort] underlay``): a :class:`~groupsrc.sources.underlay.Underlay`
    underlay: object | None = None
