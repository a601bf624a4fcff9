"""One contrast's figures, drawn from its saved folder: [(caption, png path)].

Which figures a contrast gets follows what it tests:

* every contrast: the statistic in space at the peak time of each reported
  cluster (volume: maximum-intensity projections; surface: lateral and medial
  views), each reported cluster over its sources and time, the null
  distribution and the design;
* volumes: slices through each reported cluster's peak, over the anatomical
  underlay when the analysis gave one (``[cohort] underlay``);
* a slope: each participant's cluster mean against the covariate;
* other contrasts: cluster means over time per group.

Captions and titles give a cluster's corrected p as "cluster-level p" and never
pair it with a time or a peak (a cluster's p is about the whole cluster).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from . import cluster_figures, volume_figures
from .design_figure import design_figure
from .figures import _stat_range
from .layout import FIGURES, read_tsv, read_underlay, read_values, times_ms
from .surface_figures import surface_figures

MAX_CLUSTER_FIGURES = 6
MAX_PROJECTIONS = 4


def _sample_index(times, values_ms):
    """Nearest sample of each time (tables store times rounded to the microsecond)."""
    return np.abs(np.asarray(values_ms, float)[:, None] - times[None, :]).argmin(axis=1)


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


def _p_text(r) -> str:
    return (f", cluster-level p = {r['p_corrected']:.3g}" if np.isfinite(r["p_corrected"])
            else "")


def projection_figures(grid, stat, labels, clusters, reported, times, name, kind, figdir,
                       threshold=None, underlay=None):
    """Maximum-intensity projections of a volume at the peak time of each reported
    cluster, and slices through each one's peak."""
    vlim = _stat_range(stat, kind)
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
            title = f"{name}: {kind} at {times[t_idx]:g} ms, the peak time of cluster {k}"
            keep = np.isin(labels[:, t_idx], reported)
            base = figdir / f"projections_cluster{k:02d}"
        volume_figures.projection_figure(grid.to_volume(stat[:, t_idx]), grid.mask,
                                         grid.to_volume(keep), grid.affine, kind, title, base,
                                         vlim=vlim, threshold=threshold, underlay=underlay)
        out.append((f"Maximum-intensity projections of the {kind} map at {times[t_idx]:g} ms"
                    + (" over the anatomical underlay (its mean along each axis)"
                       if underlay is not None else " (pale: the source mask)")
                    + "; full colour beyond the cluster-forming threshold, faded below it; "
                    "black outlines: reported clusters at that time.",
                    base.with_suffix(".png")))
    for k in reported[:MAX_PROJECTIONS]:
        r = clusters.loc[clusters["cluster"] == k].iloc[0]
        t_idx = int(_sample_index(times, [r["t_peak_ms"]])[0])
        peak = (r["peak_x_mm"], r["peak_y_mm"], r["peak_z_mm"])
        base = figdir / f"slices_cluster{k:02d}"
        volume_figures.slice_figure(
            grid.to_volume(stat[:, t_idx]), grid.mask, grid.to_volume(labels[:, t_idx] == k),
            grid.affine, peak, kind,
            f"{name}: cluster {k} ({_sign_text(r, kind)}), slices through its peak "
            f"({peak[0]:g}, {peak[1]:g}, {peak[2]:g}) mm at {times[t_idx]:g} ms",
            base, vlim=vlim, threshold=threshold, underlay=underlay)
        out.append((f"Cluster {k}: sagittal, coronal and axial slices through its peak "
                    f"(cross) at {times[t_idx]:g} ms"
                    + (" over the anatomical underlay" if underlay is not None else "")
                    + "; black outline: the cluster at that time.", base.with_suffix(".png")))
    return out


def _surface(space, stat, labels, clusters, reported, times, name, kind, figdir,
             threshold=None, underlay=None):
    return surface_figures(space, stat, labels, clusters, reported, times, name, kind, figdir,
                           threshold=threshold)


#: the figure of the statistic in space, by source-space kind
SPATIAL_FIGURES = {"volume": projection_figures, "surface": _surface}


def _spec(summary, name) -> dict:
    for spec in summary.get("settings", {}).get("contrasts") or []:
        if spec.get("name") == name:
            return spec
    return {}


def _per_participant(sub, times):
    """(ids, (n, T) values) of one cluster's time courses."""
    wide = sub.pivot(index="participant_id", columns="time_ms", values="value")
    vals = np.full((len(wide), times.size), np.nan)
    vals[:, _sample_index(times, wide.columns)] = wide.to_numpy()
    return list(wide.index), vals


