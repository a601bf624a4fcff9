"""write_results: an AnalysisResult -> the results folder.

Maps and tables are written first; figures, report.html and methods.md are
then built from the written folder by :func:`build_report` (so a rebuilt
report is the same as the first), and run.json comes last with the list of
files.
"""

from __future__ import annotations

import dataclasses
import importlib.metadata as md
import platform
from pathlib import Path

import numpy as np
import pandas as pd

from ..stats.results import AnalysisResult, ContrastResult
from .. import formats
from . import tables
from .files import jsonable, write_json, write_tsv
from .layout import (ALL_CLUSTERS, DATASET_DESCRIPTION, MODEL_DIR, RUN_RECORD, SUMMARY_FILE,
                     UNDERLAY_FILE)
from .mixed_outputs import write_model

#: the BIDS specification version the description follows (1.10.0, from memory)
BIDS_VERSION = "1.10.0"
LIBRARIES = ("numpy", "scipy", "pandas", "nibabel", "matplotlib", "statsmodels", "formulaic",
             "jinja2")


def _version():
    try:
        from .. import __version__
        return __version__
    except ImportError:  # pragma: no cover
        return "0.1.0"


def cohort_summary(analysis: AnalysisResult) -> dict:
    """The checks summary when the pipeline gave one, else what the result itself shows."""
    given = analysis.settings.get("check_summary")
    if given:
        return dict(given)
    parts = analysis.participants
    out = {"participants": int(len(parts)), "maps": int(len(analysis.maps)),
           "sources": analysis.grid.n_sources}
    if parts is not None and "group" in parts.columns:
        out["per_group"] = {str(k): int(v) for k, v in
                            parts["group"].value_counts().sort_index().items()}
    within = analysis.settings.get("model", {}).get("within")
    if within and within in analysis.maps.columns:
        out["conditions"] = sorted(map(str, analysis.maps[within].unique()))
    return out


def _df_summary(inf) -> dict | None:
    """Per-feature df (mixed model): their range and median."""
    if inf.df_map is None:
        return None
    d = np.asarray(inf.df_map, float)
    d = d[np.isfinite(d)]
    if d.size == 0:
        return None
    return {"min": float(d.min()), "median": float(np.median(d)), "max": float(d.max())}


def _contrast_summary(c: ContrastResult, alpha, forming_p) -> dict:
    inf = c.inference
    record = inf.resampling
    return {"name": c.name, "description": c.description, "kind": inf.kind,
            "model": c.model, "scale": inf.scale, "df_per_feature": _df_summary(inf),
            "df": list(inf.df), "scheme": inf.scheme, "correction": inf.correction,
            "tails": inf.tails, "alpha": alpha, "forming_p": forming_p,
            "threshold": inf.threshold, "n_resamples": inf.n_resamples, "exact": inf.exact,
            "critical_value": record.critical_value if record else None,
            "weights": np.asarray(c.weights).tolist(),
            "coefficients": [str(x) for x in c.design.columns], "within": c.within,
            "n_participants": len(c.participants),
            "reported_clusters": tables.reported_clusters(inf.clusters, alpha),
            "n_clusters": int(len(inf.clusters)) if inf.clusters is not None else 0,
            "has_estimate": inf.kind == "t", "has_p_corrected": inf.p_corrected is not None,
            "cluster_rule": inf.cluster_rule,
            "fit": dataclasses.asdict(inf.fit) if inf.fit else None,
            "resampling": dataclasses.asdict(record) if record else None,
            "tfce": dataclasses.asdict(inf.tfce) if inf.tfce else None,
            # the statistic actually used (stats kernels' describe(), inference)
            **inf.statistic_info}


def _model_brief(model) -> dict | None:
    """What the analysis summary (methods, report) says about the mixed model."""
    if model is None:
        return None
    return {"method": model["method"], "counts": model["counts"],
            "n_features": int(np.asarray(model["code"]).size), "columns": model["columns"],
            "random": model["random"], "random_slopes": model.get("random_slopes"),
            "n_maps": model["n_maps"],
            "n_participants": model["n_participants"], "n_layouts": model["n_layouts"]}


