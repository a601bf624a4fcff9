"""The design figure: the between-participant design and a contrast's weights.

Our own display: one panel per coefficient with the participants as rows --
indicator columns as coloured blocks, a constant column as one pale band,
covariates as dots on their own scale -- and the weights as a labelled table,
with a sentence for any weight a reader would not expect (a covariate's mean
carried by a contrast read at the covariates' mean).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

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


def design_figure(design, weights, title, base: Path, row_label="participant") -> list:
    """The between-participant design and the contrast, drawn column by column.

    Each coefficient gets its own panel with the participants as rows (ordered
    by the indicator columns so that groups form blocks): an indicator column
    as coloured blocks where it is 1, a constant column as one pale band, a
    covariate as dots on its own scale (dashed: its mean).  The contrast
    weights are a labelled table below, with notes on weights that are not
    0 or +/-1.  ``row_label`` names what a row is (the mixed model draws each
    distinct map row once).
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
    row_mm = 1.9 if n <= 60 else 120 / n
    height = min(180, 38 + row_mm * n + 7 * W.shape[0] + 5 * len(notes))
    fig = new_figure(height, width_in=max(100, min(180, 22 * p + 40)) * MM)
    widths = [2.2 if k == "covariate" else 1.0 for k in kinds]
    gs = fig.add_gridspec(2, p, height_ratios=[max(n * row_mm, 25), 7 * W.shape[0] + 6],
                          width_ratios=widths)
    rows = np.arange(n)
    colour = iter(GROUP_COLOURS)
    for j in range(p):
        ax = fig.add_subplot(gs[0, j])
        col = Xo[:, j]
        if kinds[j] == "constant":
            ax.barh(rows, 1.0, height=1.0, color="#e6e6e6", lw=0)
            ax.text(0.5, n / 2, f"{col[0]:g} for everyone", rotation=90, ha="center",
                    va="center", fontsize=6.5, color="#555555")
            ax.set_xlim(0, 1)
            ax.set_xticks([])
        elif kinds[j] == "indicator":
            c = next(colour, "#555555")
            ax.barh(rows[col == 1], 1.0, height=1.0, color=c, lw=0)
            ax.set_xlim(0, 1)
            ax.set_xticks([])
            ax.set_xlabel(f"{int(col.sum())} of {n}", fontsize=6.5)
        else:
            ax.axvline(col.mean(), color="#777777", ls="--", lw=0.8)
            ax.plot(col, rows, "o", ms=2.2, color="black")
            ax.set_xlabel(f"value (mean {col.mean():.4g})", fontsize=6.5)
        ax.set_ylim(n - 0.5, -0.5)
        long = len(names[j]) > 12
        ax.set_title(names[j], fontsize=7, rotation=25 if long else 0,
                     ha="left" if long else "center", x=0.0 if long else 0.5)
        ax.spines[["top", "right"]].set_visible(False)
        if j == 0:
            step = max(1, int(np.ceil(n / 30)))
            ax.set_yticks(rows[::step], [ids[i] for i in order[::step]], fontsize=5.5)
            ax.set_ylabel(row_label + (" (grouped by the indicator columns)" if ind else ""))
        else:
            ax.set_yticks([])
    tab = fig.add_subplot(gs[1, :])
    tab.axis("off")
    labels = ["weights"] if W.shape[0] == 1 else [f"weights, row {i + 1}" for i in range(len(W))]
    cells = [[f"{v:.4g}" if v != 0 else "0" for v in w] for w in W]
    split = any(":" in name for name in names)      # interactions: one factor per line
    t = tab.table(cellText=cells, rowLabels=labels, loc="upper center", cellLoc="center",
                  colLabels=[name.replace(":", ":\n") for name in names])
    t.auto_set_font_size(False)
    t.set_fontsize(6.5)
    for (r, c), cell in t.get_celld().items():
        cell.set_edgecolor("#bbbbbb")
        if r == 0 and split:
            cell.set_height(2 * cell.get_height())
        if r > 0 and c >= 0 and W[r - 1, c] != 0:
            cell.set_text_props(weight="bold")
    if notes:
        tab.text(0.0, 0.0, "\n".join(notes), transform=tab.transAxes, fontsize=6.3,
                 va="top", ha="left", wrap=True, color="#333333")
    fig.suptitle(title, fontsize=8.5)
    return save(fig, base)
