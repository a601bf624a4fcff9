"""Inference for one contrast: validate -> observed -> null -> result.

:func:`infer` takes a statistic kernel (:mod:`.models.ols`: the model fitted at
every source x sample and the contrast), the sources' adjacency, what to
infer (:class:`InferenceSpec`) and how to run it (:class:`Execution`), and
returns an :class:`~groupsrc.stats.results.InferenceResult`.
:func:`run_inference` is the same for the ordinary least-squares kernel,
from arrays.

Method
------
* Observed statistic, its estimate, standard error, standardized effect and
  parametric p: the kernel.
* Null: the rearrangements are generated from the seed alone, before any
  work; each resample's statistic map is scored by the correction
  (:mod:`.corrections.scorers`) and its map-wide maximum kept (identity first).
  Batches of resamples run on a backend (:mod:`.engine.backends`); the result does
  not depend on the batch size, the worker count or the backend.
* Corrected p: the share of resamples whose maximum reaches the observed
  value, identity counted (Phipson & Smyth 2010); with exact enumeration
  the p-values are exact.  Ties: resampled statistics are float32; a value
  within a relative 2e-5 of the observed one counts as reaching it
  (``resampling.RTOL``).
* ``fdr`` and ``none`` use the parametric p and do not resample.

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

import dataclasses
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .engine.backends import BACKENDS, NullJob, auto_batch, make_backend
from .corrections.clusters import check_adjacency
from .corrections.scorers import CORRECTIONS, TfceOptions, make_correction, max_from
from .models.base import StatisticKernel
from .models.ols import OLSKernel
from .engine.pages import trim
from .results import InferenceResult, ResamplingRecord

TAILS = ("two", "greater", "less")
SCHEMES = ("sign-flip", "permutation")
#: seeds are non-negative integers below 2**63 (signed 64-bit, as TOML 1.0 integers)
SEED_LIMIT = 2 ** 63
NULL_COLUMNS = ["resample", "max_stat", "max_pos", "max_neg"]
#: with progress reported, at least this many batches (batch sizes never change results),
#: so that progress advances in steps of about a tenth
PROGRESS_BATCHES = 10
#: cluster corrections hold batches as supra-threshold lists (:mod:`.corrections.exceedances`) up to
#: this forming p: about that share of a null map lies beyond the threshold, well within
#: the lists' room of one point in eight; more liberal thresholds keep map batches
LISTS_UP_TO_FORMING_P = 0.05


def _probability(v):
    return isinstance(v, (int, float)) and not isinstance(v, bool) and 0 < v < 1


def _seed_ok(v):
    return v is None or (isinstance(v, (int, np.integer)) and not isinstance(v, bool)
                         and 0 <= v < SEED_LIMIT)


@dataclass(frozen=True)
class InferenceSpec:
    """What to infer; each field's constraint is declared beside it (``check``)."""

    correction: str = field(default="cluster-mass", metadata={
        "check": lambda v: v in CORRECTIONS, "rule": f"one of {', '.join(CORRECTIONS)}"})
    n_resamples: int = field(default=1000, metadata={
        "check": lambda v: isinstance(v, (int, np.integer)) and not isinstance(v, bool) and v >= 1,
        "rule": "an integer >= 1 (identity included)"})
    seed: int | None = field(default=0, metadata={
        "check": _seed_ok, "rule": "None or an integer from 0 to 2**63 - 1"})
    forming_p: float = field(default=0.05, metadata={
        "check": _probability, "rule": "a cluster-forming p in (0, 1)"})
    tails: str = field(default="two", metadata={
        "check": lambda v: v in TAILS, "rule": f"one of {', '.join(TAILS)}"})
    alpha: float = field(default=0.05, metadata={
        "check": _probability, "rule": "a level in (0, 1)"})
    blocks: object = field(default=None, metadata={
        "check": lambda v: v is None or np.ndim(v) == 1, "rule": "None or one label per row"})
    tfce: TfceOptions = field(default_factory=TfceOptions, metadata={
        "check": lambda v: isinstance(v, TfceOptions), "rule": "a TfceOptions"})

    def __post_init__(self):
        _check_fields(self)