def write_maps(c: ContrastResult, maps, folder: Path, reported) -> None:
    """One contrast's maps through the source space's map format (``maps``)."""
    inf = c.inference
    shown = "z" if inf.scale == "z" else inf.kind
    maps.statistic(folder, "statistic", inf.statistic, shown, inf.df, c.name)
    if inf.kind == "t":
        maps.estimate(folder, "estimate", inf.estimate, c.name, "estimate")
        maps.estimate(folder, "std_error", inf.se, c.name, "std error", signed=False)
    effect = ("hedges g" if c.model == "glm" else "d total sd") if inf.kind == "t" \
        else "partial eta2"
    if inf.statistic_info.get("effect_size") == "d_mean_group_variance" and inf.kind == "t":
        effect = "d mean group var"        # variance groups (stats/models/groupvar.py)
    maps.estimate(folder, "std_effect", inf.std_effect, c.name, effect,
                  signed=inf.kind == "t", bounded=inf.kind != "t")
    if inf.scale == "z":
        named = {"welch_v": "Welch v", "G": "G"}.get(inf.statistic_info.get("statistic"),
                                                     inf.kind)
        maps.estimate(folder, "test_statistic", inf.test_statistic, c.name, f"{named} value",
                      signed=inf.kind == "t")
        maps.estimate(folder, "df", inf.df_map, c.name, "df Satterthwait", signed=False)
        # the full model's own z (its t or F through its own df), beside the score z
        from ..stats.models.mixed.inference import z_of_f, z_of_t
        t, d = np.asarray(inf.test_statistic, float), np.asarray(inf.df_map, float)
        z = z_of_t(t, d) if inf.kind == "t" else z_of_f(t, inf.df[0], d)
        maps.estimate(folder, "z_full_model", np.where(np.isfinite(z), z, 0.0), c.name,
                      "z full model", signed=inf.kind == "t")
    maps.p_values(folder, "p_uncorrected", inf.p_uncorrected, c.name, "uncorrected")
    if inf.p_corrected is not None:
        maps.p_values(folder, "p_corrected", inf.p_corrected, c.name, "corrected")
    maps.labels(folder, "clusters", inf.cluster_labels, c.name)
    if hasattr(maps, "cluster_summary"):
        maps.cluster_summary(folder, "cluster_summary", inf.statistic, inf.cluster_labels,
                             reported, shown, c.name)


def write_contrast(c: ContrastResult, analysis: AnalysisResult, folder: Path, maps, adjacency,
                   atlas) -> dict:
    """One contrast's maps, tables and summary; returns its summary and tables."""
    grid, taxis = analysis.grid, analysis.time_axis
    inf = c.inference
    alpha = analysis.settings.get("inference", {}).get("alpha", 0.05)
    forming_p = analysis.settings.get("inference", {}).get("forming_p")
    folder.mkdir(parents=True, exist_ok=True)
    summ = _contrast_summary(c, alpha, forming_p)
    write_maps(c, maps, folder, summ["reported_clusters"])
    ctab = tables.cluster_table(c, grid, taxis, atlas, alpha)
    write_tsv(folder / "clusters.tsv", ctab)
    write_tsv(folder / "peaks.tsv", tables.peak_table(c, grid, taxis, adjacency))
    write_tsv(folder / "null_distribution.tsv", tables.null_table(c))
    if inf.rearrangements is not None:
        write_tsv(folder / "rearrangements.tsv.gz",
                  tables.rearrangement_table(inf.rearrangements, inf.resampling.kind,
                                             c.participants))
    write_tsv(folder / "cluster_timecourses.tsv",
              tables.timecourse_table(c, analysis.participants, taxis))
    within_col = analysis.settings.get("model", {}).get("within")
    if c.within and within_col and analysis.maps_data is not None:
        write_tsv(folder / "condition_timecourses.tsv",
                  tables.condition_timecourse_table(
                      c, analysis.maps, within_col, analysis.participants, analysis.maps_data,
                      analysis.maps_time_index, taxis))
    atab = None
    if atlas:
        atab = tables.atlas_table(c, grid, atlas)
        write_tsv(folder / "cluster_atlas.tsv", atab)
    design = c.design.copy()
    ids = c.participants if len(design) == len(c.participants) else design.index   # mixed: maps
    design.insert(0, "participant_id", [str(p) for p in ids])
    write_tsv(folder / "design.tsv", design)
    write_json(folder / "summary.json", summ)
    return {"summary": summ, "clusters": ctab, "atlas": atab}