def _timecourses(folder, summary, cs, clusters, reported, times, figdir, unit):
    tc = read_tsv(folder / "cluster_timecourses.tsv")
    shown = reported[:MAX_CLUSTER_FIGURES] or ([int(clusters["cluster"].iloc[0])]
                                               if len(clusters) else [])
    shown = [k for k in shown if len(tc) and (tc["cluster"] == k).any()]
    if not shown:
        return []
    name, kind = cs["name"], "z" if cs.get("scale") == "z" else cs["kind"]
    half = summary["window"]["dt_ms"] / 2      # a sample covers +/- half an interval
    slope = _spec(summary, name).get("slope")
    design = read_tsv(folder / "design.tsv")
    if slope and slope in design.columns:
        cov = design.drop_duplicates("participant_id").set_index(
            design.drop_duplicates("participant_id")["participant_id"].astype(str))[slope]
        panels = []
        for k in shown:
            r = clusters.loc[clusters["cluster"] == k].iloc[0]
            sub = tc[tc["cluster"] == k]
            ids, vals = _per_participant(sub, times)
            span = (times >= r["t_start_ms"] - 1e-6) & (times <= r["t_end_ms"] + 1e-6)
            groups = None
            if "group" in sub.columns:
                g = sub.drop_duplicates("participant_id").set_index("participant_id")["group"]
                groups = [str(g[i]) for i in ids]
            panels.append({"title": f"cluster {k} ({_sign_text(r, kind)}{_p_text(r)})",
                           "x": [cov.get(str(i), np.nan) for i in ids],
                           "y": np.nanmean(vals[:, span], axis=1), "groups": groups,
                           "span": (r["t_start_ms"], r["t_end_ms"])})
        base = figdir / "covariate_clusters"
        cluster_figures.covariate_figure(panels, slope, name, base, unit=unit)
        return [(f"Each participant's mean over the cluster's sources and time span against "
                 f"{slope} (the contrast tests the change per unit of {slope}, the other terms "
                 "held fixed; the line is a plain least-squares fit of these points, not "
                 "adjusted for the other terms). The points were selected by the test; "
                 "their spread, not the line, is the honest part.", base.with_suffix(".png"))]
    panels = []
    for k in shown:
        r = clusters.loc[clusters["cluster"] == k].iloc[0]
        sub = tc[tc["cluster"] == k]
        gcol = "group" if "group" in sub.columns else None
        groups = {str(g): _per_participant(gsub, times)[1]
                  for g, gsub in (sub.groupby(gcol, sort=True) if gcol else [("all", sub)])}
        sig = bool(np.isfinite(r["p_corrected"]) and r["p_corrected"] <= cs["alpha"]) \
            or (not np.isfinite(r["p_corrected"]) and k in reported)
        panels.append({"title": f"cluster {k} ({_sign_text(r, kind)}{_p_text(r)})",
                       "groups": groups, "span": (r["t_start_ms"] - half, r["t_end_ms"] + half),
                       "significant": sig})
    base = figdir / "timecourses"
    cluster_figures.timecourse_figure(panels, times, name, base, unit=unit)
    fewer = ""
    if cs.get("model") == "mixed":
        n_tc = tc["participant_id"].nunique()
        if n_tc < int(cs.get("n_participants", n_tc)):
            fewer = (f" Only the {n_tc} of {cs['n_participants']} participants with every "
                     "condition the contrast weighs have a value of it to average; the mixed "
                     "model used every map of all of them.")
    return [("Mean over each cluster's sources per group with 95% t-intervals; shaded: the "
             "cluster's time span (hatched when not significant)." + fewer,
             base.with_suffix(".png"))]


