"""The design figure: the between-participant design and a contrast's weights.

Our own display: one panel per coefficient with the participants as rows --
indicator columns as coloured blocks, a constant column as one pale band,
covariates as dots on their own scale -- and the weights as a labelled table,
with a sentence for any weight a reader would not expect (a covariate's mean
carried by a contrast read at the covariates' mean).
"""

from __future__ import annotations

import textwrap
from pathlib import Path

import numpy as np
from matplotlib.ticker import MaxNLocator

from .figures import GROUP_COLOURS, MM, new_figure, save


def _column_kinds(X):
    """'constant', 'indicator' (values 0/1) or 'covariate' per design column."""
    kinds = []
    for col in X.T:
        if np.ptp(col) == 0:
            kinds.append("constant")
        elif set(np.unique(col)) <= {0.0, 1.0}:
            kinds.append("indicator")
        else:
            kinds.append("covariate")
    return kinds


def weight_notes(design, weights) -> list:
    """Sentences that explain weights a reader would not expect.

    A contrast read "at the covariates' mean" puts the covariate's mean as
    the weight on its coefficient: the prediction at age = 45.2 includes
    45.2 x the age slope.
    """
    X = np.asarray(design, float)
    names = [str(c) for c in design.columns]
    W = np.atleast_2d(np.asarray(weights, float))
    notes = []
    for j, kind in enumerate(_column_kinds(X)):
        if kind != "covariate":
            continue
        mean = float(X[:, j].mean())
        if any(abs(w - mean) <= 1e-9 * max(1.0, abs(mean)) for w in W[:, j] if w != 0):
            notes.append(f"The weight {mean:.4g} on '{names[j]}' is its sample mean: the effect "
                         f"is evaluated at the mean {names[j]}, so the prediction there includes "
                         f"{mean:.4g} x the {names[j]} coefficient.")
    return notes


def _within_panel(ax, within):
    """Step 1: how each participant's maps become one map (the within weights)."""
    ax.axis("off")
    ax.set_title("1. within each\nparticipant", fontsize=7, loc="left")
    if within:
        lines = [f"{k}: {v:+g}" for k, v in within.items()] + ["", "-> one map per", "participant"]
    else:
        lines = ["maps averaged", "over conditions", "", "-> one map per", "participant"]
    ax.text(0.0, 0.97, "\n".join(lines), transform=ax.transAxes, va="top", ha="left",
            fontsize=6.5, family="monospace")


def design_figure(design, weights, title, base: Path, row_label="participant",
                  within="absent") -> list:
    """The analysis's design and the contrast, drawn column by column.

    Each coefficient gets its own panel with the participants as rows (ordered
    by the indicator columns so that groups form blocks): an indicator column
    as coloured blocks where it is 1, a constant column as one pale band, a
    covariate as dots on its own scale (dashed: its mean).  Each panel's
    weight is written under it (bold when not 0), with notes below on weights
    that are not 0 or +/-1.  ``within``: the within-participant weights
    ({condition: weight}) or None (maps averaged over conditions), drawn as the
    first step; "absent" for a design without that step (the mixed model's map
    rows).  ``row_label`` names what a row is.
    """
    X = np.asarray(design, float)
    names = [str(c) for c in design.columns]
    ids = [str(i) for i in design.index]
    W = np.atleast_2d(np.asarray(weights, float))
    n, p = X.shape
    kinds = _column_kinds(X)
    ind = [j for j, k in enumerate(kinds) if k == "indicator"]
    order = np.lexsort([X[:, j] for j in reversed(ind)]) if ind else np.arange(n)
    Xo = X[order]
    notes = weight_notes(design, weights)
    step = within != "absent"
    row_mm = 1.9 if n <= 60 else 120 / n
    width_mm = max(110, min(180, 24 * p + 50 + (28 if step else 0)))
    wrapped = [textwrap.fill(t, int(width_mm / 1.45)) for t in notes]
    note_lines = sum(t.count("\n") + 1 for t in wrapped)
    height = min(200, 44 + row_mm * n + 6 * W.shape[0] + 3.2 * note_lines)
    fig = new_figure(height, width_in=width_mm * MM)
    widths = ([1.6] if step else []) + [2.2 if k == "covariate" else 1.0 for k in kinds]
    gs = fig.add_gridspec(2, len(widths), height_ratios=[max(n * row_mm, 25),
                                                         max(3.2 * note_lines, 1)],
                          width_ratios=widths)
    if step:
        _within_panel(fig.add_subplot(gs[0, 0]), within)
    off = 1 if step else 0
    rows = np.arange(n)
    colour = iter(GROUP_COLOURS)
    for j in range(p):
        ax = fig.add_subplot(gs[0, j + off])
        col = Xo[:, j]
        if kinds[j] == "constant":
            ax.barh(rows, 1.0, height=1.0, color="#e6e6e6", lw=0)
            ax.text(0.5, n / 2, f"{col[0]:g} for everyone", rotation=90, ha="center",
                    va="center", fontsize=6.5, color="#555555")
            ax.set_xlim(0, 1)
            ax.set_xticks([])
            info = ""
        elif kinds[j] == "indicator":
            c = next(colour, "#555555")
            ax.barh(rows[col == 1], 1.0, height=1.0, color=c, lw=0)
            ax.set_xlim(0, 1)
            ax.set_xticks([])
            info = f"{int(col.sum())} of {n}"
        else:
            ax.axvline(col.mean(), color="#777777", ls="--", lw=0.8)
            ax.plot(col, rows, "o", ms=2.2, color="black")
            ax.xaxis.set_major_locator(MaxNLocator(nbins=3))
            info = f"mean {col.mean():.4g}"
        wtxt = "\n".join(("weight " if W.shape[0] == 1 else f"w{i + 1} ") + _w(W[i, j])
                         for i in range(W.shape[0]))
        ax.set_xlabel((info + "\n" if info else "") + wtxt, fontsize=6.5,
                      fontweight="bold" if np.any(W[:, j] != 0) else "normal")
        ax.set_ylim(n - 0.5, -0.5)
        ax.set_title(textwrap.fill(names[j].replace(":", ": "), 14, break_long_words=False),
                     fontsize=6.8)
        ax.spines[["top", "right"]].set_visible(False)
        if j == 0:
            stepr = max(1, int(np.ceil(n / 30)))
            ax.set_yticks(rows[::stepr], [ids[i] for i in order[::stepr]], fontsize=5.5)
            ax.set_ylabel(row_label + (",\ngrouped by the indicator columns" if ind else ""))
        else:
            ax.set_yticks([])
    tab = fig.add_subplot(gs[1, :])
    tab.axis("off")
    if wrapped:
        tab.text(0.0, 1.0, "\n".join(wrapped), transform=tab.transAxes, fontsize=6.3,
                 va="top", ha="left", color="#333333")
    fig.suptitle(title + ("" if not step else
                          "\n(1) within each participant, then (2) between participants"),
                 fontsize=8.5)
    return save(fig, base)


def _w(v) -> str:
    return f"{v:.4g}" if v != 0 else "0"
