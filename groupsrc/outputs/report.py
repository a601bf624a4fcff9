"""The report: figures, methods.md and a self-contained report.html, drawn
from a saved results folder (no statistics are rerun).

The page is a Jinja2 template (``templates/report.html.j2``, autoescaped);
this module draws the figures and assembles the template's context from the
folder's files (read through :mod:`.layout`).  Every image is embedded as a
base64 ``data:`` URI and the CSS is inline, so the single file can be mailed
or archived and opened offline.
"""

from __future__ import annotations

import base64
import json
from pathlib import Path

import numpy as np
import pandas as pd
from jinja2 import Environment, PackageLoader, StrictUndefined, select_autoescape

from . import figures
from .design_figure import design_figure
from .files import write_text
from .layout import (FIGURES, METHODS_FILE, REPORT_FILE, SUMMARY_FILE, check_results_folder,
                     open_maps, read_json, read_tsv, read_values, times_ms)
from .methods import effect_name, methods_text
from .mixed_outputs import df_text, model_figures, model_section
from .report_tables import compact_clusters, glance, significant_rows, table_view
from .surface_figures import surface_figures
from .tables import COLUMNS

MAX_CLUSTER_FIGURES = 6
MAX_PROJECTIONS = 4

CAUTIONS = [
    "A significant cluster shows that the conditions or groups differ; it does not establish "
    "the effect's exact onset, offset or location (Sassenhagen & Draschkow 2019, "
    "Psychophysiology 56:e13335).",
    "Source estimates are blurred and biased by the inverse method; cluster extent reflects "
    "that blur.",
    "Research software: not a diagnostic device. Clinical use is for local regulations and "
    "licensed practice to decide.",
    "Values taken from a region that the same test selected (a cluster's peak, mean or a "
    "follow-up refit of it) are inflated (circularity; Kriegeskorte et al. 2009, Nat Neurosci "
    "12:535-540); test a region chosen independently of these data to estimate the effect.",
]

SURFACE_CHECKS_TEXT = ("Every input check passed before the statistics ran: the template "
                       "meshes are manifold (and closed, unless declared open), every map "
                       "read with one value per template vertex and one time axis, no NaN or "
                       "infinite value at a source, no duplicate or orphan table row, every "
                       "model column present with at least two participants per factor level, "
                       "and a full-rank design matrix.")
VOLUME_PARTS_CHECKS_TEXT = (" Every CIFTI-2 file held the same volume parts: the same "
                            "structures, the same voxels of each, in one volume.")
CHECKS_TEXT = ("Every input check passed before the statistics ran: each map read as a 4D "
               "NIfTI on one template grid (same shape and affine) with one time axis, no NaN "
               "or infinite value inside the mask, no duplicate or orphan table row, every "
               "model column present with at least two participants per factor level, and a "
               "full-rank design matrix.")


def _sample_index(times, values_ms):
    """Nearest sample of each time (tables store times rounded to the microsecond)."""
    return np.abs(np.asarray(values_ms, float)[:, None] - times[None, :]).argmin(axis=1)


# ----------------------------------------------------------------------------
# figures of one contrast
# ----------------------------------------------------------------------------

def _score_label(correction, kind):
    total = "sum of F" if kind == "F" else f"|sum of {kind}|"
    return {"cluster-mass": f"largest cluster mass per rearrangement ({total})",
            "cluster-extent": "largest cluster extent per rearrangement (points)",
            "tfce": "largest |TFCE| per rearrangement",
            "max-stat": f"largest |{kind}| per rearrangement"}.get(correction, "score")


def _sign_text(row, kind):
    if kind == "F":
        return "F"
    return "positive" if row["sign"] > 0 else "negative"


