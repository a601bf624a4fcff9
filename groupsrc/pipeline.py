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
from .inputs.design import ID, Design, build_design, plan_contrast, reduction_matrix
from .inputs.underlay import read_underlay
from .inputs.mixed_design import (MixedModelDesign, build_mixed_design, incomplete_participants,
                                  map_counts, plan_mixed_contrast, rearrangement_checks)
from .inputs.problems import InputError, ProblemList
from .stats.results import AnalysisResult, ContrastResult
from .inputs.settings import SURFACE_KEYS, Settings, check_neighbors, parse_settings
from .inputs.tables import HEMISPHERE_PATHS
from .inputs.timecheck import analysed_window, check_time_axis
from .inputs.units import tests_level

log = logging.getLogger("groupsrc")
#: one line per stage with its duration; silent with --quiet (notices stay on ``log``)
stage_log = logging.getLogger("groupsrc.stages")


@dataclass
class Prepared:
    settings: Settings
    cohort: Cohort
    design: Design
    plans: list
    time_index: np.ndarray
    summary: dict
    #: the mixed model's map-level design (``mixed = true``)
    mixed: MixedModelDesign | None = None
    #: the design of GLM contrasts: all participants, or (``mixed = true``) those with
    #: a map of every condition
    glm_design: Design | None = None
    #: participants the GLM contrasts leave out (listed by check, report and methods)
    glm_excluded: list | None = None
    #: the anatomical underlay for the figures (``[cohort] underlay``), or None
    underlay: object | None = None


def prepare(settings: Settings, *, progress=None, prior=None) -> Prepared:
    """Stage 1: load and validate everything; InputError lists every problem.

    ``prior`` holds problems already found in the analysis file; they are
    reported together with those of the cohort and design.
    """
    problems = ProblemList(prior or [])
    check_neighbors(settings, problems)
    if any(settings.cohort.get(k) is None for k in ("participants", "maps")):
        raise InputError(problems)
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
                    if _model_of(spec, settings) == "glm":   # mixed ones need the maps
                        plan_contrast(spec, design, problems,
                                      f"{settings.path} contrast '{spec.name}'",
                                      settings.inference.get("variance_groups"))
        raise InputError(problems) from None
    underlay = read_underlay(settings, cohort.grid, problems, cohort.inputs)
    parts = cohort.participants.reset_index(drop=True)
    where = f"{settings.path} [model] between"
    design = build_design(settings, parts, problems, where)
    mixed, glm_design, excluded = _models(settings, cohort, parts, design, problems, where)
    plans = []
    for spec in settings.contrasts:
        cwhere = f"{settings.path} contrast '{spec.name}'"
        if _model_of(spec, settings) == "mixed":
            plan = plan_mixed_contrast(spec, design, mixed, problems, cwhere,
                                       settings.inference.get("variance_groups")) \
                if mixed is not None else None
        else:
            plan = plan_contrast(spec, glm_design, problems, cwhere,
                                 settings.inference.get("variance_groups")) \
                if glm_design is not None else None
        if plan is not None:
            plans.append(plan)
    if design is None and not problems:
        problems.add(where, "the design could not be built",
                     "check the formula and the columns it names")
    window = analysed_window(settings, cohort.time_axis, problems) \
        if check_time_axis(settings, cohort.time_axis, problems) else None
    tindex = window.index if window is not None else np.arange(0)
    if not problems:
        _check_reduced_range(cohort, plans, settings, problems)
        _check_attainable(settings, cohort, glm_design, plans, problems)
    notes = []
    if mixed is not None and not problems:
        blocks = settings.inference.get("blocks")
        notes = rearrangement_checks(
            settings, mixed, plans, cohort.participants.loc[mixed.participants, blocks]
            .astype(str).to_numpy() if blocks else None, problems,
            lambda plan: f"{settings.path} contrast '{plan.name}'")
    if problems:
        raise InputError(problems)
    summ = summary(cohort, settings)
    summ.update(window.summary())
    if window.notes:
        summ["notes"] = list(window.notes)
    if settings.model.get("mixed"):
        summ.update(map_counts(cohort.maps, design.participants, settings.model.get("within")))
        summ["mixed_columns"] = list(mixed.X.columns)
        summ["random_effects"] = list(mixed.z_names)
        summ["random_slopes"] = list(mixed.slopes)
        summ["mixed_notes"] = ([mixed.slopes_note] if mixed.slopes_note else []) + notes
        summ["glm_excluded"] = list(excluded)
    return Prepared(settings, cohort, design, plans, tindex, summ, mixed, glm_design, excluded,
                    underlay)


