"""What every figure shares (matplotlib, no pyplot state): style, colour maps, the
colour bar with the cluster-forming threshold marked, legends outside the data,
PNG at 150 dpi and SVG.

The figures themselves are in :mod:`.volume_figures` (projections and slices of
a volume, with an optional anatomical underlay), :mod:`.cluster_figures` (one
cluster over sources and time, time courses, covariate scatter, the null
distribution), :mod:`.surface_figures` and :mod:`.design_figure`; each takes
plain arrays and tables, so the report can be rebuilt from a saved folder.

Colour maps (one for volumes and surfaces):

* signed statistics (t, z): ColorBrewer's RdBu reversed -- red positive, blue
  negative, near white at zero; a diverging scheme ColorBrewer marks as
  colour-blind safe (common practice), light at zero so an anatomical underlay
  or the shading of a surface stays readable where the statistic is small;
* unsigned statistics (F): its white-to-red half;
* groups: the Okabe-Ito qualitative palette (common practice for colour-blind
  safe categorical colours), with different line styles too.

Text never overlaps other text or leaves the canvas, and legends sit outside
the data (``tests/test_figure_layout.py`` checks every figure kind).
"""

from __future__ import annotations

from pathlib import Path

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import LinearSegmentedColormap
from matplotlib.figure import Figure

from .files import save_figure

MM = 1 / 25.4
WIDTH_IN = 180 * MM          # two-column journal width
DPI = 150
GROUP_COLOURS = ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000"]
LINESTYLES = ["-", "--", "-.", ":"]
MARKERS = ["o", "s", "^", "D", "v", "P", "X"]
OUTLINE_MASK = "#8a8a8a"
OUTLINE_CLUSTER = "#000000"
THRESHOLD_COLOUR = "#000000"

STYLE = {"font.size": 7.5, "axes.titlesize": 8.5, "axes.labelsize": 7.5,
         "xtick.labelsize": 7, "ytick.labelsize": 7, "legend.fontsize": 7,
         "svg.fonttype": "none", "axes.spines.top": False, "axes.spines.right": False,
         # fixed salt for the SVG element ids, so equal figures give equal files
         "svg.hashsalt": "groupsrc"}

#: statistic kinds drawn as signed maps ("z": the mixed model's z of equal p)
SIGNED = ("t", "z")


def diverging_cmap():
    """Light-centred diverging map for signed statistics (see the module doc)."""
    return matplotlib.colormaps["RdBu_r"].with_extremes(bad=(1, 1, 1, 0))


def sequential_cmap():
    """The white-to-red half of the diverging map, for F."""
    base = matplotlib.colormaps["RdBu_r"]
    cm = LinearSegmentedColormap.from_list("groupsrc_f", base(np.linspace(0.5, 1.0, 128)))
    return cm.with_extremes(bad=(1, 1, 1, 0))


def stat_cmap(kind):
    return diverging_cmap() if kind in SIGNED else sequential_cmap()


def new_figure(height_mm, width_in=WIDTH_IN, layout="constrained"):
    """A figure with a canvas that can measure text; ``layout="compressed"`` for grids
    of fixed-aspect panels (images in mm)."""
    matplotlib.rcParams.update(STYLE)
    fig = Figure(figsize=(width_in, height_mm * MM), layout=layout)
    FigureCanvasAgg(fig)                 # a canvas that can measure text
    return fig


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


def amplitude_label(unit: str | None) -> str:
    """The unit of an amplitude axis: the [cohort] unit, else 'input units'."""
    return unit or "input units"


def stat_colorbar(fig, mappable, kind, threshold=None, label=None, **kwargs):
    """A colour bar of the statistic with the cluster-forming threshold marked (black
    lines at +-threshold, or +threshold for F), said in its label."""
    cb = fig.colorbar(mappable, **kwargs)
    text = label or _stat_label(kind)
    if threshold is not None and np.isfinite(threshold):
        lo, hi = mappable.norm.vmin, mappable.norm.vmax
        levels = [threshold, -threshold] if kind in SIGNED else [threshold]
        for v in levels:
            if lo <= v <= hi:
                cb.ax.axhline(v, color=THRESHOLD_COLOUR, lw=1.2)
        text += f"\nlines: forming threshold {'±' if kind in SIGNED else ''}{threshold:.3g}"
    cb.set_label(text)
    return cb


def legend_below(fig, handles, labels, ncol=None):
    """One legend for the figure, below the axes (never on the data)."""
    if not handles:
        return None
    ncol = ncol or min(len(handles), 3)
    r = fig.canvas.get_renderer()
    while True:                          # fewer columns until the legend fits the width
        leg = fig.legend(handles, labels, loc="outside lower center", ncol=ncol,
                         frameon=False)
        if ncol == 1 or leg.get_window_extent(r).width <= 0.96 * fig.bbox.width:
            return leg
        leg.remove()
        ncol -= 1