def _conditions(folder, summary, cs, clusters, reported, times, figdir, unit):
    """An interaction's per-condition waveforms per group (condition_timecourses.tsv)."""
    spec = _spec(summary, cs["name"])
    path = folder / "condition_timecourses.tsv"
    if not (spec.get("compare") and spec.get("within")) or not path.is_file():
        return []
    tc = read_tsv(path)
    shown = [k for k in (reported[:3] or list(clusters["cluster"][:1]))
             if len(tc) and (tc["cluster"] == k).any()]
    if not shown or "group" not in tc.columns:
        return []
    kind = "z" if cs.get("scale") == "z" else cs["kind"]
    half = summary["window"]["dt_ms"] / 2
    order = [str(c) for c in spec["within"]]
    panels = []
    for k in shown:
        r = clusters.loc[clusters["cluster"] == k].iloc[0]
        sub = tc[tc["cluster"] == k]
        groups = {}
        for g, gsub in sub.groupby("group", sort=True):
            groups[str(g)] = {c: _per_participant(gsub[gsub["condition"] == c], times)[1]
                              for c in order if (gsub["condition"] == c).any()}
        panels.append({"title": f"cluster {k} ({_sign_text(r, kind)})", "groups": groups,
                       "span": (r["t_start_ms"] - half, r["t_end_ms"] + half)})
    base = figdir / "conditions_by_group"
    cluster_figures.conditions_figure(panels, times, base, unit=unit)
    return [("Each condition's mean over the cluster's sources, per group, with 95% "
             "t-intervals (sessions averaged within participants); the contrast tests whether "
             "the condition difference differs between the groups; shaded: the cluster's time "
             "span.", base.with_suffix(".png"))]


def _null(folder, cs, clusters, reported, figdir, label):
    null = read_tsv(folder / "null_distribution.tsv")
    if not len(null):
        return []
    name, corr = cs["name"], cs["correction"]
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
    cluster_figures.null_figure(null["max_stat"].to_numpy(), observed, cs.get("critical_value"),
                                cs["alpha"], _score_label(corr, label),
                                f"{name}: null distribution of the maximum", base, what=what)
    return [("Null distribution of the map-wide maximum over rearrangements; orange "
             f"line{'s' if len(observed) > 1 else ''}: {what} (named in the legend); dashed: "
             "the critical value at alpha.", base.with_suffix(".png"))]


def _design(folder, cs, figdir):
    design = read_tsv(folder / "design.tsv")
    if not len(design):
        return []
    design = design.set_index("participant_id")
    mixed = cs.get("model") == "mixed"
    if mixed:                       # one row per map: draw each distinct row once
        design = design[~design.duplicated()]
    base = figdir / "design"
    design_figure(design, cs["weights"], f"{cs['name']}: design and contrast", base,
                  row_label="distinct map row" if mixed else "participant",
                  within="absent" if mixed else cs.get("within"))
    return [(("The mixed model's fixed-effects design, each distinct map row once "
              "(labelled with the first participant who has it)" if mixed else
              "The analysis in two steps: each participant's maps combined by the "
              "within-participant weights (when the contrast has them), then the "
              "between-participant design") + ", one panel per coefficient (coloured blocks: "
             "indicator columns; dots: covariates on their own scale, dashed at the mean), "
             "and the contrast's weights below.", base.with_suffix(".png"))]


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
    unit = (summary.get("settings", {}).get("cohort") or {}).get("unit")
    space = maps.space
    stat = read_values(maps, folder, "statistic")
    labels = read_values(maps, folder, "clusters").astype(np.int64)
    clusters = read_tsv(folder / "clusters.tsv")
    reported = list(cs.get("reported_clusters", []))
    threshold = cs.get("threshold") if cs["correction"] in ("cluster-mass",
                                                            "cluster-extent") else None
    out = SPATIAL_FIGURES[space.kind](space, stat, labels, clusters, reported, times, name,
                                      kind, figdir, threshold=threshold,
                                      underlay=read_underlay(results))
    coords = space.coords_mm
    for k in reported[:MAX_CLUSTER_FIGURES]:
        member = labels == k
        src = np.flatnonzero(member.any(axis=1))
        r = clusters.loc[clusters["cluster"] == k].iloc[0]
        base = figdir / f"sources_by_time_cluster{k:02d}"
        cluster_figures.source_time_figure(
            stat[src], member[src], times, kind,
            f"{name}, cluster {k} ({_sign_text(r, kind)}{_p_text(r)})", base,
            coords_y=coords[src, 1], threshold=threshold)
        out.append((f"Cluster {k}: {kind} of each of its {src.size} sources over time; "
                    "outlined: points in the cluster.", base.with_suffix(".png")))
    out += _timecourses(folder, summary, cs, clusters, reported, times, figdir, unit)
    out += _conditions(folder, summary, cs, clusters, reported, times, figdir, unit)
    out += _null(folder, cs, clusters, reported, figdir, kind)
    out += _design(folder, cs, figdir)
    return out