def projection_figures(grid, stat, labels, clusters, reported, times, name, kind, figdir):
    """Maximum-intensity projections of a volume at the peak time of each reported cluster."""
    vlim = figures._stat_range(stat, kind)
    out = []
    targets = reported[:MAX_PROJECTIONS] or [None]
    for k in targets:
        if k is None:
            s_, t = np.unravel_index(np.nanargmax(np.abs(stat)), stat.shape)
            t_idx = int(t)
            title = (f"{name}: {kind} at its largest |{kind}|, {times[t_idx]:g} ms "
                     "(no cluster reported)")
            keep = np.zeros(stat.shape[0], bool)
            base = figdir / "projections_peak"
        else:
            r = clusters.loc[clusters["cluster"] == k].iloc[0]
            t_idx = int(_sample_index(times, [r["t_peak_ms"]])[0])
            title = (f"{name}: {kind} at {times[t_idx]:g} ms, peak of cluster {k} "
                     f"(p = {r['p_corrected']:.3g})" if np.isfinite(r["p_corrected"])
                     else f"{name}: {kind} at {times[t_idx]:g} ms, peak of cluster {k}")
            keep = np.isin(labels[:, t_idx], reported)
            base = figdir / f"projections_cluster{k:02d}"
        figures.projection_figure(grid.to_volume(stat[:, t_idx]), grid.mask,
                                  grid.to_volume(keep), grid.affine, kind, title, base,
                                  vlim=vlim)
        out.append((f"Maximum-intensity projections of the {kind} map at {times[t_idx]:g} ms "
                    "(grey: source mask; white: reported clusters at that time).",
                    base.with_suffix(".png")))
    return out


#: the figure of the statistic in space, by source-space kind
SPATIAL_FIGURES = {"volume": projection_figures, "surface": surface_figures}


def contrast_figures(results: Path, maps, summary: dict, cs: dict) -> list:
    """Draw one contrast's figures; return [(caption, png path)]."""
    name = cs["name"]
    kind = "z" if cs.get("scale") == "z" else cs["kind"]      # what statistic.nii.gz holds
    folder = results / name
    figdir = folder / FIGURES
    figdir.mkdir(exist_ok=True)
    for old in list(figdir.glob("*.png")) + list(figdir.glob("*.svg")):
        old.unlink()
    times = times_ms(summary["window"])
    space = maps.space
    stat = read_values(maps, folder, "statistic")
    labels = read_values(maps, folder, "clusters").astype(np.int64)
    clusters = read_tsv(folder / "clusters.tsv")
    reported = list(cs.get("reported_clusters", []))

    def row_of(k):
        return clusters.loc[clusters["cluster"] == k].iloc[0]

    out = SPATIAL_FIGURES[space.kind](space, stat, labels, clusters, reported, times, name,
                                      kind, figdir)
    label = kind
    # sources x time per reported cluster
    coords = space.coords_mm
    for k in reported[:MAX_CLUSTER_FIGURES]:
        member = labels == k
        src = np.flatnonzero(member.any(axis=1))
        r = row_of(k)
        base = figdir / f"sources_by_time_cluster{k:02d}"
        ptxt = f", p = {r['p_corrected']:.3g}" if np.isfinite(r["p_corrected"]) else ""
        figures.source_time_figure(stat[src], member[src], times, kind,
                                   f"{name}, cluster {k} ({_sign_text(r, kind)}{ptxt})",
                                   base, coords_y=coords[src, 1])
        out.append((f"Cluster {k}: {label} of each of its {src.size} sources over time; "
                    "outlined: points in the cluster.", base.with_suffix(".png")))
    # time courses
    tc = read_tsv(folder / "cluster_timecourses.tsv")
    shown = reported[:MAX_CLUSTER_FIGURES] or ([int(clusters["cluster"].iloc[0])]
                                               if len(clusters) else [])
    shown = [k for k in shown if len(tc) and (tc["cluster"] == k).any()]
    if shown:
        half = summary["window"]["dt_ms"] / 2      # a sample covers +/- half an interval
        panels = []
        for k in shown:
            r = row_of(k)
            sub = tc[tc["cluster"] == k]
            gcol = "group" if "group" in sub.columns else None
            groups = {}
            for g, gsub in (sub.groupby(gcol, sort=True) if gcol else [("all", sub)]):
                wide = gsub.pivot(index="participant_id", columns="time_ms", values="value")
                vals = np.full((len(wide), times.size), np.nan)
                vals[:, _sample_index(times, wide.columns)] = wide.to_numpy()
                groups[str(g)] = vals
            sig = bool(np.isfinite(r["p_corrected"]) and r["p_corrected"] <= cs["alpha"]) \
                or (not np.isfinite(r["p_corrected"]) and k in reported)
            ptxt = f", p = {r['p_corrected']:.3g}" if np.isfinite(r["p_corrected"]) else ""
            panels.append({"title": f"cluster {k} ({_sign_text(r, kind)}{ptxt})",
                           "groups": groups, "span": (r["t_start_ms"] - half, r["t_end_ms"] + half),
                           "significant": sig})
        base = figdir / "timecourses"
        figures.timecourse_figure(panels, times, name, base)
        out.append(("Mean over each cluster's sources per group with 95% t-intervals; shaded: "
                    "the cluster's time span (hatched when not significant).",
                    base.with_suffix(".png")))
    # null distribution
    null = read_tsv(folder / "null_distribution.tsv")
    if len(null):
        corr = cs["correction"]
        if corr in ("cluster-mass", "cluster-extent") and len(clusters):
            col = "mass" if corr == "cluster-mass" else "n_points"
            rep = set(reported[:5])
            observed = [(f"cluster {int(k)}", abs(float(v))) for k, v in
                        zip(clusters["cluster"], clusters[col]) if int(k) in rep]
            rest = clusters[~clusters["cluster"].isin(rep)]
            if len(rest):
                big = rest.iloc[int(np.argmax(np.abs(rest[col].to_numpy())))]
                observed.append((f"largest other: cluster {int(big['cluster'])}",
                                 abs(float(big[col]))))
            what = "observed clusters"
        else:
            observed = [("observed maximum", float(null["max_stat"].iloc[0]))]
            what = "observed maximum"
        base = figdir / "null_distribution"
        figures.null_figure(null["max_stat"].to_numpy(), observed, cs.get("critical_value"),
                            cs["alpha"], _score_label(corr, label),
                            f"{name}: null distribution of the maximum", base, what=what)
        out.append(("Null distribution of the map-wide maximum over rearrangements; orange "
                    f"line{'s' if len(observed) > 1 else ''}: {what}; dashed: the critical "
                    "value at alpha.", base.with_suffix(".png")))
    # design
    design = read_tsv(folder / "design.tsv")
    if len(design):
        design = design.set_index("participant_id")
        mixed = cs.get("model") == "mixed"
        if mixed:                       # one row per map: draw each distinct row once
            design = design[~design.duplicated()]
        base = figdir / "design"
        design_figure(design, cs["weights"], f"{name}: design and contrast", base,
                      row_label="distinct map row" if mixed else "participant")
        out.append((("The mixed model's fixed-effects design, each distinct map row once "
                     "(labelled with the first participant who has it)" if mixed else
                     "The between-participant design") + ", one panel per coefficient "
                    "(coloured blocks: indicator columns; dots: covariates on their own "
                    "scale, dashed at the mean), and the contrast's weights below.",
                    base.with_suffix(".png")))
    return out