def _model_of(spec, settings) -> str:
    return spec.model or ("mixed" if settings.model.get("mixed") else "glm")


def _models(settings, cohort, parts, design, problems, where):
    """The mixed design (``mixed = true``) and the GLM contrasts' design.

    With ``mixed = true`` the GLM contrasts (``model = "glm"``) use only the
    participants that have a map of every condition: the summary-statistic
    approach needs them all.  They are listed, never dropped silently.
    """
    if design is None or not settings.model.get("mixed"):
        return None, design, []
    mixed = build_mixed_design(settings, design, cohort.maps, problems, f"{settings.path} [model]")
    glm_specs = [s for s in settings.contrasts if _model_of(s, settings) == "glm"]
    excluded = incomplete_participants(cohort.maps, design.participants,
                                       settings.model.get("within")) if glm_specs else []
    glm_design = design
    if excluded:
        keep = parts[~parts[ID].astype(str).isin(excluded)].reset_index(drop=True)
        glm_design = build_design(settings, keep, problems,
                                  f"{where} (GLM contrasts, participants with every condition)")
    return mixed, glm_design, excluded


#: largest magnitude the level ``offset / scale`` times the within weights may reach in a
#: contrast that carries it: the resampling squares float32 values (overflow ~3.4e38)
_LEVEL_LIMIT = 1e18


def _check_reduced_range(cohort, plans, settings, problems):
    """A contrast that carries the maps' level (within weights not summing to zero),
    when that level is beyond what single precision can square: the maps ride on a
    constant many orders of magnitude above their spread (inputs/units.py)."""
    units = cohort.units
    if cohort.n_maps == 0 or not plans or units.level_rows is None:
        return
    with np.errstate(invalid="ignore", over="ignore"):
        top = float(np.nanmax(np.abs(np.asarray(units.level_rows[0], np.float64))))
    for plan in plans:
        weight = abs(sum(float(v) for v in (plan.within or {"all": 1.0}).values()))
        if weight > 0 and not (top * weight <= _LEVEL_LIMIT):
            problems.add(f"{settings.path} contrast '{plan.name}'",
                         f"the maps ride on a level {top:.3g} times their spread, and the "
                         f"within weights sum to {weight:g}: the averaged maps would exceed "
                         "the range the statistics can square in single precision",
                         "subtract the constant from the maps, or use within weights that "
                         "sum to zero (such as 1 and -1)")


