"""Figures of one contrast's clusters and of its null distribution.

* :func:`source_time_figure` -- the statistic of a cluster's sources over time;
* :func:`timecourse_figure` -- cluster means over time per group, with 95%
  t-intervals (group, within and interaction contrasts);
* :func:`covariate_figure` -- for a slope: each participant's cluster mean over
  the cluster's time span against the covariate, with the least-squares line of
  these points (a display, not the model's adjusted slope);
* :func:`null_figure` -- the map-wide maximum over rearrangements with the
  observed clusters marked, each named in the legend (no labels on the bars).

Legends sit below the axes and amplitude axes carry the maps' unit
(``[cohort] unit``).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import MaxNLocator
from scipy import stats

from .figures import (GROUP_COLOURS, LINESTYLES, MARKERS, MM, WIDTH_IN, _stat_range,
                      amplitude_label, legend_below, new_figure, save, stat_cmap, stat_colorbar)
from .volume_figures import _outline

OBSERVED_STYLES = ["-", "--", ":", "-.", (0, (5, 1, 1, 1)), (0, (1, 1))]


def source_time_figure(stat, member, times_ms, kind, title, base: Path, coords_y=None,
                       threshold=None) -> list:
    """Statistic of a cluster's sources (rows, ordered by onset) over time.

    ``stat``, ``member``: (n_cluster_sources, n_times); ``member`` marks the
    points that belong to the cluster (outlined when there are few rows;
    with many rows the points outside the cluster are faded instead, since
    an outline around hundreds of rows is unreadable).
    """
    stat = np.asarray(stat, float)
    member = np.asarray(member, bool)
    n_t = member.shape[1]
    onset = np.where(member.any(axis=1), member.argmax(axis=1), n_t)
    offset = np.where(member.any(axis=1), n_t - 1 - member[:, ::-1].argmax(axis=1), -1)
    order = np.lexsort((-offset, onset))  # earliest onset first, then longest
    stat, member = stat[order], member[order]
    vmin, vmax = _stat_range(stat, "t" if kind != "F" else "F")
    n = stat.shape[0]
    fig = new_figure(min(120, 65 + 0.25 * n), width_in=120 * MM)
    ax = fig.add_subplot()
    t = np.asarray(times_ms, float)
    dt = (t[1] - t[0]) if t.size > 1 else 1.0
    im = ax.imshow(stat, aspect="auto", origin="lower", cmap=stat_cmap(kind), vmin=vmin,
                   vmax=vmax, extent=[t[0] - dt / 2, t[-1] + dt / 2, 0.5, n + 0.5],
                   interpolation="nearest")
    if member.any() and not member.all():
        if n <= 40:
            rows_c = np.arange(1, n + 1, dtype=float)
            _outline(ax, member.T, t, rows_c, "#000000", 1.0)
        else:
            veil = np.zeros(member.shape + (4,))
            veil[~member] = (1.0, 1.0, 1.0, 0.65)
            ax.imshow(veil, aspect="auto", origin="lower", interpolation="nearest",
                      extent=[t[0] - dt / 2, t[-1] + dt / 2, 0.5, n + 0.5])
    ax.yaxis.set_major_locator(MaxNLocator(integer=True, min_n_ticks=1))
    ax.set_xlabel("time (ms)")
    ax.set_ylabel(f"cluster sources (n = {n}),\nordered by onset"
                  + ("" if n <= 40 else "; faded: outside the cluster"))
    ax.set_title(title)
    stat_colorbar(fig, im, kind, threshold, ax=ax)
    return save(fig, base)


def mean_ci(values, level=0.95):
    """Mean and t-based confidence half-width over rows of (n, T) values."""
    values = np.asarray(values, float)
    n = values.shape[0]
    m = values.mean(axis=0)
    if n < 2:
        return m, np.full_like(m, np.nan)
    se = values.std(axis=0, ddof=1) / np.sqrt(n)
    return m, stats.t.ppf(0.5 + level / 2, n - 1) * se


def timecourse_figure(panels, times_ms, measure, base: Path, unit=None) -> list:
    """Cluster-mean time courses, one panel per cluster.

    ``panels``: list of dicts with keys ``title``, ``groups`` ({name: (n, T)
    array}), ``span`` (start_ms, end_ms) and ``significant`` (bool).
    """
    k = len(panels)
    cols = 1 if k == 1 else 2
    rows = int(np.ceil(k / cols))
    fig = new_figure(55 * rows + 22, width_in=(WIDTH_IN if cols == 2 else 110 * MM))
    t = np.asarray(times_ms, float)
    handles = {}
    for i, p in enumerate(panels):
        ax = fig.add_subplot(rows, cols, i + 1)
        lo, hi = p["span"]
        if p["significant"]:
            ax.axvspan(lo, hi, color="#d9d9d9", zorder=0, lw=0)
            handles.setdefault("cluster span", Patch(color="#d9d9d9"))
        else:
            ax.axvspan(lo, hi, facecolor="none", edgecolor="#9a9a9a", hatch="///", lw=0,
                       zorder=0)
            handles.setdefault("cluster span (not significant)",
                               Patch(facecolor="none", edgecolor="#9a9a9a", hatch="///"))
        ax.axhline(0, color="black", lw=0.5)
        for j, (g, vals) in enumerate(p["groups"].items()):
            m, h = mean_ci(vals)
            c = GROUP_COLOURS[j % len(GROUP_COLOURS)]
            ls = LINESTYLES[j % len(LINESTYLES)]
            ax.fill_between(t, m - h, m + h, color=c, alpha=0.25, lw=0)
            ax.plot(t, m, color=c, ls=ls, lw=1.3)
            handles.setdefault(f"{g} (n = {vals.shape[0]})", Line2D([], [], color=c, ls=ls,
                                                                   lw=1.3))
        ax.set_title(p["title"])
        ax.set_xlabel("time (ms)")
        ax.set_ylabel(f"{measure}\ncluster mean ({amplitude_label(unit)})")
        ax.set_xlim(t[0], t[-1])
    legend_below(fig, list(handles.values()), list(handles.keys()))
    fig.suptitle("Cluster time courses: mean with 95% t-interval", fontsize=8.5)
    return save(fig, base)


def conditions_figure(panels, times_ms, base: Path, unit=None) -> list:
    """Per-condition cluster means over time, one row of panels per cluster and one
    panel per group (an interaction: does the condition effect differ by group?).

    ``panels``: list of dicts with ``title`` (the cluster), ``span`` and ``groups``
    ({group: {condition: (n, T) array}}).
    """
    n_groups = max(len(p["groups"]) for p in panels)
    fig = new_figure(48 * len(panels) + 24, width_in=WIDTH_IN if n_groups > 1 else 110 * MM)
    t = np.asarray(times_ms, float)
    handles, axes = {}, []
    for i, p in enumerate(panels):
        for j, (g, conds) in enumerate(p["groups"].items()):
            ax = fig.add_subplot(len(panels), n_groups, i * n_groups + j + 1,
                                 sharey=axes[0] if axes else None)
            axes.append(ax)
            lo, hi = p["span"]
            ax.axvspan(lo, hi, color="#e3e3e3", zorder=0, lw=0)
            handles.setdefault("cluster span", Patch(color="#e3e3e3"))
            ax.axhline(0, color="black", lw=0.5)
            for c_i, (cname, vals) in enumerate(conds.items()):
                m, h = mean_ci(vals)
                col = GROUP_COLOURS[(c_i + 2) % len(GROUP_COLOURS)]
                ls = LINESTYLES[c_i % len(LINESTYLES)]
                ax.fill_between(t, m - h, m + h, color=col, alpha=0.2, lw=0)
                ax.plot(t, m, color=col, ls=ls, lw=1.3)
                handles.setdefault(f"{cname}", Line2D([], [], color=col, ls=ls, lw=1.3))
            n = max(v.shape[0] for v in conds.values())
            ax.set_title(f"{p['title']}: {g} (n = {n})")
            ax.set_xlabel("time (ms)")
            ax.set_xlim(t[0], t[-1])
            if j == 0:
                ax.set_ylabel(f"cluster mean\n({amplitude_label(unit)})")
    legend_below(fig, list(handles.values()), list(handles.keys()))
    fig.suptitle("Each condition's cluster mean per group, with 95% t-intervals",
                 fontsize=8.5)
    return save(fig, base)


def covariate_figure(panels, covariate, measure, base: Path, unit=None) -> list:
    """Per participant, the cluster mean over the cluster's time span against the
    covariate; one panel per cluster.

    ``panels``: list of dicts with ``title``, ``x`` (n,), ``y`` (n,), ``groups``
    (n,) labels or None, ``span`` (start_ms, end_ms).
    """
    k = len(panels)
    cols = 1 if k == 1 else 2
    rows = int(np.ceil(k / cols))
    fig = new_figure(58 * rows + 22, width_in=(WIDTH_IN if cols == 2 else 110 * MM))
    handles = {}
    for i, p in enumerate(panels):
        ax = fig.add_subplot(rows, cols, i + 1)
        x, y = np.asarray(p["x"], float), np.asarray(p["y"], float)
        groups = p.get("groups")
        names = sorted(set(groups)) if groups is not None else ["participants"]
        for j, g in enumerate(names):
            sel = np.asarray(groups) == g if groups is not None else np.ones(x.size, bool)
            c, mk = GROUP_COLOURS[j % len(GROUP_COLOURS)], MARKERS[j % len(MARKERS)]
            ax.plot(x[sel], y[sel], mk, color=c, ms=3.5, mec="white", mew=0.4, ls="none")
            handles.setdefault(f"{g} (n = {int(sel.sum())})",
                               Line2D([], [], color=c, marker=mk, ls="none", ms=3.5))
        ok = np.isfinite(x) & np.isfinite(y)
        if ok.sum() >= 2 and np.ptp(x[ok]) > 0:
            slope, icpt = np.polyfit(x[ok], y[ok], 1)
            xs = np.linspace(x[ok].min(), x[ok].max(), 2)
            ax.plot(xs, icpt + slope * xs, color="#000000", lw=1.0)
            handles.setdefault("least-squares line of these points",
                               Line2D([], [], color="#000000", lw=1.0))
        ax.axhline(0, color="#777777", lw=0.5, ls=":")
        ax.set_title(p["title"])
        ax.set_xlabel(covariate)
        lo, hi = p["span"]
        ax.set_ylabel(f"{measure}, {lo:g} to {hi:g} ms\ncluster mean ({amplitude_label(unit)})")
    legend_below(fig, list(handles.values()), list(handles.keys()))
    fig.suptitle(f"Cluster means against {covariate}, one point per participant", fontsize=8.5)
    return save(fig, base)


def null_figure(null_max, observed, critical, alpha, xlabel, title, base: Path,
                what="observed clusters") -> list:
    """Histogram of the per-rearrangement maxima with observed scores marked.

    ``observed``: list of (label, value), each line named in the legend (below
    the axes); ``critical``: the (1 - alpha) quantile.
    """
    null_max = np.asarray(null_max, float)
    null_max = null_max[np.isfinite(null_max)]
    n_obs = len(observed)
    fig = new_figure(70 + 4 * ((n_obs + 2) // 2), width_in=110 * MM)
    ax = fig.add_subplot()
    top = max([null_max.max() if null_max.size else 1.0] + [v for _, v in observed])
    bins = np.linspace(0, top * 1.05, 41)
    ax.hist(null_max, bins=bins, color="#7f7f7f", edgecolor="white", lw=0.3)
    handles = [Patch(color="#7f7f7f")]
    labels = [f"rearrangements (m = {null_max.size})"]
    if (critical is None or not np.isfinite(critical)) and null_max.size:
        critical = float(np.quantile(null_max, 1 - alpha, method="higher"))
    if critical is not None and np.isfinite(critical):
        ax.axvline(critical, color="black", ls="--", lw=1)
        handles.append(Line2D([], [], color="black", ls="--", lw=1))
        labels.append(f"{100 * (1 - alpha):g}th percentile: critical value {critical:.4g}")
    for j, (lab, v) in enumerate(observed):
        ls = OBSERVED_STYLES[j % len(OBSERVED_STYLES)]
        ax.axvline(v, color=GROUP_COLOURS[1], lw=1.3, ls=ls)
        handles.append(Line2D([], [], color=GROUP_COLOURS[1], lw=1.3, ls=ls))
        labels.append(f"{lab}: {v:.4g}")
    ax.set_xlabel(xlabel)
    ax.set_ylabel("rearrangements (count)")
    ax.set_title(title)
    legend_below(fig, handles, labels, ncol=2)
    return save(fig, base)
