"""build_report: figures, methods.md and a self-contained report.html from a
saved results folder (no statistics are rerun).

The report embeds every image as a base64 ``data:`` URI and carries its CSS
inline, so the single file can be mailed or archived and opened offline.
"""

from __future__ import annotations

import base64
import html
import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd

from ..grid import Grid
from ..problems import InputError, Problem, ProblemList
from . import figures
from .files import write_text
from .methods import methods_text
from .tables import COLUMNS
from .writer import MASK_FILE, SUMMARY_FILE

MAX_CLUSTER_FIGURES = 6
MAX_MIPS = 4

CAUTIONS = [
    "A significant cluster shows that the conditions or groups differ; it does not establish "
    "the effect's exact onset, offset or location (Sassenhagen &amp; Draschkow 2019, "
    "Psychophysiology 56:e13335).",
    "Source estimates are blurred and biased by the inverse method; cluster extent reflects "
    "that blur.",
    "Research software: not a diagnostic device. Clinical use is for local regulations and "
    "licensed practice to decide.",
]

CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Helvetica,Arial,sans-serif;margin:0;
background:#f4f4f1;color:#1d1d1d;line-height:1.45}
main{max-width:1100px;margin:0 auto;padding:1.5rem 2rem 4rem;background:#fff}
h1{font-size:1.6rem;margin:.2rem 0 .3rem;border-bottom:3px solid #2a5d84;padding-bottom:.3rem}
h2{font-size:1.25rem;margin-top:2.2rem;color:#2a5d84}
h3{font-size:1.05rem;margin-top:1.6rem}
.sub{color:#555;margin-top:0}
table{border-collapse:collapse;font-size:.82rem;margin:.6rem 0;display:block;overflow-x:auto}
th,td{padding:.22rem .5rem;border-bottom:1px solid #ddd;text-align:right;white-space:nowrap}
th{background:#eef2f5;position:sticky;top:0}
td.l,th.l{text-align:left}
tr.sig td{font-weight:600}
figure{margin:1rem 0}
figure img{max-width:100%;height:auto;border:1px solid #e3e3e3}
figcaption{font-size:.85rem;color:#444}
.caution{background:#fff6e0;border-left:4px solid #c98a00;padding:.6rem 1rem}
.kv td{text-align:left}
code,pre{font-family:ui-monospace,Menlo,Consolas,monospace;font-size:.82rem}
pre{background:#f6f6f6;padding:.6rem;overflow-x:auto}
nav a{margin-right:1rem}
"""


# ----------------------------------------------------------------------------
# loading the saved folder
# ----------------------------------------------------------------------------

#: files of each contrast folder that the report reads (the writer always writes them)
CONTRAST_FILES = ("summary.json", "statistic.nii.gz", "clusters.nii.gz", "clusters.tsv",
                  "peaks.tsv", "null_distribution.tsv", "cluster_timecourses.tsv",
                  "design.tsv")
_FIX_DAMAGED = ("run 'groupsrc run' again to rewrite the results folder "
                "(the report cannot be rebuilt without it)")


def _damaged(path, what) -> InputError:
    return InputError([Problem(str(path), what, _FIX_DAMAGED)])


def _read_tsv(path: Path) -> pd.DataFrame:
    try:
        return pd.read_csv(path, sep="\t", na_values=["n/a"], keep_default_na=False)
    except FileNotFoundError:
        raise _damaged(path, "missing from the results folder") from None
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        raise _damaged(path, f"cannot be read as a table ({exc})") from None


def _read_json(path: Path) -> dict:
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise _damaged(path, "missing from the results folder") from None
    except (OSError, ValueError) as exc:
        raise _damaged(path, f"cannot be read as JSON ({exc})") from None


def _read_map(path: Path, dtype=np.float64):
    """(data, affine) of a NIfTI map of the results folder; a clear error when damaged."""
    try:
        img = nib.load(str(path))
        return np.asarray(img.dataobj, dtype=dtype), img.affine
    except FileNotFoundError:
        raise _damaged(path, "missing from the results folder") from None
    except Exception as exc:   # nibabel and gzip raise many types for damaged files
        raise _damaged(path, f"cannot be read as NIfTI ({type(exc).__name__}: {exc})") from None


def check_results_folder(results: Path) -> None:
    """List every file the report needs that is missing; raise InputError if any."""
    results = Path(results)
    problems = ProblemList()
    if not results.is_dir():
        problems.add(results, "not a folder", "give the folder 'groupsrc run' wrote")
        raise InputError(problems)
    if not (results / "run.json").is_file():
        problems.add(results, "not a groupsrc results folder (no run.json)",
                     "give the folder 'groupsrc run' wrote")
        raise InputError(problems)
    for name in (SUMMARY_FILE, MASK_FILE):
        if not (results / name).is_file():
            problems.add(results / name, "missing from the results folder", _FIX_DAMAGED)
    if not problems:
        summary = _read_json(results / SUMMARY_FILE)
        for c in summary.get("contrasts", []):
            for name in CONTRAST_FILES:
                if not (results / c / name).is_file():
                    problems.add(results / c / name, "missing from the results folder",
                                 _FIX_DAMAGED)
    if problems:
        raise InputError(problems)


def _load_grid(results: Path) -> Grid:
    data, affine = _read_map(results / MASK_FILE)
    return Grid.from_mask(data > 0, affine)


def _times_ms(window):
    return np.round((window["t0_s"] + window["dt_s"] * np.arange(window["n"])) * 1e3, 3)


def _sample_index(times_ms, values_ms):
    """Nearest sample of each time (tables store times rounded to the microsecond)."""
    return np.abs(np.asarray(values_ms, float)[:, None] - times_ms[None, :]).argmin(axis=1)


# ----------------------------------------------------------------------------
# figures of one contrast
# ----------------------------------------------------------------------------

def _score_label(correction, kind):
    total = "sum of F" if kind == "F" else "|sum of t|"
    return {"cluster-mass": f"largest cluster mass per rearrangement ({total})",
            "cluster-extent": "largest cluster extent per rearrangement (points)",
            "tfce": "largest |TFCE| per rearrangement",
            "max-stat": f"largest |{kind}| per rearrangement"}.get(correction, "score")


def _sign_text(row, kind):
    if kind != "t":
        return "F"
    return "positive" if row["sign"] > 0 else "negative"


def contrast_figures(results: Path, grid: Grid, summary: dict, cs: dict) -> list:
    """Draw one contrast's figures; return [(caption, png path)]."""
    name, kind = cs["name"], cs["kind"]
    folder = results / name
    figdir = folder / "figures"
    figdir.mkdir(exist_ok=True)
    for old in list(figdir.glob("*.png")) + list(figdir.glob("*.svg")):
        old.unlink()
    times = _times_ms(summary["window"])
    stat4, _ = _read_map(folder / "statistic.nii.gz")
    lab4 = _read_map(folder / "clusters.nii.gz")[0].astype(np.int64)
    if stat4.ndim == 3:
        stat4, lab4 = stat4[..., None], lab4[..., None]
    stat = grid.from_volume(stat4)
    labels = grid.from_volume(lab4)
    clusters = _read_tsv(folder / "clusters.tsv")
    reported = list(cs.get("reported_clusters", []))
    out = []
    vlim = figures._stat_range(stat, kind)
    label = {"t": "t", "F": "F"}[kind]

    def row_of(k):
        return clusters.loc[clusters["cluster"] == k].iloc[0]

    # maximum-intensity projections at cluster peak times
    mip_targets = reported[:MAX_MIPS]
    if not mip_targets:
        s, t = np.unravel_index(np.nanargmax(np.abs(stat)), stat.shape)
        mip_targets = [None]
    for k in mip_targets:
        if k is None:
            t_idx = int(t)
            title = f"{name}: {label} at its largest |{label}|, {times[t_idx]:g} ms (no cluster reported)"
            keep = np.zeros(stat.shape[0], bool)
            base = figdir / "mip_peak"
        else:
            r = row_of(k)
            t_idx = int(_sample_index(times, [r["t_peak_ms"]])[0])
            title = (f"{name}: {label} at {times[t_idx]:g} ms, peak of cluster {k} "
                     f"(p = {r['p_corrected']:.3g})" if np.isfinite(r["p_corrected"])
                     else f"{name}: {label} at {times[t_idx]:g} ms, peak of cluster {k}")
            keep = np.isin(labels[:, t_idx], reported)
            base = figdir / f"mip_cluster{k:02d}"
        figures.mip_figure(stat4[..., t_idx], grid.mask, grid.to_volume(keep), grid.affine,
                           kind, title, base, vlim=vlim)
        out.append((f"Maximum-intensity projections of the {label} map at {times[t_idx]:g} ms "
                    "(grey: source mask; white: reported clusters at that time).",
                    base.with_suffix(".png")))
    # sources x time per reported cluster
    coords = grid.coords_mm
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
    tc = _read_tsv(folder / "cluster_timecourses.tsv")
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
    null = _read_tsv(folder / "null_distribution.tsv")
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
        else:
            observed = [("observed maximum", float(null["max_stat"].iloc[0]))]
        base = figdir / "null_distribution"
        figures.null_figure(null["max_stat"].to_numpy(), observed, cs.get("critical_value"),
                            cs["alpha"], _score_label(corr, label),
                            f"{name}: null distribution of the maximum", base)
        out.append(("Null distribution of the map-wide maximum over rearrangements; orange "
                    "lines: observed clusters; dashed: the critical value at alpha.",
                    base.with_suffix(".png")))
    # design
    design = _read_tsv(folder / "design.tsv")
    if len(design):
        design = design.set_index("participant_id")
        base = figdir / "design"
        figures.design_figure(design, cs["weights"], f"{name}: design and contrast", base)
        out.append(("Design matrix (participants x coefficients; each column scaled to its "
                    "own range for display, black = lowest, constant columns grey) and the "
                    "contrast weights.",
                    base.with_suffix(".png")))
    return out


# ----------------------------------------------------------------------------
# HTML
# ----------------------------------------------------------------------------

def _img(path: Path) -> str:
    data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
    return f'<img alt="{html.escape(Path(path).stem)}" src="data:image/png;base64,{data}">'


def _fmt(v):
    if isinstance(v, (float, np.floating)):
        if not np.isfinite(v):
            return "n/a"
        return f"{v:.4g}"
    return html.escape(str(v))


def _html_table(frame: pd.DataFrame, columns=None, docs=None, highlight=None, max_rows=50):
    if frame is None or len(frame) == 0:
        return "<p>None.</p>"
    cols = [c for c in (columns or frame.columns) if c in frame.columns]
    head = "".join(f'<th class="l" title="{html.escape((docs or {}).get(c, ""))}">'
                   f"{html.escape(c)}</th>" if frame[c].dtype == object else
                   f'<th title="{html.escape((docs or {}).get(c, ""))}">{html.escape(c)}</th>'
                   for c in cols)
    rows = []
    for _, r in frame.head(max_rows).iterrows():
        cls = ' class="sig"' if highlight is not None and highlight(r) else ""
        cells = "".join(f'<td class="l">{_fmt(r[c])}</td>' if frame[c].dtype == object
                        else f"<td>{_fmt(r[c])}</td>" for c in cols)
        rows.append(f"<tr{cls}>{cells}</tr>")
    more = (f"<p>{len(frame) - max_rows} more rows in the TSV file.</p>"
            if len(frame) > max_rows else "")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>{more}"


def _kv(pairs):
    return ('<table class="kv">' + "".join(
        f"<tr><th class='l'>{html.escape(str(k))}</th><td>{html.escape(str(v))}</td></tr>"
        for k, v in pairs) + "</table>")


def _markdown_to_html(md: str) -> str:
    out = []
    for block in md.strip().split("\n\n"):
        if block.startswith("# "):
            continue
        if block.startswith("## "):
            out.append(f"<h3>{html.escape(block[3:])}</h3>")
        elif block[:2].strip().rstrip(".").isdigit():
            items = "".join(f"<li>{html.escape(l.split('. ', 1)[1])}</li>"
                            for l in block.splitlines() if ". " in l)
            out.append(f"<ol>{items}</ol>")
        else:
            out.append(f"<p>{html.escape(block)}</p>")
    return "\n".join(out)


CLUSTER_VIEW = ["cluster", "sign", "p_corrected", "mass", "n_sources", "n_samples", "t_start_ms",
                "t_end_ms", "t_peak_ms", "peak_x_mm", "peak_y_mm", "peak_z_mm", "peak_stat",
                "estimate_at_peak", "estimate_ci_low", "estimate_ci_high", "std_effect_at_peak",
                "std_effect_ci_low", "std_effect_ci_high", "atlas_label_at_peak"]


def render_html(summary, contrast_summaries, figure_lists, results: Path, methods_md) -> str:
    coh = summary.get("cohort", {})
    win = summary.get("window", {})
    st = summary.get("settings", {})
    title = html.escape(summary.get("title", "groupsrc results"))
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
             f"<meta name='viewport' content='width=device-width,initial-scale=1'>"
             f"<title>{title}</title><style>{CSS}</style></head><body><main>",
             f"<h1>{title}</h1><p class='sub'>groupsrc {html.escape(str(summary.get('groupsrc_version')))}"
             "</p>"]
    nav = ["<a href='#cohort'>Cohort</a>", "<a href='#design'>Design</a>"] + \
        [f"<a href='#c-{html.escape(c['name'])}'>{html.escape(c['name'])}</a>"
         for c in contrast_summaries] + ["<a href='#methods'>Methods</a>",
                                         "<a href='#cautions'>Cautions</a>"]
    parts.append("<nav>" + "".join(nav) + "</nav>")
    parts.append("<section class='caution'><strong>Read with care.</strong> "
                 + CAUTIONS[0] + "</section>")
    # cohort
    rows = [("participants", coh.get("participants", "?"))]
    for g, n in (coh.get("per_group") or {}).items():
        rows.append((f"  group {g}", n))
    if coh.get("conditions"):
        rows.append(("conditions", ", ".join(coh["conditions"])))
    if coh.get("sessions"):
        rows.append(("sessions", ", ".join(coh["sessions"])))
    rows += [("maps", coh.get("maps", "?")), ("sources", coh.get("sources", "?"))]
    if coh.get("voxel_size_mm"):
        rows.append(("voxel size (mm)", " x ".join(f"{v:g}" for v in coh["voxel_size_mm"])))
    if coh.get("time_range_ms"):
        rows.append(("input samples", f"{coh.get('samples', '?')}, {coh['time_range_ms'][0]:g} to "
                     f"{coh['time_range_ms'][1]:g} ms"))
    rows.append(("analysed window", f"{win.get('start_ms'):g} to {win.get('end_ms'):g} ms, "
                 f"{win.get('n')} samples every {win.get('dt_ms'):g} ms"))
    parts.append("<h2 id='cohort'>Cohort</h2>" + _kv(rows))
    if st.get("check_summary"):
        parts.append(
            "<h3>Checks</h3><p>Every input check passed before the statistics ran: each map "
            "read as a 4D NIfTI on one template grid (same shape and affine) with one time axis, "
            "no NaN or infinite value inside the mask, no duplicate or orphan table row, every "
            "model column present with at least two participants per factor level, and a "
            "full-rank design matrix.</p>")
    # design
    model = st.get("model", {})
    parts.append("<h2 id='design'>Design and contrasts</h2>" + _kv(
        [(k, v) for k, v in model.items() if v not in (None, "")]))
    crow = []
    for c in contrast_summaries:
        df = ", ".join(str(d) for d in c["df"])
        crow.append({"contrast": c["name"], "description": c.get("description", ""),
                     "statistic": f"{c['kind']}({df})", "scheme": c["scheme"],
                     "resamples": c["n_resamples"], "exact": "yes" if c["exact"] else "no",
                     "weights": json.dumps(c["weights"]),
                     "within": json.dumps(c.get("within")) if c.get("within") else ""})
    parts.append(_html_table(pd.DataFrame(crow).astype(str)))
    # per contrast
    for c, figs in zip(contrast_summaries, figure_lists):
        name = c["name"]
        folder = results / name
        df = ", ".join(str(d) for d in c["df"])
        parts.append(f"<h2 id='c-{html.escape(name)}'>Contrast {html.escape(name)}</h2>")
        if c.get("description"):
            parts.append(f"<p>{html.escape(c['description'])}</p>")
        n_rep = len(c.get("reported_clusters", []))
        parts.append(f"<p>{c['kind']} statistic with df = {df}; correction "
                     f"<strong>{html.escape(c['correction'])}</strong>, {html.escape(c['tails'])}"
                     f"-tailed, alpha = {c['alpha']}; {c.get('n_clusters', 0)} observed clusters, "
                     f"{n_rep} with corrected p &le; alpha.</p>")
        clusters = _read_tsv(folder / "clusters.tsv")
        parts.append("<h3>Clusters</h3>")
        alpha = c["alpha"]
        parts.append(_html_table(clusters, CLUSTER_VIEW, COLUMNS["clusters.tsv"],
                                 highlight=lambda r: np.isfinite(r["p_corrected"])
                                 and r["p_corrected"] <= alpha, max_rows=15))
        peaks = _read_tsv(folder / "peaks.tsv")
        if len(peaks):
            rep = set(c.get("reported_clusters", []))
            parts.append("<h3>Peaks of the reported clusters</h3>")
            parts.append(_html_table(peaks[peaks["cluster"].isin(rep)], None,
                                     COLUMNS["peaks.tsv"], max_rows=30))
        parts.append("<h3>Figures</h3>")
        for cap, png in figs:
            parts.append(f"<figure>{_img(png)}<figcaption>{html.escape(cap)} "
                         f"(<code>{html.escape(str(png.relative_to(results)))}</code>, SVG beside it)"
                         "</figcaption></figure>")
    # settings
    parts.append("<h2 id='settings'>Settings</h2><pre>" + html.escape(json.dumps(
        {k: v for k, v in st.items() if k != "check_summary"}, indent=1)) + "</pre>")
    parts.append("<h2 id='methods'>Methods</h2>" + _markdown_to_html(methods_md))
    parts.append("<h2 id='cautions'>Cautions</h2><ul>"
                 + "".join(f"<li>{c}</li>" for c in CAUTIONS) + "</ul>")
    parts.append("</main></body></html>")
    return "\n".join(parts)


def build_report(results_dir) -> Path:
    """Rebuild figures/, methods.md and report.html from a saved results folder.

    Raises InputError naming every missing or damaged file the report needs.
    """
    check_results_folder(results_dir)
    return render_report(results_dir)


def render_report(results_dir) -> Path:
    """Draw figures, methods.md and report.html of a folder the writer is filling
    (its run record comes last, so it is not required here)."""
    results = Path(results_dir)
    summary = _read_json(results / SUMMARY_FILE)
    grid = _load_grid(results)
    cs_list = [_read_json(results / n / "summary.json") for n in summary["contrasts"]]
    figs = [contrast_figures(results, grid, summary, cs) for cs in cs_list]
    md = methods_text(summary, cs_list)
    write_text(results / "methods.md", md)
    page = render_html(summary, cs_list, figs, results, md)
    return write_text(results / "report.html", page)