def _check_attainable(settings, cohort, design, plans, problems, resamples=None,
                      participants_only=False):
    """A GLM contrast whose rearrangements cannot give a corrected p at or below alpha
    (too few participants, or too few resamples): refused, saying how far it falls
    short, instead of a run whose every p is above alpha."""
    from .inputs.design import smallest_p
    from .stats.corrections.scorers import CORRECTIONS
    inf = inference_settings(settings, resamples)
    if design is None or not CORRECTIONS[inf["correction"]].resamples:
        return
    blocks = (cohort.participants.loc[design.participants, inf["blocks"]].astype(str)
              .to_numpy() if inf.get("blocks") else None)
    for plan in plans:
        if plan.model == "mixed":
            continue
        p_min, count = smallest_p(plan, design, inf["resamples"], inf["tails"], blocks)
        if p_min > inf["alpha"]:
            short = ("more resamples" if inf["resamples"] < count else "more participants")
            if participants_only and short == "more resamples":
                continue      # said by the --resamples notice (options.py); the run goes on
            problems.add(f"{settings.path} contrast '{plan.name}'",
                         f"the smallest corrected p its {plan.scheme} rearrangements can give "
                         f"is {p_min:.3g} ({min(count, inf['resamples'])} distinct "
                         f"rearrangements of {len(design.participants)} participants), above "
                         f"alpha = {inf['alpha']:g}: it could never be significant",
                         f"it needs {short}" + ("" if short == "more resamples" else
                                                " (or a one-sided test, tails)"))


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
    (:mod:`groupsrc.stats.engine.memory`); ``checkpoint``: a
    :class:`groupsrc.stats.engine.checkpoint.Checkpoint` saving (and resuming) the
    resampling.
    """
    from .stats.corrections.scorers import CORRECTIONS, TfceOptions
    from .stats.inference import Execution, InferenceSpec, infer
    from .stats.models.groupvar import GroupVarianceKernel
    from .stats.models.ols import OLSKernel
    from .stats.models.reduction import reduce_maps

    s, cohort, design = prep.settings, prep.cohort, prep.design
    inf = inference_settings(s, resamples, seed)
    within_col = s.model.get("within")
    conditions = sorted(map(str, cohort.maps[within_col].unique())) if within_col else []
    glm = prep.glm_design or design
    tf = inf["tfce"]
    spec = InferenceSpec(
        correction=inf["correction"], n_resamples=inf["resamples"], seed=inf["seed"],
        forming_p=inf["forming_p"], tails=inf["tails"], alpha=inf["alpha"],
        tfce=TfceOptions(tf["extent_power"], tf["height_power"], tf["steps"]))
    new_progress = _reporter(progress)
    adjacency = cohort.grid.adjacency(inf["neighbors"])
    samples = slice(int(prep.time_index[0]), int(prep.time_index[-1]) + 1)
    n_features = cohort.grid.n_sources * (samples.stop - samples.start)
    mixed = any(p.model == "mixed" for p in prep.plans)
    plan_memory = _memory_plan(memory, len(glm.participants), n_features, workers, scheduler,
                               s, mixed=mixed,
                               scratch=CORRECTIONS[inf["correction"]].scratch_bytes)
    results, timings = [], {}
    fitted = _fit_mixed(prep, samples, timings,
                        _stage(new_progress, "fitting the mixed model", "feature"))
    for plan in prep.plans:
        t0 = time.perf_counter()
        execution = Execution(
            backend="dask" if scheduler else "threads", n_jobs=workers,
            scheduler=scheduler, map_budget=plan_memory.map_budget,
            progress=_stage(new_progress, f"resampling {plan.name}", "resample") or False,
            checkpoint=checkpoint.contrast(plan.name) if checkpoint is not None else None)
        if plan.model == "mixed":
            t1 = t0
            result = _mixed_contrast(prep, plan, fitted, samples, spec, execution, adjacency,
                                     inf, conditions)
        else:
            ids = glm.participants
            W = reduction_matrix(cohort.maps, ids, within_col, plan.within, conditions)
            data = reduce_maps(cohort.Y, W, samples, chunk_bytes=plan_memory.chunk_bytes,
                               out=plan_memory.array((len(ids),) + (cohort.grid.n_sources,
                                                     samples.stop - samples.start)),
                               progress=_stage(new_progress, f"reducing {plan.name}", "source"))
            t1 = time.perf_counter()
            wsum = float(W.sum(axis=1)[0]) if len(ids) else 0.0
            level = tests_level(glm.X.to_numpy(), plan.weights, wsum)
            if level:                   # the contrast sees the maps' mean level
                _add_level(data, cohort.units, wsum, samples)
            if plan.groups is not None:
                kernel = GroupVarianceKernel(data.reshape(len(ids), -1), glm.X.to_numpy(),
                                             plan.weights, plan.groups.labels,
                                             info=plan.groups.record())
            else:
                kernel = OLSKernel(data.reshape(len(ids), -1), glm.X.to_numpy(),
                                   plan.weights, scheme=plan.scheme)
            kernel.allocate = plan_memory.array
            result = ContrastResult(
                name=plan.name, description=plan.description,
                inference=_in_units(infer(kernel, adjacency,
                                          _with_blocks(spec, cohort, ids, inf), execution),
                                    cohort.units),
                data=cohort.units.to_input(data, wsum, samples=samples, level_included=level),
                participants=ids, design=glm.X, weights=plan.weights, within=plan.within)
        results.append(result)
        timings[plan.name] = round(time.perf_counter() - t0, 3)
        stage_log.info(f"contrast {plan.name}: "
                       + (f"reduction {t1 - t0:.1f} s, " if plan.model != "mixed" else "")
                       + f"model and {result.inference.n_resamples} resamples "
                       f"{time.perf_counter() - t1:.1f} s")
    settings_dict = s.as_dict()
    settings_dict["inference"] = inf
    settings_dict["check_summary"] = prep.summary
    if cohort.atlas is not None:
        settings_dict["atlas"] = cohort.atlas
    return AnalysisResult(title=s.title, grid=cohort.grid,
                          time_axis=cohort.time_axis.subset(prep.time_index), contrasts=results,
                          participants=cohort.participants, maps=cohort.maps,
                          settings=settings_dict, timings=timings,
                          model=fitted["summary"] if fitted else None,
                          maps_data=cohort.Y, maps_time_index=prep.time_index,
                          underlay=prep.underlay)


def _add_level(data, units, weight_sum, samples, chunk=4096):
    """``data += weight_sum * offset / scale`` in place (the maps' level, for a contrast
    that tests it; :mod:`.inputs.units`)."""
    for a in range(0, data.shape[1], chunk):
        part = data[:, a:a + chunk]
        part[...] = part.astype(np.float64) + weight_sum * units.level(
            slice(a, a + chunk), samples)


def _in_units(result, units):
    """An inference result's estimate and standard error in the input's units (the
    statistics are scale-free; the estimate carries the level already where the
    contrast tests it)."""
    for name in ("estimate", "se"):
        value = getattr(result, name)
        if value is not None:
            setattr(result, name, np.asarray(value, np.float64) * units.scale)
    return result


def _with_blocks(spec, cohort, ids, inf):
    """The inference spec with the exchangeability blocks of these participants."""
    import dataclasses
    blocks = (cohort.participants.loc[ids, inf["blocks"]].astype(str).to_numpy()
              if inf.get("blocks") else None)
    return dataclasses.replace(spec, blocks=blocks)


def _fit_mixed(prep, samples, timings, progress=None):
    """Fit the mixed model once at every source x sample (``mixed = true``)."""
    from .stats.models.mixed.model import MixedCore
    from .stats.models.mixed.fit import fit_features
    from .stats.models.mixed.inference import variance_components
    if prep.mixed is None or not any(p.model == "mixed" for p in prep.plans):
        return None
    t0 = time.perf_counter()
    Y = prep.cohort.Y
    Yf = np.ascontiguousarray(Y[:, :, samples], dtype=np.float32).reshape(Y.shape[0], -1)
    units = prep.cohort.units
    # a contrast that tests the maps' mean level needs it back (inputs/units.py); the
    # other contrasts and the variance components do not depend on it
    level = any(tests_level(prep.mixed.X.to_numpy(), p.weights, 1.0)
                for p in prep.plans if p.model == "mixed")
    if level:
        lv = units.level(slice(None), samples).reshape(-1)
        Yf = (Yf.astype(np.float64) + lv[None, :]).astype(np.float32)
    core = MixedCore(prep.mixed.stats_design())
    reml = prep.settings.model.get("estimation", "reml") == "reml"
    fit = fit_features(core, Yf, reml=reml, progress=progress)
    vc = variance_components(fit, Yf)
    timings["mixed_model_fit"] = round(time.perf_counter() - t0, 3)
    stage_log.info(f"mixed model: {Yf.shape[1]} features fitted in "
                   f"{timings['mixed_model_fit']:.1f} s")
    shape = (Y.shape[1], Yf.shape[1] // Y.shape[1])
    sc = units.scale                  # standard deviations in the input's units
    summary = {"method": "REML" if reml else "ML", "counts": fit.counts(),
               "code": fit.code.reshape(shape), "iterations": fit.iterations.reshape(shape),
               "sd_residual": sc * vc["sd_residual"].reshape(shape),
               "icc": vc["icc"].reshape(shape),
               "sd": {n: sc * vc["sd"][j].reshape(shape)
                      for j, n in enumerate(prep.mixed.z_names)},
               "corr": {(prep.mixed.z_names[a], prep.mixed.z_names[b]): r.reshape(shape)
                        for (a, b), r in vc["corr"].items()},
               "columns": list(prep.mixed.X.columns), "random": list(prep.mixed.z_names),
               "random_slopes": list(prep.mixed.slopes), "slopes_note": prep.mixed.slopes_note,
               "n_maps": int(Yf.shape[0]), "n_participants": len(prep.mixed.participants),
               "n_layouts": int(len(np.unique(prep.mixed.layout))),
               "design": prep.mixed.X, "maps": prep.cohort.maps}
    return {"fit": fit, "Y": Yf, "summary": summary}


def _mixed_contrast(prep, plan, fitted, samples, spec, execution, adjacency, inf, conditions):
    """One contrast of the mixed model: kernel, inference, the per-participant measure."""
    from .inputs.mixed_design import reducible
    from .stats.inference import infer
    from .stats.models.mixed.kernel import MixedKernel
    from .stats.models.reduction import reduce_maps
    cohort, md = prep.cohort, prep.mixed
    within_col = prep.settings.model.get("within")
    groups = (None if plan.groups is None else
              {"column": plan.groups.column, "labels": plan.groups.labels,
               "reason": plan.groups.reason})
    kernel = MixedKernel(fitted["fit"], fitted["Y"], plan.weights, scheme=plan.scheme,
                         variance_groups=groups)
    result = _in_units(infer(kernel, adjacency, _with_blocks(spec, cohort, md.participants, inf),
                             execution), cohort.units)
    # descriptive per-participant measure (cluster time courses): participants whose
    # maps allow the within weights; the model itself used every map
    ok = reducible(cohort.maps, md.participants, within_col, plan.within, conditions)
    ids = [p for p, k in zip(md.participants, ok) if k]
    W = reduction_matrix(cohort.maps, ids, within_col, plan.within, conditions)
    data = reduce_maps(cohort.Y, W, samples)
    cohort.units.to_input(data, float(W.sum(axis=1)[0]) if len(ids) else 0.0, samples=samples)
    return ContrastResult(name=plan.name, description=plan.description, inference=result,
                          data=data, participants=list(md.participants), design=md.X,
                          weights=plan.weights, within=plan.within, model="mixed",
                          data_participants=ids)


def run(analysis_path, out_dir=None, *, resamples=None, seed=None, workers=1,
        overwrite=False, progress=None, command=None, resume=False, scheduler=None,
        memory=None, quiet=False) -> Path:
    """Whole pipeline; writes a results folder and returns its path.

    The results folder rules (one run at a time, what may be replaced, inputs
    never touched, staging and swap, cleanup after killed runs) are those of
    :mod:`groupsrc.outputs.folder`.  The resampling is checkpointed beside
    the results folder (:func:`checkpoint_folder`); ``resume`` continues an
    interrupted run from there.
    """
    from .outputs.runlock import results_lock

    settings = parse_settings(analysis_path)
    out = Path(out_dir) if out_dir else settings.base / "results"
    # the lock comes first: nothing of another run's (results, checkpoint) is read,
    # replaced or deleted while it works
    with results_lock(out, command=command, log=log.info):
        return _run_locked(settings, out, resamples=resamples, seed=seed, workers=workers,
                           overwrite=overwrite, progress=progress, command=command,
                           resume=resume, scheduler=scheduler, memory=memory, quiet=quiet)


def _run_locked(settings, out, *, resamples, seed, workers, overwrite, progress, command,
                resume, scheduler, memory, quiet) -> Path:
    """:func:`run` once the results folder's lock is held."""
    from .outputs import write_results
    from .outputs.folder import check_target, staged, sweep_stale
    from .progress import reporter
    from .stats.engine.scheduler import parse_scheduler, probe_scheduler

    t_start = time.perf_counter()
    stage_log.setLevel(logging.WARNING if quiet else logging.NOTSET)
    new_progress = reporter(quiet=quiet) if progress is None else _reporter(progress)
    for action in sweep_stale(out):
        log.info(action)
    from .stats.engine.memory import remove_dead_work_dirs
    for name in remove_dead_work_dirs():
        log.info(f"removed the temporary folder {name} of an interrupted run")
    # cheap check first (declared inputs), full check once every map is known
    check_target(out, overwrite=overwrite, inputs=declared_inputs(settings))
    if scheduler and parse_scheduler(scheduler)[0] == "address":
        probe_scheduler(parse_scheduler(scheduler)[1])    # refused before the maps are read
    prep = prepare(settings, progress=new_progress)
    if resamples is not None:        # --resamples: the attainable p with that number
        problems = ProblemList()
        _check_attainable(settings, prep.cohort, prep.glm_design, prep.plans, problems,
                          resamples, participants_only=True)
        if problems:
            raise InputError(problems)
    out = check_target(out, overwrite=overwrite, inputs=list(prep.cohort.inputs))
    t_loaded = time.perf_counter()
    stage_log.info(f"loaded and checked {prep.cohort.n_maps} maps in {t_loaded - t_start:.1f} s"
                   + (" (loading cache reused)" if prep.cohort.cache_hit else "")
                   + "; analysing " + window_text(prep.summary))
    for note in run_notes(settings, prep, resamples):
        log.info(note)
    if scheduler:                  # an unanswering scheduler is refused before any work
        from .stats.engine.scheduler import dask_client
        notes = []
        dask_client(scheduler, per_worker_bytes=_worker_bytes(prep), notes=notes)
        for note in notes:
            log.info(note)
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
            from .stats.engine.scheduler import close_clients
            close_clients()
    t_stats = time.perf_counter()
    stage_log.info(f"statistics done in {t_stats - t_loaded:.1f} s")
    record = run_record(settings, prep, result, command, workers)
    record["timings_s"] = {"load": round(t_loaded - t_start, 3),
                           "statistics": round(t_stats - t_loaded, 3),
                           "per_contrast": result.timings}
    with staged(out) as tmp:
        write_results(result, tmp, record)
    checkpoint.remove()            # the results are in place: nothing left to resume
    stage_log.info(f"results written in {time.perf_counter() - t_stats:.1f} s")
    return out