def library_versions() -> dict:
    out = {}
    for name in LIBRARIES:
        try:
            out[name] = md.version(name)
        except md.PackageNotFoundError:
            out[name] = None
    return out


def write_results(analysis: AnalysisResult, out_dir: Path, run_record: dict) -> None:
    """Write every map, table, figure, the report, methods.md and run.json.

    ``out_dir`` must exist (the caller creates and later swaps it in).  Each
    file is written atomically (temporary name in the same folder, then
    :func:`os.replace`).
    """
    from .report import render_report

    out = Path(out_dir)
    if not out.is_dir():
        raise FileNotFoundError(f"results folder {out} does not exist; create it first")
    grid = analysis.grid
    neighbors = analysis.settings.get("inference", {}).get("neighbors", "face")
    adjacency = grid.adjacency(neighbors)
    atlas = analysis.settings.get("atlas")
    names = [c.name for c in analysis.contrasts]
    if len(set(names)) != len(names):
        raise ValueError(f"contrast names must be unique, got {names}")
    maps = formats.result_maps(grid, analysis.time_axis)
    maps.write_space(out)
    written = [write_contrast(c, analysis, out / c.name, maps, adjacency, atlas)
               for c in analysis.contrasts]
    frames = [w["clusters"] for w in written if len(w["clusters"])]
    all_clusters = (pd.concat(frames, ignore_index=True) if frames
                    else pd.DataFrame(columns=tables.table_columns("clusters.tsv", grid)))
    write_tsv(out / ALL_CLUSTERS, all_clusters)
    if analysis.model is not None:
        write_model(analysis, maps, out / MODEL_DIR)
    if analysis.underlay is not None:
        u = analysis.underlay
        formats.nifti.save(out / UNDERLAY_FILE, formats.nifti.grid_image(
            np.asarray(u.values, np.float32), u.affine,
            descrip="groupsrc underlay (display grid)"))
    if atlas:
        aframes = [w["atlas"] for w in written if w["atlas"] is not None and len(w["atlas"])]
        if aframes:
            write_tsv(out / "cluster_atlas.tsv", pd.concat(aframes, ignore_index=True))
    ta = analysis.time_axis
    settings = {k: v for k, v in analysis.settings.items() if k != "atlas"}
    summary = {"title": analysis.title, "groupsrc_version": _version(),
               "cohort": cohort_summary(analysis),
               "window": {"t0_s": ta.t0, "dt_s": ta.dt, "n": ta.n,
                          "start_ms": round(ta.times[0] * 1e3, 3),
                          "end_ms": round(ta.times[-1] * 1e3, 3), "dt_ms": round(ta.dt * 1e3, 6)},
               "space": grid.describe(), "map_format": maps.format,
               "settings": settings, "contrasts": names, "atlas": bool(atlas),
               "seed": run_record.get("seed"), "timings": analysis.timings,
               "mixed_model": _model_brief(analysis.model)}
    write_json(out / SUMMARY_FILE, jsonable(summary))
    write_json(out / DATASET_DESCRIPTION, dataset_description(analysis.title))
    render_report(out)
    record = dict(run_record)
    record.setdefault("platform", {"python": platform.python_version(),
                                   "system": platform.platform(),
                                   "machine": platform.machine()})
    libs = dict(record.get("libraries") or {})
    for k, v in library_versions().items():
        libs.setdefault(k, v)
    record["libraries"] = libs
    record.setdefault("groupsrc_version", _version())
    files = sorted(str(p.relative_to(out)) for p in out.rglob("*")
                   if p.is_file() and not p.name.startswith("."))
    record["output_files"] = files + [RUN_RECORD]
    write_json(out / RUN_RECORD, record)


def dataset_description(title: str) -> dict:
    """BIDS derivatives description of a results folder.

    BIDS specification, "Derivatives": a derived dataset has a
    ``dataset_description.json`` with ``Name``, ``BIDSVersion``,
    ``DatasetType`` = "derivative" and ``GeneratedBy`` (a list whose entries
    name the pipeline and its version).
    """
    return {"Name": title, "BIDSVersion": BIDS_VERSION, "DatasetType": "derivative",
            "GeneratedBy": [{"Name": "groupsrc", "Version": _version(),
                             "Description": "group statistics on source-space maps of "
                                            "event-related responses"}]}
