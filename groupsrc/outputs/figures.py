"""Publication figures (matplotlib, no pyplot state): PNG at 150 dpi and SVG.

Every function takes plain arrays and tables, so the report can be rebuilt
from a saved results folder.  Colour maps:

* signed statistics (t): matplotlib's ``berlin`` (Crameri's diverging map,
  perceptually uniform and readable with the common colour-vision
  deficiencies; dark at zero, blue for negative, warm for positive), or when
  the installed matplotlib lacks it a map joined from two halves of ``cividis``.
* unsigned statistics (F): ``cividis`` (perceptually uniform sequential,
  designed for colour-vision deficiencies).
* groups: the Okabe-Ito qualitative palette (common practice for
  colour-blind-safe categorical colours), with different line styles too.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib
import numpy as np
from matplotlib.colors import LinearSegmentedColormap
from matplotlib.figure import Figure
from scipy import stats

from .files import save_figure

MM = 1 / 25.4
WIDTH_IN = 180 * MM          # two-column journal width
DPI = 150
GROUP_COLOURS = ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000"]
LINESTYLES = ["-", "--", "-.", ":"]
OUTLINE_MASK = "#8a8a8a"
OUTLINE_CLUSTER = "#ffffff"

STYLE = {"font.size": 7.5, "axes.titlesize": 8.5, "axes.labelsize": 7.5,
         "xtick.labelsize": 7, "ytick.labelsize": 7, "legend.fontsize": 7,
         "svg.fonttype": "none", "axes.spines.top": False, "axes.spines.right": False,
         # fixed salt for the SVG element ids, so equal figures give equal files
         "svg.hashsalt": "groupsrc"}


def diverging_cmap():
    """Perceptually uniform diverging map for signed statistics (see module doc)."""
    if "berlin" in matplotlib.colormaps:
        cm = matplotlib.colormaps["berlin"]
    else:  # pragma: no cover - matplotlib < 3.10
        base = matplotlib.colormaps["cividis"]
        lo = base(np.linspace(0.0, 0.5, 128))[::-1][:, :3] * [0.6, 0.8, 1.0]
        hi = base(np.linspace(0.5, 1.0, 128))[:, :3]
        cm = LinearSegmentedColormap.from_list("groupsrc_diverging", np.vstack([lo[::-1], hi]))
    return cm.with_extremes(bad="white")


def sequential_cmap():
    cm = matplotlib.colormaps["cividis"]
    return cm.with_extremes(bad="white")


#: statistic kinds drawn as signed maps ("z": the mixed model's z of equal p)
SIGNED = ("t", "z")


def stat_cmap(kind):
    return diverging_cmap() if kind in SIGNED else sequential_cmap()


def new_figure(height_mm, width_in=WIDTH_IN):
    matplotlib.rcParams.update(STYLE)
    return Figure(figsize=(width_in, height_mm * MM), layout="constrained")


def save(fig, base: Path) -> list:
    """Write ``base``.png and ``base``.svg; return both paths.

    The layout is computed once, for the PNG, and then frozen, so the SVG
    (the same figure, as vectors) does not lay the figure out a second time.
    """
    base = Path(base)
    png = save_figure(fig, base.with_suffix(".png"), dpi=DPI, facecolor="white")
    fig.set_layout_engine("none")
    svg = save_figure(fig, base.with_suffix(".svg"), facecolor="white")
    return [png, svg]


def _stat_range(values, kind):
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    top = float(np.max(np.abs(v))) if v.size else 1.0
    top = top if top > 0 else 1.0
    return (-top, top) if kind in SIGNED else (0.0, top)


def _stat_label(kind):
    return kind if kind in SIGNED else "F"


# ----------------------------------------------------------------------------
# maximum-intensity projections
# ----------------------------------------------------------------------------

def _world_axes(affine, shape):
    """Ascending world coordinates (mm) per voxel axis and whether to flip it.

    Assumes the 3x3 part is diagonal (a template grid aligned with the world
    axes); otherwise voxel indices are used and the axis is named so.
    """
    A = np.asarray(affine, float)
    diag = np.allclose(A[:3, :3], np.diag(np.diag(A[:3, :3])))
    coords, flips, names = [], [], []
    for i, n in enumerate(shape):
        if diag:
            c = A[i, i] * np.arange(n) + A[i, 3]
            flip = A[i, i] < 0
            coords.append(c[::-1] if flip else c)
            flips.append(flip)
            names.append(f"{'xyz'[i]} (mm)")
        else:
            coords.append(np.arange(n, dtype=float))
            flips.append(False)
            names.append(f"voxel axis {i + 1}")
    return coords, flips, names, diag


def _outline(ax, mask2d, xc, yc, colors, linewidths, linestyles="solid", up=6):
    """Contour of a boolean image along its pixel edges (mask2d indexed [x, y],
    pixel centres ``xc``, ``yc``): upsampled by ``up`` before contouring."""
    m = np.kron(np.asarray(mask2d, float), np.ones((up, up)))
    m = np.pad(m, 1)
    dx = (xc[1] - xc[0]) if len(xc) > 1 else 1.0
    dy = (yc[1] - yc[0]) if len(yc) > 1 else 1.0
    xs = xc[0] - dx / 2 + dx / up * (np.arange(m.shape[0]) - 0.5)
    ys = yc[0] - dy / 2 + dy / up * (np.arange(m.shape[1]) - 0.5)
    ax.contour(xs, ys, m.T, levels=[0.5], colors=colors, linewidths=linewidths,
               linestyles=linestyles)


def signed_projection(vol, axis):
    """Value of largest magnitude along ``axis`` (NaN where all are NaN)."""
    a = np.where(np.isfinite(vol), np.abs(vol), -1.0)
    idx = np.argmax(a, axis=axis)
    out = np.take_along_axis(vol, np.expand_dims(idx, axis), axis).squeeze(axis)
    return out


def projection_figure(stat3d, mask3d, cluster3d, affine, kind, title, base: Path, vlim=None) -> list:
    """Three orthogonal maximum-intensity projections of a 3D statistic map.

    ``cluster3d`` (bool) marks the points in clusters shown with white outlines;
    the grey outline is the projected source mask.
    """
    stat = np.where(mask3d, np.asarray(stat3d, float), np.nan)
    coords, flips, names, diag = _world_axes(affine, stat.shape)
    for i, f in enumerate(flips):
        if f:
            stat, mask3d, cluster3d = (np.flip(a, i) for a in (stat, mask3d, cluster3d))
    vmin, vmax = vlim if vlim is not None else _stat_range(stat, kind)
    views = [("sagittal", 0, 1, 2), ("coronal", 1, 0, 2), ("axial", 2, 0, 1)]
    widths = [np.ptp(coords[h]) + 1 for _, _, h, _ in views]
    fig = new_figure(70)
    gs = fig.add_gridspec(1, 4, width_ratios=widths + [0.06 * sum(widths)])
    cmap = stat_cmap(kind)
    im = None
    for j, (vname, ax_p, h, v) in enumerate(views):
        ax = fig.add_subplot(gs[0, j])
        proj = signed_projection(stat, ax_p) if kind in SIGNED else np.nanmax(
            np.where(np.isfinite(stat), stat, -np.inf), axis=ax_p)
        proj = np.where(np.isfinite(proj), proj, np.nan)
        pmask = mask3d.any(axis=ax_p)
        pclus = cluster3d.any(axis=ax_p)
        proj = np.where(pmask, proj, np.nan)
        ch, cv = coords[h], coords[v]
        dh = (ch[1] - ch[0]) / 2 if ch.size > 1 else 0.5
        dv = (cv[1] - cv[0]) / 2 if cv.size > 1 else 0.5
        im = ax.imshow(proj.T, origin="lower", cmap=cmap, vmin=vmin, vmax=vmax,
                       extent=[ch[0] - dh, ch[-1] + dh, cv[0] - dv, cv[-1] + dv],
                       interpolation="nearest")
        if pmask.any() and not pmask.all():
            _outline(ax, pmask, ch, cv, OUTLINE_MASK, 0.8)
        if pclus.any():
            _outline(ax, pclus, ch, cv, OUTLINE_CLUSTER, 1.2)
            _outline(ax, pclus, ch, cv, "black", 0.5, "--")
        ax.set_aspect("equal")
        ax.set_xlabel(names[h])
        ax.set_ylabel(names[v])
        ax.set_title(vname)
        ax.spines[["top", "right"]].set_visible(True)
        if diag:  # world axes assumed RAS (x to the right, y to the front), as templates are
            lo_txt, hi_txt = ("L", "R") if h == 0 else ("P", "A")
            ax.text(0.02, 0.97, lo_txt, transform=ax.transAxes, va="top", ha="left",
                    weight="bold")
            ax.text(0.98, 0.97, hi_txt, transform=ax.transAxes, va="top", ha="right",
                    weight="bold")
    cax = fig.add_subplot(gs[0, 3])
    cb = fig.colorbar(im, cax=cax)
    cb.set_label(f"{_stat_label(kind)} (largest |value| along the projection)"
                 if kind in SIGNED else "F (largest value along the projection)")
    fig.suptitle(title, fontsize=8.5)
    return save(fig, base)


# ----------------------------------------------------------------------------
# one cluster: sources x time
# ----------------------------------------------------------------------------

def source_time_figure(stat, member, times_ms, kind, title, base: Path, coords_y=None) -> list:
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
    vmin, vmax = _stat_range(stat, kind)
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
            _outline(ax, member.T, t, rows_c, OUTLINE_CLUSTER, 1.0)
            _outline(ax, member.T, t, rows_c, "black", 0.4, "--")
        else:
            veil = np.zeros(member.shape + (4,))
            veil[~member] = (1.0, 1.0, 1.0, 0.65)
            ax.imshow(veil, aspect="auto", origin="lower", interpolation="nearest",
                      extent=[t[0] - dt / 2, t[-1] + dt / 2, 0.5, n + 0.5])
    ax.set_xlabel("time (ms)")
    ax.set_ylabel(f"cluster sources (n = {n}),\nordered by onset"
                  + ("" if n <= 40 else "; faded: outside the cluster"))
    ax.set_title(title)
    cb = fig.colorbar(im, ax=ax)
    cb.set_label(_stat_label(kind))
    return save(fig, base)


# ----------------------------------------------------------------------------
# cluster time courses per group
# ----------------------------------------------------------------------------

def mean_ci(values, level=0.95):
    """Mean and t-based confidence half-width over rows of (n, T) values."""
    values = np.asarray(values, float)
    n = values.shape[0]
    m = values.mean(axis=0)
    if n < 2:
        return m, np.full_like(m, np.nan)
    se = values.std(axis=0, ddof=1) / np.sqrt(n)
    return m, stats.t.ppf(0.5 + level / 2, n - 1) * se


def timecourse_figure(panels, times_ms, measure, base: Path) -> list:
    """Cluster-mean time courses, one panel per cluster.

    ``panels``: list of dicts with keys ``title``, ``groups`` ({name: (n, T)
    array}), ``span`` (start_ms, end_ms) and ``significant`` (bool).
    """
    k = len(panels)
    cols = 1 if k == 1 else 2
    rows = int(np.ceil(k / cols))
    fig = new_figure(55 * rows + 10, width_in=(WIDTH_IN if cols == 2 else 110 * MM))
    t = np.asarray(times_ms, float)
    for i, p in enumerate(panels):
        ax = fig.add_subplot(rows, cols, i + 1)
        lo, hi = p["span"]
        if p["significant"]:
            ax.axvspan(lo, hi, color="#d9d9d9", zorder=0, lw=0, label="cluster span")
        else:
            ax.axvspan(lo, hi, facecolor="none", edgecolor="#9a9a9a", hatch="///", lw=0,
                       zorder=0, label="cluster span (not significant)")
        ax.axhline(0, color="black", lw=0.5)
        for j, (g, vals) in enumerate(p["groups"].items()):
            m, h = mean_ci(vals)
            c = GROUP_COLOURS[j % len(GROUP_COLOURS)]
            ax.fill_between(t, m - h, m + h, color=c, alpha=0.25, lw=0)
            ax.plot(t, m, color=c, ls=LINESTYLES[j % len(LINESTYLES)], lw=1.3,
                    label=f"{g} (n = {vals.shape[0]})")
        ax.set_title(p["title"])
        ax.set_xlabel("time (ms)")
        ax.set_ylabel(f"{measure}\ncluster mean (input units)")
        ax.set_xlim(t[0], t[-1])
        if i == 0:
            ax.legend(frameon=False, loc="best")
    fig.suptitle("Cluster time courses: mean with 95% t-interval", fontsize=8.5)
    return save(fig, base)


# ----------------------------------------------------------------------------
# null distribution
# ----------------------------------------------------------------------------

def null_figure(null_max, observed, critical, alpha, xlabel, title, base: Path,
                what="observed clusters") -> list:
    """Histogram of the per-rearrangement maxima with observed scores marked.

    ``observed``: list of (label, value); ``critical``: the (1 - alpha) quantile;
    ``what``: the legend entry of the observed lines.
    """
    null_max = np.asarray(null_max, float)
    null_max = null_max[np.isfinite(null_max)]
    fig = new_figure(60, width_in=110 * MM)
    ax = fig.add_subplot()
    top = max([null_max.max() if null_max.size else 1.0] + [v for _, v in observed])
    bins = np.linspace(0, top * 1.05, 41)
    counts, _, _ = ax.hist(null_max, bins=bins, color="#7f7f7f", edgecolor="white", lw=0.3,
                           label=f"rearrangements (m = {null_max.size})")
    hmax = float(np.max(counts)) if np.size(counts) else 1.0
    ax.set_ylim(0, max(hmax, 1.0) * 1.4)         # a band above the bars for the labels
    if (critical is None or not np.isfinite(critical)) and null_max.size:
        critical = float(np.quantile(null_max, 1 - alpha, method="higher"))
    if critical is not None and np.isfinite(critical):
        ax.axvline(critical, color="black", ls="--", lw=1,
                   label=f"{100 * (1 - alpha):g}th percentile")
    ymax = ax.get_ylim()[1]
    for j, (lab, v) in enumerate(observed):
        ax.axvline(v, color=GROUP_COLOURS[1], lw=1.2, label=what if j == 0 else None)
        right = v > 0.7 * top * 1.05            # near the right edge: the label on the left
        ax.text(v, ymax * (0.98 - 0.07 * (j % 3)), f"{lab} " if right else f" {lab}",
                color=GROUP_COLOURS[1], fontsize=6.5, va="top", rotation=0,
                ha="right" if right else "left",
                bbox=dict(facecolor="white", edgecolor="none", alpha=0.8, pad=0.5))
    ax.set_xlabel(xlabel)
    ax.set_ylabel("rearrangements (count)")
    ax.set_title(title)
    ax.legend(frameon=False, loc="center right")
    return save(fig, base)