def run_notes(settings, prep, resamples=None) -> list:
    """Notices about a run that is valid but cannot give what it seems to promise:
    fewer resamples than the smallest corrected p at ``alpha`` needs."""
    inf = inference_settings(settings, resamples)
    notes = list(prep.summary.get("notes", []))
    m, alpha = int(inf["resamples"]), float(inf["alpha"])
    if inf["correction"] not in ("fdr", "none") and m * alpha < 1:
        need = int(np.ceil(1 / alpha - 1e-9))
        notes.append(f"{m} resample{'s' if m != 1 else ''} (the observed data included): no "
                     f"corrected p can be below 1/{m} = {1 / m:.3g}, so nothing can reach "
                     f"alpha = {alpha:g}; that needs at least {need} resamples (5000 give p "
                     "to 0.0002)")
    return notes


def window_text(summ) -> str:
    """'0 to 500 ms, 126 samples' of the window analysed."""
    a, b = summ["window_ms"]
    return f"{a:g} to {b:g} ms, {summ['window_samples']} samples"


def _worker_bytes(prep) -> int:
    """About what each Dask worker holds for a contrast: the per-participant data, their
    residuals and product buffers (three arrays of the maps' size at most), and a batch."""
    from .stats.engine.backends import MEMORY_BUDGET
    n, s = prep.cohort.Y.shape[0], prep.cohort.grid.n_sources
    return int(3 * 4 * n * s * len(prep.time_index) + MEMORY_BUDGET)


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
    from .stats.engine.checkpoint import Checkpoint, CheckpointError
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


