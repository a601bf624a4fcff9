"""Figures of a volume: maximum-intensity projections and slices through a peak,
over an optional anatomical underlay.

Conventions:

* world axes are taken as RAS (x to the right, y to the front, z up), as
  template grids are; each panel's axis labels say which way is left/right,
  posterior/anterior or inferior/superior (letters in the labels, never on the
  data);
* the statistic is drawn in full colour where it passes the cluster-forming
  threshold and fades out below it (transparent at 0, so the underlay shows
  through and the pattern stays visible); without a threshold (TFCE, max-stat,
  FDR, none) it fades out toward 0 over the lower half of its colour range;
* the underlay (:class:`~groupsrc.sources.underlay.Underlay`: an anatomical image
  resampled onto a display grid aligned with the world axes) is drawn in
  grey below the map, with an outline of the head or brain it shows; without
  one, the source mask is a pale silhouette;
* cluster outlines follow voxel edges (black), the source mask's outline is
  grey.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..sources.underlay import Underlay
from .figures import (OUTLINE_CLUSTER, OUTLINE_MASK, SIGNED, _stat_range, new_figure, save,
                      stat_cmap, stat_colorbar)

#: alpha of the statistic just below the forming threshold (falling to 0 at 0), and
#: at half the colour range and beyond without a threshold
FADED_ALPHA, PLAIN_ALPHA = 0.6, 0.9
#: (name, projected axis, horizontal axis, vertical axis) of the three views
VIEWS = [("sagittal", 0, 1, 2), ("coronal", 1, 0, 2), ("axial", 2, 0, 1)]
#: axis label per world axis: the low and high ends' letters
ENDS = {0: ("L", "R"), 1: ("P", "A"), 2: ("I", "S")}


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
            lo, hi = ENDS[i]
            names.append(f"{lo} <- {'xyz'[i]} (mm) -> {hi}")
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
    return np.take_along_axis(vol, np.expand_dims(idx, axis), axis).squeeze(axis)


def _extent(ch, cv):
    dh = (ch[1] - ch[0]) / 2 if ch.size > 1 else 0.5
    dv = (cv[1] - cv[0]) / 2 if cv.size > 1 else 0.5
    return [ch[0] - dh, ch[-1] + dh, cv[0] - dv, cv[-1] + dv]


def _draw_stat(ax, img2d, extent, kind, vlim, threshold):
    """The statistic, full colour beyond the threshold and faded below it."""
    cmap = stat_cmap(kind)
    img = np.asarray(img2d, float)
    size = np.abs(np.nan_to_num(img))
    if threshold is not None and np.isfinite(threshold) and threshold > 0:
        strong = size >= threshold
        alpha = np.where(strong, 1.0, FADED_ALPHA * size / threshold)
    else:
        alpha = PLAIN_ALPHA * np.clip(size / max(abs(vlim[0]), abs(vlim[1]), 1e-12) * 2, 0, 1)
    alpha = np.where(np.isfinite(img), alpha, 0.0)
    return ax.imshow(img.T, origin="lower", cmap=cmap, vmin=vlim[0], vmax=vlim[1],
                     extent=extent, interpolation="nearest", alpha=alpha.T, zorder=2)


def _draw_underlay_2d(ax, img2d, extent):
    """A grey anatomical image with the outline of what it shows."""
    v = np.asarray(img2d, float)
    pos = v[v > 0]
    top = float(np.percentile(pos, 99)) if pos.size else 1.0
    ax.imshow(np.ma.masked_less_equal(v, 0).T, origin="lower", cmap="gray", vmin=0,
              vmax=1.25 * top or 1.0, extent=extent, interpolation="bilinear", zorder=1)
    if pos.size:
        xs = np.linspace(extent[0], extent[1], v.shape[0])
        ys = np.linspace(extent[2], extent[3], v.shape[1])
        ax.contour(xs, ys, v.T, levels=[0.15 * top], colors="#555555", linewidths=0.6,
                   zorder=1.5)


def _silhouette(ax, mask2d, extent):
    ax.imshow(np.where(mask2d, 1.0, np.nan).T, origin="lower", cmap="Greys", vmin=0,
              vmax=6, extent=extent, interpolation="nearest", zorder=1)


def _underlay_projection(underlay, axis_p, h, v):
    """Mean projection of the underlay along ``axis_p`` (a soft silhouette), its extent."""
    proj = underlay.values.mean(axis=axis_p)
    return proj, _extent(underlay.axis_coords(h), underlay.axis_coords(v))


def _underlay_slice(underlay, axis_p, position_mm, h, v):
    c = underlay.axis_coords(axis_p)
    i = int(np.abs(c - position_mm).argmin())
    sl = np.take(underlay.values, i, axis=axis_p)
    return sl, _extent(underlay.axis_coords(h), underlay.axis_coords(v))


def _prepare(stat3d, mask3d, cluster3d, affine):
    stat = np.where(mask3d, np.asarray(stat3d, float), np.nan)
    coords, flips, names, diag = _world_axes(affine, stat.shape)
    for i, f in enumerate(flips):
        if f:
            stat, mask3d, cluster3d = (np.flip(a, i) for a in (stat, mask3d, cluster3d))
    return stat, mask3d, cluster3d, coords, names, diag


def projection_figure(stat3d, mask3d, cluster3d, affine, kind, title, base: Path, vlim=None,
                      threshold=None, underlay: Underlay | None = None) -> list:
    """Three orthogonal maximum-intensity projections of a 3D statistic map.

    ``cluster3d`` (bool) marks the points in clusters shown with black outlines;
    the grey outline is the projected source mask.
    """
    stat, mask3d, cluster3d, coords, names, diag = _prepare(stat3d, mask3d, cluster3d, affine)
    underlay = underlay if diag else None
    vmin, vmax = vlim if vlim is not None else _stat_range(stat, kind)
    widths = [np.ptp(coords[h]) + 1 for _, _, h, _ in VIEWS]
    fig = new_figure(72)
    gs = fig.add_gridspec(1, 4, width_ratios=widths + [0.05 * sum(widths)])
    im = None
    for j, (vname, ax_p, h, v) in enumerate(VIEWS):
        ax = fig.add_subplot(gs[0, j])
        proj = signed_projection(stat, ax_p) if kind in SIGNED else np.nanmax(
            np.where(np.isfinite(stat), stat, -np.inf), axis=ax_p)
        proj = np.where(np.isfinite(proj), proj, np.nan)
        pmask = mask3d.any(axis=ax_p)
        pclus = cluster3d.any(axis=ax_p)
        proj = np.where(pmask, proj, np.nan)
        ch, cv = coords[h], coords[v]
        ext = _extent(ch, cv)
        if underlay is not None:
            u, uext = _underlay_projection(underlay, ax_p, h, v)
            _draw_underlay_2d(ax, u, uext)
        else:
            _silhouette(ax, pmask, ext)
        im = _draw_stat(ax, proj, ext, kind, (vmin, vmax), threshold)
        if pmask.any() and not pmask.all():
            _outline(ax, pmask, ch, cv, OUTLINE_MASK, 0.8)
        if pclus.any():
            _outline(ax, pclus, ch, cv, OUTLINE_CLUSTER, 1.0)
        ax.margins(0)
        ax.set_aspect("equal", adjustable="datalim")
        ax.set_xlabel(names[h])
        ax.set_ylabel(names[v])
        ax.set_title(vname)
        ax.spines[["top", "right"]].set_visible(True)
    cax = fig.add_subplot(gs[0, 3])
    stat_colorbar(fig, im, kind, threshold, cax=cax,
                  label=(f"{kind} (largest |value| along the projection)" if kind in SIGNED
                         else "F (largest value along the projection)"))
    fig.suptitle(title, fontsize=8.5)
    return save(fig, base)


def slice_figure(stat3d, mask3d, cluster3d, affine, peak_mm, kind, title, base: Path,
                 vlim=None, threshold=None, underlay: Underlay | None = None) -> list:
    """Sagittal, coronal and axial slices through ``peak_mm`` (x, y, z): the statistic
    over the underlay (or the mask's silhouette), the cluster outlined, the peak
    marked by a cross."""
    stat, mask3d, cluster3d, coords, names, diag = _prepare(stat3d, mask3d, cluster3d, affine)
    underlay = underlay if diag else None
    vmin, vmax = vlim if vlim is not None else _stat_range(stat, kind)
    peak = np.asarray(peak_mm, float)
    widths = [np.ptp(coords[h]) + 1 for _, _, h, _ in VIEWS]
    if underlay is not None:
        widths = [np.ptp(underlay.axis_coords(h)) + 1 for _, _, h, _ in VIEWS]
    fig = new_figure(72)
    gs = fig.add_gridspec(1, 4, width_ratios=widths + [0.05 * sum(widths)])
    im = None
    for j, (vname, ax_p, h, v) in enumerate(VIEWS):
        ax = fig.add_subplot(gs[0, j])
        i = int(np.abs(coords[ax_p] - peak[ax_p]).argmin()) if diag else 0
        sl = np.take(stat, i, axis=ax_p)
        m2 = np.take(mask3d, i, axis=ax_p)
        c2 = np.take(cluster3d, i, axis=ax_p)
        ch, cv = coords[h], coords[v]
        ext = _extent(ch, cv)
        if underlay is not None:
            u, uext = _underlay_slice(underlay, ax_p, peak[ax_p], h, v)
            _draw_underlay_2d(ax, u, uext)
        else:
            _silhouette(ax, m2, ext)
        ax.margins(0)
        im = _draw_stat(ax, np.where(m2, sl, np.nan), ext, kind, (vmin, vmax), threshold)
        if m2.any() and not m2.all():
            _outline(ax, m2, ch, cv, OUTLINE_MASK, 0.8)
        if c2.any():
            _outline(ax, c2, ch, cv, OUTLINE_CLUSTER, 1.0)
        if diag:
            ax.plot([peak[h]], [peak[v]], marker="+", color="#000000", ms=7, mew=1.2,
                    zorder=4)
        ax.set_aspect("equal", adjustable="datalim")
        ax.set_xlabel(names[h])
        ax.set_ylabel(names[v])
        ax.set_title(f"{vname}, {'xyz'[ax_p]} = {coords[ax_p][i]:g} mm" if diag else vname)
        ax.spines[["top", "right"]].set_visible(True)
    cax = fig.add_subplot(gs[0, 3])
    stat_colorbar(fig, im, kind, threshold, cax=cax, label=kind)
    fig.suptitle(title, fontsize=8.5)
    return save(fig, base)