# ----------------------------------------------------------------------------
# the page: template context
# ----------------------------------------------------------------------------

def _environment() -> Environment:
    return Environment(loader=PackageLoader("groupsrc.outputs", "templates"),
                       autoescape=select_autoescape(default=True, default_for_string=True),
                       undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True,
                       keep_trailing_newline=True)


def _image_uri(path: Path) -> str:
    return "data:image/png;base64," + base64.b64encode(Path(path).read_bytes()).decode("ascii")


def methods_blocks(md: str) -> list:
    """The methods Markdown as blocks: headings, paragraphs and numbered lists."""
    out = []
    for block in md.strip().split("\n\n"):
        if block.startswith("# "):
            continue
        if block.startswith("## "):
            out.append({"kind": "heading", "text": block[3:]})
        elif block[:2].strip().rstrip(".").isdigit():
            out.append({"kind": "list", "entries": [line.split(". ", 1)[1]
                                                  for line in block.splitlines() if ". " in line]})
        else:
            out.append({"kind": "paragraph", "text": block})
    return out


def _cohort_rows(coh: dict, win: dict) -> list:
    rows = [("participants", coh.get("participants", "?"))]
    rows += [(f"  group {g}", n) for g, n in (coh.get("per_group") or {}).items()]
    if coh.get("conditions"):
        rows.append(("conditions", ", ".join(coh["conditions"])))
    if coh.get("sessions"):
        rows.append(("sessions", ", ".join(coh["sessions"])))
    rows += [("maps", coh.get("maps", "?")), ("sources", coh.get("sources", "?"))]
    if coh.get("voxel_size_mm"):
        rows.append(("voxel size (mm)", " x ".join(f"{v:g}" for v in coh["voxel_size_mm"])))
    for h, part in (coh.get("hemispheres") or {}).items():
        rows.append((f"  {h} hemisphere", f"{part['sources']} of {part['vertices']} vertices"))
    for name, n in (coh.get("volume_parts") or {}).items():
        rows.append((f"  {name}", f"{n} voxels (CIFTI-2 volume part)"))
    if coh.get("map_format"):
        rows.append(("map files", {"gifti": "GIfTI, one file per hemisphere",
                                   "cifti": "CIFTI-2 dense time series"}[coh["map_format"]]))
    if coh.get("time_range_ms"):
        rows.append(("input samples", f"{coh.get('samples', '?')}, {coh['time_range_ms'][0]:g} "
                     f"to {coh['time_range_ms'][1]:g} ms"))
    rows.append(("analysed window", f"{win.get('start_ms'):g} to {win.get('end_ms'):g} ms, "
                 f"{win.get('n')} samples every {win.get('dt_ms'):g} ms"))
    return rows


