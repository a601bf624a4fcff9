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
from markupsafe import Markup

from .browser import browser_data, browser_script
from .contrast_figures import contrast_figures
from .files import write_text
from .layout import (METHODS_FILE, REPORT_FILE, SUMMARY_FILE, check_results_folder, open_maps,
                     read_json, read_tsv, times_ms)
from .methods import effect_name, methods_text
from .mixed_outputs import df_text, model_figures, model_section
from .report_tables import compact_clusters, glance, significant_rows, table_view
from .tables import COLUMNS

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
        "significant": table_view(sig_compact, None, docs, max_rows=30, text_only=True,
                                  unit=unit),
        "clusters": table_view(compact, None, docs, max_rows=100, text_only=True, unit=unit,
                               highlight=lambda r: r["significant"] == "yes",
                               hidden=corrected and len(shown) < len(clusters)),
        "peaks": (table_view(peaks[peaks["cluster"].isin(reported)], None,
                             COLUMNS["peaks.tsv"], max_rows=30, unit=unit)
                  if len(peaks) else None),
        "figures": [{"caption": cap, "uri": _image_uri(png),
                     "path": png.relative_to(results).as_posix()} for cap, png in figs],
    }


def page_context(summary, contrast_summaries, figure_lists, results: Path, methods_md,
                 model_figs=(), browser=None) -> dict:
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
        "browser": browser,
        "browser_js": Markup(browser_script()) if browser else "",
        "mixed_figures": [{"caption": cap, "uri": _image_uri(png),
                           "path": png.relative_to(results).as_posix()}
                          for cap, png in model_figs],
    }


def render_html(summary, contrast_summaries, figure_lists, results: Path, methods_md,
                model_figs=(), browser=None) -> str:
    context = page_context(summary, contrast_summaries, figure_lists, results, methods_md,
                           model_figs, browser)
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
    from ..processes import die_with_parent
    context = multiprocessing.get_context("fork")
    with ProcessPoolExecutor(max_workers=workers, mp_context=context,
                             initializer=die_with_parent, initargs=(os.getpid(),)) as pool:
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
    browser = browser_data(results, maps, summary, cs_list)
    page = render_html(summary, cs_list, figs, results, md, mfigs, browser)
    return write_text(results / REPORT_FILE, page)
