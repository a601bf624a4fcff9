"""The pipeline: load + validate -> reduce -> model -> resample -> correct -> write.

Data flow one way: :func:`prepare` is the only stage that touches input
files (through :func:`groupsrc.inputs.cohort.load_cohort`); :func:`analyse` works on
arrays and tables only; :func:`groupsrc.outputs.write_results` is the only
stage that writes.
"""

from __future__ import annotations

import logging
import os
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from . import __version__
from .inputs.cohort import Cohort, load_cohort, summary
from .inputs.design import Design, build_design, plan_contrast, reduction_matrix
from .inputs.problems import InputError, ProblemList
from .stats.results import AnalysisResult, ContrastResult
from .inputs.settings import SURFACE_KEYS, Settings, check_neighbors, parse_settings
from .inputs.tables import HEMISPHERE_PATHS

log = logging.getLogger("groupsrc")


@dataclass
class Prepared:
    settings: Settings
    cohort: Cohort
    design: Design
    plans: list
    time_index: np.ndarray
    summary: dict


def prepare(settings: Settings, *, progress=None, prior=None) -> Prepared:
    """Stage 1: load and validate everything; InputError lists every problem.

    ``prior`` holds problems already found in the analysis file; they are
    reported together with those of the cohort and design.
    """
    problems = ProblemList(prior or [])
    check_neighbors(settings, problems)
    if any(settings.cohort.get(k) is None for k in ("participants", "maps")):
        raise InputError(problems)
    if settings.model.get("mixed"):
        problems.add(f"{settings.path} [model] mixed",
                     "the mass-univariate mixed model is not available in this version",
                     "set mixed = false: the summary-statistic GLM averages sessions within "
                     "participants, which is exact for balanced designs")
    try:
        cohort = load_cohort(settings, progress=progress)
    except InputError as exc:
        problems.extend(exc.problems)
        # still check the design, so that its problems are reported in the same pass
        from .inputs.tables import check_tables
        parts = check_tables(settings, ProblemList())[0]
        if parts is not None:
            design = build_design(settings, parts, problems, f"{settings.path} [model] between")
            if design is not None:
                for spec in settings.contrasts:
                    plan_contrast(spec, design, problems, f"{settings.path} contrast '{spec.name}'")
        raise InputError(problems) from None
    parts = cohort.participants.reset_index(drop=True)
    where = f"{settings.path} [model] between"
    design = build_design(settings, parts, problems, where)
    plans = []
    if design is not None:
        for spec in settings.contrasts:
            plan = plan_contrast(spec, design, problems, f"{settings.path} contrast '{spec.name}'")
            if plan is not None:
                plans.append(plan)
    if design is None and not problems:
        problems.add(where, "the design could not be built",
                     "check the formula and the columns it names")
    tw = settings.inference.get("time_window")
    tindex = cohort.time_axis.window(*(tw or (None, None)))
    if tindex.size == 0:
        t = cohort.time_axis.times
        problems.add(f"{settings.path} [inference] time_window",
                     f"{tw} holds no sample; the maps run from {t[0]:.4g} s to {t[-1]:.4g} s",
                     "choose a window inside that range")
    if not problems:
        _check_reduced_range(cohort, plans, settings, problems)
    if problems:
        raise InputError(problems)
    return Prepared(settings, cohort, design, plans, tindex, summary(cohort, settings))


#: largest magnitude the reduced maps may reach: the resampling squares float32
#: values, and float32 overflows above about 3.4e38
_REDUCED_LIMIT = 1e18