#: how the report names the statistic a contrast's record says it used
STATISTIC_LABEL = {"t": "t", "F": "F", "welch_v": "Welch's v", "G": "G", "z": "z"}


def statistic_label(c: dict) -> str:
    """The statistic a contrast used, with its df (from its record)."""
    stat = STATISTIC_LABEL.get(c.get("statistic") or c["kind"], c.get("statistic") or c["kind"])
    if c.get("model") == "mixed":
        return f"{c['kind']} (Satterthwaite df, median {c['df'][-1]:.3g}), maps as z"
    if c.get("df_rule") not in (None, "residual"):
        return f"{stat} (df per source and sample), maps as z"
    return f"{stat}({', '.join(f'{d:g}' for d in c['df'])})"


def unit_of(summary: dict) -> str:
    return (summary.get("settings", {}).get("cohort") or {}).get("unit") or "input units"


def _contrast_view(results: Path, c: dict, figs: list, unit: str) -> dict:
    folder = results / c["name"]
    alpha = c["alpha"]
    clusters = read_tsv(folder / "clusters.tsv")
    peaks = read_tsv(folder / "peaks.tsv")
    reported = set(c.get("reported_clusters", []))

    def sig(r):
        return bool(np.isfinite(r["p_corrected"]) and r["p_corrected"] <= alpha)

    corrected = c.get("has_p_corrected", True)
    shown = significant_rows(clusters, alpha) if corrected else clusters
    compact, docs = compact_clusters(clusters, c["kind"], alpha, unit, corrected)
    sig_compact = compact[compact["significant"] == "yes"] if corrected else compact
    return {
        "name": c["name"], "description": c.get("description", ""), "kind": c["kind"],
        "statistic": statistic_label(c), "df": df_text(c), "correction": c["correction"],
        "model": "mixed model" if c.get("model") == "mixed" else "summary-statistic GLM",
        "z_scale": c.get("scale") == "z",
        "tails": c["tails"], "alpha": alpha, "n_clusters": c.get("n_clusters", 0),
        "n_reported": len(reported),
        "significant": table_view(sig_compact, None, docs, max_rows=30, text_only=True),
        "clusters": table_view(compact, None, docs, max_rows=100, text_only=True,
                               highlight=lambda r: r["significant"] == "yes",
                               hidden=corrected and len(shown) < len(clusters)),
        "peaks": (table_view(peaks[peaks["cluster"].isin(reported)], None,
                             COLUMNS["peaks.tsv"], max_rows=30, unit=unit)
                  if len(peaks) else None),
        "figures": [{"caption": cap, "uri": _image_uri(png),
                     "path": png.relative_to(results).as_posix()} for cap, png in figs],
    }