@dataclass(frozen=True)
class Execution:
    """How to run the resampling; never changes the result."""

    backend: str = field(default="threads", metadata={
        "check": lambda v: v in BACKENDS, "rule": f"one of {', '.join(BACKENDS)}"})
    n_jobs: int = field(default=1, metadata={
        "check": lambda v: isinstance(v, (int, np.integer)) and (v >= 1 or v == -1),
        "rule": "a positive integer, or -1 for every core"})
    batch_size: int | None = field(default=None, metadata={
        "check": lambda v: v is None or (isinstance(v, (int, np.integer)) and v >= 1),
        "rule": "None (from the memory budget) or an integer >= 1"})
    progress: object = field(default=False, metadata={
        "check": lambda v: isinstance(v, bool) or callable(v),
        "rule": "True/False, or a callable f(done, total)"})
    scheduler: str | None = field(default=None, metadata={
        "check": lambda v: v is None or isinstance(v, str),
        "rule": "None, a Dask scheduler address, or local:N (backend dask)"})
    checkpoint: object = field(default=None, metadata={
        "check": lambda v: v is None or hasattr(v, "begin"),
        "rule": "None or a checkpoint.ContrastProgress"})
    map_budget: float | None = field(default=None, metadata={
        "check": lambda v: v is None or (isinstance(v, (int, float)) and v > 0),
        "rule": "None or the bytes the resampled maps may take (all workers together)"})

    def __post_init__(self):
        _check_fields(self)


def _check_fields(obj):
    for f in dataclasses.fields(obj):
        v = getattr(obj, f.name)
        if not f.metadata["check"](v):
            raise ValueError(f"{f.name} must be {f.metadata['rule']}, got {v!r} "
                             f"-> give {f.metadata['rule']}")