def _memory_plan(memory, n_units, n_features, workers, scheduler, settings, mixed=False,
                 scratch=0):
    from .stats.engine.memory import MemoryTooSmall, plan
    if memory is not None and mixed:
        problems = ProblemList()
        problems.add("--memory", "the memory bound covers the summary-statistic GLM only; the "
                     "mixed model keeps every map and its per-participant products in memory",
                     "run without --memory, or test the contrasts with model = \"glm\" "
                     "(or mixed = false) when the bound is needed")
        raise InputError(problems)
    try:
        return plan(memory, n_units, n_features, workers=workers, distributed=bool(scheduler),
                    scratch_per_thread=scratch)
    except MemoryTooSmall as exc:
        problems = ProblemList()
        problems.add("--memory", str(exc), exc.fix)
        raise InputError(problems) from None


def declared_inputs(settings: Settings) -> list:
    """Input paths known before loading: the analysis file, tables, mask, atlas
    and (best effort) the maps the maps table lists; the loading stage reports
    any problem with them."""
    paths = [settings.path] + [settings.resolve(settings.cohort.get(k)) for k in
                               ("participants", "maps", "mask", "atlas", "atlas_labels",
                                "underlay")
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
        "contrasts": [{"name": c.name, "description": c.description, "model": c.model,
                       "statistic": c.inference.kind, "kind": c.inference.kind,
                       **c.inference.statistic_info, "df": list(c.inference.df),
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