def page_context(summary, contrast_summaries, figure_lists, results: Path, methods_md,
                 model_figs=()) -> dict:
    """Everything the template shows, as plain values (escaped by the template)."""
    st = summary.get("settings", {})
    unit = unit_of(summary)
    effects = {c["name"]: effect_name(summary, c) for c in contrast_summaries}
    for c in contrast_summaries:
        c.setdefault("statistic_label", statistic_label(c))
    contrast_rows = pd.DataFrame([
        {"contrast": c["name"], "model": c.get("model", "glm"),
         "description": c.get("description", ""),
         "statistic": statistic_label(c), "standardized effect": effects[c["name"]],
         "scheme": c["scheme"], "resamples": c["n_resamples"],
         "exact": "yes" if c["exact"] else "no", "weights": json.dumps(c["weights"]),
         "within": json.dumps(c.get("within")) if c.get("within") else ""}
        for c in contrast_summaries]).astype(str)
    return {
        "title": summary.get("title", "groupsrc results"),
        "version": str(summary.get("groupsrc_version")),
        "cautions": CAUTIONS,
        "cohort_rows": _cohort_rows(summary.get("cohort", {}), summary.get("window", {})),
        "checks": ((SURFACE_CHECKS_TEXT + (VOLUME_PARTS_CHECKS_TEXT if summary.get(
                       "space", {}).get("volume_parts") else "")
                    if summary.get("space", {}).get("kind") == "surface"
                    else CHECKS_TEXT) if st.get("check_summary") else None),
        "model_rows": [(k, v) for k, v in st.get("model", {}).items()
                       if v not in (None, "", [])],
        "contrast_table": table_view(contrast_rows),
        "contrasts": [_contrast_view(results, c, figs, unit)
                      for c, figs in zip(contrast_summaries, figure_lists)],
        "glance": glance(contrast_summaries,
                         {c["name"]: read_tsv(results / c["name"] / "clusters.tsv")
                          for c in contrast_summaries}, effects, unit),
        "settings_json": json.dumps({k: v for k, v in st.items() if k != "check_summary"},
                                    indent=1),
        "methods": methods_blocks(methods_md),
        "mixed": model_section(results, summary, None),
        "mixed_figures": [{"caption": cap, "uri": _image_uri(png),
                           "path": png.relative_to(results).as_posix()}
                          for cap, png in model_figs],
    }


def render_html(summary, contrast_summaries, figure_lists, results: Path, methods_md,
                model_figs=()) -> str:
    context = page_context(summary, contrast_summaries, figure_lists, results, methods_md,
                           model_figs)
    return _environment().get_template("report.html.j2").render(**context)


def build_report(results_dir) -> Path:
    """Rebuild figures/, methods.md and report.html from a saved results folder.

    Raises InputError naming every missing or damaged file the report needs.
    """
    check_results_folder(results_dir)
    return render_report(results_dir)


def _all_contrast_figures(results, maps, summary, cs_list):
    """Each contrast's figures, drawn in parallel worker processes (forked, one per
    contrast, at most one per core) where the system allows, else one after the other.
    Figures are the same either way: each contrast's are drawn by one process."""
    import multiprocessing
    import os
    workers = min(len(cs_list), os.cpu_count() or 1)
    if workers < 2 or "fork" not in multiprocessing.get_all_start_methods():
        return [contrast_figures(results, maps, summary, cs) for cs in cs_list]
    from concurrent.futures import ProcessPoolExecutor
    context = multiprocessing.get_context("fork")
    with ProcessPoolExecutor(max_workers=workers, mp_context=context) as pool:
        futures = [pool.submit(contrast_figures, results, maps, summary, cs) for cs in cs_list]
        return [f.result() for f in futures]


def render_report(results_dir) -> Path:
    """Draw figures, methods.md and report.html of a folder the writer is filling
    (its run record comes last, so it is not required here)."""
    results = Path(results_dir)
    summary = read_json(results / SUMMARY_FILE)
    maps = open_maps(results, summary)
    cs_list = [read_json(results / n / "summary.json") for n in summary["contrasts"]]
    figs = _all_contrast_figures(results, maps, summary, cs_list)
    mfigs = model_figures(results, maps, summary, times_ms(summary["window"]))
    md = methods_text(summary, cs_list)
    write_text(results / METHODS_FILE, md)
    page = render_html(summary, cs_list, figs, results, md, mfigs)
    return write_text(results / REPORT_FILE, page)