def _validate(kernel, adjacency, spec):
    if not isinstance(kernel, StatisticKernel):
        raise TypeError(f"kernel must be a StatisticKernel, got {type(kernel).__name__}")
    if spec.blocks is not None and len(spec.blocks) != kernel.n_units:
        raise ValueError(f"blocks must have one entry per rearranged unit "
                         f"({kernel.n_units}), got {len(spec.blocks)}")
    n_sources = adjacency.shape[0] if hasattr(adjacency, "shape") else None
    if n_sources is None or kernel.n_features % n_sources:
        raise ValueError(f"the kernel's {kernel.n_features} features are not sources x "
                         f"samples of the {n_sources}-source adjacency")
    adjacency = check_adjacency(adjacency, n_sources)
    return adjacency, (n_sources, kernel.n_features // n_sources)


# ----------------------------------------------------------------------------
# the entry points
# ----------------------------------------------------------------------------

def infer(kernel: StatisticKernel, adjacency, spec: InferenceSpec = InferenceSpec(),
          execution: Execution = Execution()) -> InferenceResult:
    """One contrast: observed statistic, null distribution, corrected p, clusters."""
    adjacency, shape = _validate(kernel, adjacency, spec)
    threshold = (kernel.threshold(spec.forming_p, spec.tails)
                 if spec.correction in ("cluster-mass", "cluster-extent") else None)
    correction = make_correction(spec.correction, kernel.kind, spec.tails, shape, adjacency,
                                 threshold=threshold, tfce=spec.tfce)
    if not correction.resamples:
        obs = kernel.observed(spec.tails)
        stat_map = np.asarray(obs.statistic, np.float64).reshape(shape)
        outcome = _undefined_kept(stat_map, lambda m: correction.parametric(
            m, obs.p_uncorrected, spec.alpha))
        null = pd.DataFrame(columns=NULL_COLUMNS)
        return _result(kernel, obs, outcome, null, spec, threshold, shape, None, None)
    rearr = kernel.rearrangements(spec.n_resamples, spec.seed, spec.blocks)
    if hasattr(kernel, "z_floor"):     # resamples read only beyond the forming threshold
        kernel.z_floor = float(threshold) if threshold is not None else 0.0
    kernel.prepare(rearr)
    trim()                                   # the stages before leave freed memory held
    fixed = dict(seed=int(rearr.seed), kind=rearr.kind, n_resamples=rearr.n_resamples,
                 exact=bool(rearr.exact), freedman_lane=bool(kernel.freedman_lane))
    job = NullJob(kernel, correction, lists=spec.forming_p <= LISTS_UP_TO_FORMING_P)
    null, batch = _null(job, rearr.n_resamples, kernel, correction,
                        spec, execution, fixed)
    # the observed maps after the null: the resampling's buffers and scratch are gone
    # by then, so the two never take memory at the same time
    correction.release_scratch()
    kernel.release_buffers()
    trim()
    obs = kernel.observed(spec.tails)
    stat_map = np.asarray(obs.statistic, np.float64).reshape(shape)
    outcome = _undefined_kept(stat_map, lambda m: correction.outcome(
        m, null["max_stat"].to_numpy(), spec.alpha))
    record = ResamplingRecord(
        seed=int(rearr.seed), kind=rearr.kind, n_resamples=rearr.n_resamples,
        exact=bool(rearr.exact), batch_size=batch, freedman_lane=bool(kernel.freedman_lane),
        critical_value=float(np.quantile(null["max_stat"], 1 - spec.alpha, method="higher")))
    return _result(kernel, obs, outcome, null, spec, threshold, shape, record, rearr.matrix)


def run_inference(Y, X, contrast, adjacency, *, scheme="sign-flip", nuisance=None,
                  **options) -> InferenceResult:
    """GLM contrast from arrays with resampling-based correction (see :func:`infer`).

    Parameters
    ----------
    Y : (n, n_sources, n_times) data, one map per participant (reduced within
        participant).
    X : (n, p) design matrix.
    contrast : (p,) weights -> t statistic, or (k, p) -> F statistic.
    adjacency : (n_sources, n_sources) sparse symmetric source adjacency.
    scheme : "sign-flip" (one-sample / paired data) or "permutation".
    nuisance : None -> Freedman-Lane whenever the design has columns outside
        the contrast's space; False -> rearrange the raw data.
    **options : fields of :class:`InferenceSpec` (correction, n_resamples,
        seed, forming_p, tails, alpha, blocks, tfce) and :class:`Execution`
        (backend, n_jobs, batch_size, progress).
    """
    names = {f.name for f in dataclasses.fields(InferenceSpec)}
    unknown = set(options) - names - {f.name for f in dataclasses.fields(Execution)}
    if unknown:
        raise TypeError(f"unknown option(s) {sorted(unknown)}")
    spec = InferenceSpec(**{k: v for k, v in options.items() if k in names})
    execution = Execution(**{k: v for k, v in options.items() if k not in names})
    if scheme not in SCHEMES:
        raise ValueError(f"scheme must be one of {SCHEMES}, got {scheme!r}")
    if nuisance not in (None, True, False, "auto"):
        raise ValueError(f"nuisance must be None/'auto', True or False, got {nuisance!r}")
    Y = np.asarray(Y)
    if Y.ndim != 3:
        raise ValueError(f"Y must be (n, n_sources, n_times), got shape {Y.shape}")
    if not np.all(np.isfinite(Y)):
        raise ValueError("Y holds NaN or infinite values; mask them out before inference")
    X = np.asarray(X, dtype=np.float64)
    if X.ndim != 2 or X.shape[0] != Y.shape[0]:
        raise ValueError(f"X must be (n, p) with n = {Y.shape[0]} rows, got {X.shape}")
    Yf = np.ascontiguousarray(Y, dtype=np.float32).reshape(Y.shape[0], -1)
    kernel = OLSKernel(Yf, X, contrast, scheme=scheme, nuisance=nuisance)
    return infer(kernel, adjacency, spec, execution)


# ----------------------------------------------------------------------------
# the null distribution
# ----------------------------------------------------------------------------

def _null(job, m, kernel, correction, spec, execution, fixed):
    options = {"scheduler": execution.scheduler} if execution.backend == "dask" else {}
    backend = make_backend(execution.backend, execution.n_jobs, **options)
    tasks = max(backend.tasks, PROGRESS_BATCHES) if execution.progress else backend.tasks
    B = execution.batch_size or auto_batch(m, job.bytes_per_resample(), backend.buffers,
                                           block=job.block, budget=execution.map_budget,
                                           tasks=tasks)
    pos, neg = np.zeros(m), np.zeros(m)
    done = np.zeros(m, bool)
    saved = execution.checkpoint
    if saved is not None:                # resume the finished batches, keep their size
        B = saved.begin(dict(fixed, batch_size=B), m)
        pos[:], neg[:], done[:] = saved.pos, saved.neg, saved.done
    batches = [(a, min(m, a + B)) for a in range(0, m, B) if not done[a:a + B].all()]
    report = _progress(execution.progress, m)
    count = [int(done.sum())]

    def collect(lo, bpos, bneg):
        pos[lo:lo + bpos.size] = bpos
        neg[lo:lo + bneg.size] = bneg
        count[0] += bpos.size
        if saved is not None:
            saved.add(lo, bpos, bneg)
        if report is not None:
            report(count[0], m)

    if report is not None:
        report(count[0], m)          # the stage starts (its rate is timed from here)
    try:
        backend.run(job, batches, collect)
    finally:
        if saved is not None:
            saved.flush(force=True)
    null = pd.DataFrame({"resample": np.arange(m),
                         "max_stat": max_from(pos, neg, kernel.kind, spec.tails),
                         "max_pos": pos, "max_neg": neg})
    return null, int(B)


def _progress(progress, total):
    if callable(progress):
        return progress
    if not progress:
        return None
    from tqdm import tqdm
    bar = tqdm(total=total, desc="resamples", unit="resample")

    def update(done, total_):
        bar.n = done
        bar.refresh()
        if done >= total_:
            bar.close()
    return update


def _undefined_kept(stat_map, score):
    """``score(map)`` with undefined (NaN) features scored as 0 -- never beyond a
    threshold, as in every resample -- and their corrected p left NaN."""
    undefined = np.isnan(stat_map)
    if not undefined.any():
        return score(stat_map)
    outcome = score(np.where(undefined, 0.0, stat_map))
    if outcome.p_corrected is not None:
        p = np.array(outcome.p_corrected, dtype=np.float64)
        p[undefined] = np.nan
        outcome = dataclasses.replace(outcome, p_corrected=p)
    return outcome


#: how many undefined points the record names (the count is always complete)
UNDEFINED_NAMED = 10


def _undefined_record(statistic, shape) -> dict:
    """The count of undefined (degenerate) points and the first few as [source, sample]."""
    undefined = np.isnan(np.asarray(statistic, np.float64)).reshape(shape)
    where = np.argwhere(undefined)[:UNDEFINED_NAMED]
    return {"degenerate_features": int(undefined.sum()),
            "degenerate_points": [[int(s), int(t)] for s, t in where]}


def _result(kernel, obs, outcome, null, spec, threshold, shape, record, matrix):
    def shaped(a):
        return None if a is None else np.asarray(a, dtype=np.float64).reshape(shape)
    return InferenceResult(
        kind=kernel.kind, df=tuple(int(d) if float(d).is_integer() else float(d)
                                   for d in obs.df),
        statistic=shaped(obs.statistic), estimate=shaped(obs.estimate),
        std_effect=shaped(obs.std_effect), se=shaped(obs.se),
        p_uncorrected=shaped(obs.p_uncorrected), p_corrected=shaped(outcome.p_corrected),
        cluster_labels=outcome.labels, clusters=outcome.clusters, null=null,
        threshold=threshold, n_resamples=record.n_resamples if record else 0,
        exact=bool(record.exact) if record else False,
        scheme=kernel.scheme_name, correction=spec.correction,
        tails=spec.tails, fit=kernel.info(), cluster_rule=outcome.cluster_rule,
        resampling=record, rearrangements=matrix,
        tfce=spec.tfce if spec.correction == "tfce" else None, enhanced=outcome.enhanced,
        scale=obs.scale, test_statistic=shaped(obs.test_statistic), df_map=shaped(obs.df_map),
        statistic_info=dict(kernel.describe(), **_undefined_record(obs.statistic, shape)))


__all__ = ["InferenceSpec", "Execution", "infer", "run_inference", "TfceOptions"]