def _check_reduced_range(cohort, plans, settings, problems):
    """A contrast whose within-participant weights would push the maps out of range."""
    if cohort.n_maps == 0 or not plans:
        return
    top = 0.0
    step = max(1, int(2e7 // max(1, cohort.Y.shape[2] * cohort.n_maps)))
    from .stats.pages import release
    for a in range(0, cohort.Y.shape[1], step):
        top = max(top, float(np.abs(cohort.Y[:, a:a + step]).max()))
        release(cohort.Y)
    for plan in plans:
        weight = sum(abs(float(v)) for v in (plan.within or {"all": 1.0}).values())
        if top * weight > _REDUCED_LIMIT:
            problems.add(f"{settings.path} contrast '{plan.name}'",
                         f"the maps reach {top:.3g} and the within weights sum to {weight:g} "
                         "in magnitude: the reduced maps would exceed the range the statistics "
                         "can square in single precision",
                         "rescale the maps (e.g. to nA m or to a unitless score) or use "
                         "smaller within weights such as 1 and -1")


def inference_settings(settings, resamples=None, seed=None) -> dict:
    """The [inference] settings after the command-line overrides."""
    inf = dict(settings.inference)
    inf.update({k: int(v) for k, v in (("resamples", resamples), ("seed", seed))
                if v is not None})
    return inf


def analyse(prep: Prepared, *, resamples=None, seed=None, workers=1, progress=None,
            scheduler=None, memory=None, checkpoint=None):
    """Stages 2-5 on arrays: returns an AnalysisResult.

    ``progress``: a :func:`groupsrc.progress.reporter` (or True / None for a
    bar on a terminal); ``scheduler``: run the resampling on Dask (an address
    or ``local:N``); ``memory``: bytes the working set may take
    (:mod:`groupsrc.stats.memory`); ``checkpoint``: a
    :class:`groupsrc.stats.checkpoint.Checkpoint` saving (and resuming) the
    resampling.
    """
    from .stats.corrections import TfceOptions
    from .stats.inference import Execution, InferenceSpec, infer
    from .stats.kernels import OLSKernel
    from .stats.reduction import reduce_maps

    s, cohort, design = prep.settings, prep.cohort, prep.design
    inf = inference_settings(s, resamples, seed)
    within_col = s.model.get("within")
    conditions = sorted(map(str, cohort.maps[within_col].unique())) if within_col else []
    participants = design.participants
    blocks = (cohort.participants.loc[participants, inf["blocks"]].astype(str).to_numpy()
              if inf.get("blocks") else None)
    tf = inf["tfce"]
    spec = InferenceSpec(
        correction=inf["correction"], n_resamples=inf["resamples"], seed=inf["seed"],
        forming_p=inf["forming_p"], tails=inf["tails"], alpha=inf["alpha"], blocks=blocks,
        tfce=TfceOptions(tf["extent_power"], tf["height_power"], tf["steps"]))
    new_progress = _reporter(progress)
    adjacency = cohort.grid.adjacency(inf["neighbors"])
    samples = slice(int(prep.time_index[0]), int(prep.time_index[-1]) + 1)
    n_features = cohort.grid.n_sources * (samples.stop - samples.start)
    plan_memory = _memory_plan(memory, len(participants), n_features, workers, scheduler, s)
    results, timings = [], {}
    for plan in prep.plans:
        t0 = time.perf_counter()
        W = reduction_matrix(cohort.maps, participants, within_col, plan.within, conditions)
        data = reduce_maps(cohort.Y, W, samples, chunk_bytes=plan_memory.chunk_bytes,
                           out=plan_memory.array((len(participants),) + (cohort.grid.n_sources,
                                                 samples.stop - samples.start)),
                           progress=_stage(new_progress, f"reducing {plan.name}", "source"))
        t1 = time.perf_counter()
        kernel = OLSKernel(data.reshape(len(participants), -1), design.X.to_numpy(),
                           plan.weights, scheme=plan.scheme)
        kernel.allocate = plan_memory.array
        execution = Execution(
            backend="dask" if scheduler else "threads", n_jobs=workers,
            scheduler=scheduler, map_budget=plan_memory.map_budget,
            progress=_stage(new_progress, f"resampling {plan.name}", "resample") or False,
            checkpoint=checkpoint.contrast(plan.name) if checkpoint is not None else None)
        inference = infer(kernel, adjacency, spec, execution)
        results.append(ContrastResult(
            name=plan.name, description=plan.description,
            inference=inference, data=data,
            participants=participants, design=design.X, weights=plan.weights,
            within=plan.within))
        timings[plan.name] = round(time.perf_counter() - t0, 3)
        log.info(f"contrast {plan.name}: reduction {t1 - t0:.1f} s, model and "
                 f"{inference.n_resamples} resamples {time.perf_counter() - t1:.1f} s")
    settings_dict = s.as_dict()
    settings_dict["inference"] = inf
    settings_dict["check_summary"] = prep.summary
    if cohort.atlas is not None:
        settings_dict["atlas"] = cohort.atlas
    return AnalysisResult(title=s.title, grid=cohort.grid,
                          time_axis=cohort.time_axis.subset(prep.time_index), contrasts=results,
                          participants=cohort.participants, maps=cohort.maps,
                          settings=settings_dict, timings=timings)


def run(analysis_path, out_dir=None, *, resamples=None, seed=None, workers=1,
        overwrite=False, progress=None, command=None, resume=False, scheduler=None,
        memory=None, quiet=False) -> Path:
    """Whole pipeline; writes a results folder and returns its path.

    The results folder rules (what may be replaced, inputs never touched,
    staging and swap, cleanup after killed runs) are those of
    :mod:`groupsrc.outputs.folder`.  The resampling is checkpointed beside
    the results folder (:func:`checkpoint_folder`); ``resume`` continues an
    interrupted run from there.
    """
    from .outputs import write_results
    from .outputs.folder import check_target, staged, sweep_stale
    from .progress import reporter

    t_start = time.perf_counter()
    new_progress = reporter(quiet=quiet) if progress is None else _reporter(progress)
    settings = parse_settings(analysis_path)
    out = Path(out_dir) if out_dir else settings.base / "results"
    for action in sweep_stale(out):
        log.info(action)
    # cheap check first (declared inputs), full check once every map is known
    check_target(out, overwrite=overwrite, inputs=declared_inputs(settings))
    prep = prepare(settings, progress=new_progress)
    out = check_target(out, overwrite=overwrite, inputs=list(prep.cohort.inputs))
    t_loaded = time.perf_counter()
    log.info(f"loaded and checked {prep.cohort.n_maps} maps in {t_loaded - t_start:.1f} s"
             + (" (loading cache reused)" if prep.cohort.cache_hit else ""))
    if scheduler:                  # an unanswering scheduler is refused before any work
        from .stats.backends import dask_client
        dask_client(scheduler)
    checkpoint = open_checkpoint(out, prep, resamples, seed, resume)
    try:
        result = analyse(prep, resamples=resamples, seed=seed, workers=workers,
                         progress=new_progress, scheduler=scheduler, memory=memory,
                         checkpoint=checkpoint)
    except BaseException:
        if checkpoint.has_progress():
            log.info(f"resampling progress is saved in {checkpoint.folder}; run the same "
                     "command with --resume to continue")
        else:
            checkpoint.remove()
        raise
    finally:
        if scheduler:
            from .stats.backends import close_clients
            close_clients()
    t_stats = time.perf_counter()
    log.info(f"statistics done in {t_stats - t_loaded:.1f} s")
    record = run_record(settings, prep, result, command, workers)
    record["timings_s"] = {"load": round(t_loaded - t_start, 3),
                           "statistics": round(t_stats - t_loaded, 3),
                           "per_contrast": result.timings}
    with staged(out) as tmp:
        write_results(result, tmp, record)
    checkpoint.remove()            # the results are in place: nothing left to resume
    log.info(f"results written in {time.perf_counter() - t_stats:.1f} s")
    return out


def checkpoint_folder(out) -> Path:
    """Where the checkpoint of a run for results folder ``out`` lives.

    A hidden sibling ``.OUT.groupsrc-checkpoint`` beside ``out``: never inside
    an input (``out`` is checked against every input first), never inside
    ``out`` (which is replaced as a whole), and not matched by the stale
    staging / previous-results cleanup of :mod:`groupsrc.outputs.folder`,
    so a later ``--resume`` finds it after a SIGKILL.  It is removed once the
    results are in place, and replaced by the next run without ``--resume``.
    """
    out = Path(out)
    return out.parent / f".{out.name}.groupsrc-checkpoint"


def open_checkpoint(out, prep, resamples, seed, resume):
    """Start a fresh checkpoint, or (``resume``) open the interrupted run's; a
    checkpoint that cannot serve is an InputError saying why."""
    from .stats.checkpoint import Checkpoint, CheckpointError
    folder = checkpoint_folder(out)
    fingerprint = {"inputs": dict(prep.cohort.inputs),
                   "settings": _plain(dict(prep.settings.as_dict(),
                                           inference=inference_settings(prep.settings,
                                                                        resamples, seed)))}
    try:
        if resume:
            cp = Checkpoint.resume(folder, fingerprint, __version__)
            log.info(f"resuming the interrupted run from {folder}")
            return cp
        if (folder / "manifest.json").exists():
            log.info(f"starting afresh: the checkpoint of an earlier interrupted run in {folder} "
                     "is replaced (run with --resume to continue such a run instead)")
        return Checkpoint.start(folder, fingerprint, __version__)
    except CheckpointError as exc:
        problems = ProblemList()
        problems.add(str(folder), exc.what, exc.fix)
        raise InputError(problems) from None


def _plain(obj):
    import json
    return json.loads(json.dumps(obj, default=str))


def _reporter(progress):
    """A progress reporter from what callers pass: a reporter, True (bar or lines), or
    False / None (nothing)."""
    if callable(progress):
        return progress
    if progress:
        from .progress import reporter
        return reporter()
    return None


def _stage(new_progress, desc, unit):
    """``f(done, total)`` reporting one stage through ``new_progress`` (or None)."""
    if new_progress is None or getattr(new_progress, "mode", "") == "quiet":
        return None
    state = {}

    def report(done, total):
        bar = state.get("bar")
        if bar is None:
            bar = state["bar"] = new_progress(desc, total, unit)
        bar.update(done)
    return report


def _memory_plan(memory, n_units, n_features, workers, scheduler, settings):
    from .stats.memory import MemoryTooSmall, plan
    try:
        return plan(memory, n_units, n_features, workers=workers, distributed=bool(scheduler))
    except MemoryTooSmall as exc:
        problems = ProblemList()
        problems.add("--memory", str(exc), exc.fix)
        raise InputError(problems) from None


def declared_inputs(settings: Settings) -> list:
    """Input paths known before loading: the analysis file, tables, mask, atlas
    and (best effort) the maps the maps table lists; the loading stage reports
    any problem with them."""
    paths = [settings.path] + [settings.resolve(settings.cohort.get(k)) for k in
                               ("participants", "maps", "mask", "atlas", "atlas_labels")
                               + SURFACE_KEYS]
    mpath = settings.resolve(settings.cohort.get("maps"))
    if mpath is not None and mpath.is_file():
        try:
            table = pd.read_csv(mpath, sep="\t", dtype=str, keep_default_na=False,
                                usecols=lambda c: c in ("path",) + HEMISPHERE_PATHS)
            paths += [mpath.parent / rel for col in table.columns for rel in table[col]
                      if rel.strip()]
        except (ValueError, OSError, UnicodeDecodeError, pd.errors.ParserError):
            pass
    return [p for p in paths if p is not None]


def run_record(settings, prep, result, command, workers) -> dict:
    import platform
    import importlib.metadata as md
    libs = {}
    for name in ("numpy", "scipy", "pandas", "nibabel", "statsmodels", "matplotlib",
                 "formulaic", "joblib", "tqdm", "numba", "dask", "distributed"):
        try:
            libs[name] = md.version(name)
        except md.PackageNotFoundError:
            pass
    return {
        "groupsrc_version": __version__,
        "command": command if command is not None else sys.argv,
        "analysis_file": str(settings.path.resolve()),
        "settings": {k: v for k, v in result.settings.items() if k != "atlas"},
        "seed": result.settings["inference"]["seed"],
        "workers": workers,
        "inputs_sha256": prep.cohort.inputs,
        "cache_hit": prep.cohort.cache_hit,
        "cohort": prep.summary,
        "contrasts": [{"name": c.name, "description": c.description,
                       "statistic": c.inference.kind, "df": list(c.inference.df),
                       "scheme": c.inference.scheme, "resamples": c.inference.n_resamples,
                       "exact": c.inference.exact,
                       "weights": np.asarray(c.weights).tolist(),
                       "coefficients": list(c.design.columns),
                       "within": c.within}
                      for c in result.contrasts],
        "platform": {"python": platform.python_version(), "system": platform.platform(),
                     "machine": platform.machine(), "cpus": os.cpu_count()},
        "libraries": libs,
    }
