"""The mixed model's part of a results folder (``model/``) and of the report.

``model/`` (written when ``[model] mixed = true``), through the source
space's result-map format (``formats.RESULT_MAPS``), one value per source and
sample:

* ``sd_residual``         residual SD (input units)
* ``sd_<effect>``         SD of each random effect: ``sd_intercept`` and, per random
                          slope column, ``sd_<column>`` (input units per unit of it)
* ``corr_<a>__<b>``       correlation of two random effects (random slopes only)
* ``icc``                 share of a map's variance between participants at the
                          average map (below 0 where the participant variance is
                          estimated below zero: a negative within-participant correlation)
* ``fit_code``            0 converged, 1 boundary (the participant covariance estimate
                          not positive definite: a variance at or below zero), 2 not
                          converged, 3 no residual variance
* ``summary.json``        the model, the counts of every fit code, medians
* ``design.tsv``          the fixed-effects design, one row per map

The report shows the counts, the medians and one figure (below).
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from ..stats.models.mixed.fit import CODES as CODE_TEXT
from .figures import amplitude_label, legend_below, new_figure, save
from .files import write_json, write_tsv
from .layout import FIGURES, MODEL_DIR, MODEL_SUMMARY, read_json



def _stem(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9]+", "_", name).strip("_").lower() or "term"


def model_maps(model: dict) -> list:
    """(stem, values, description, signed) of every map ``model/`` holds."""
    out = [("sd_residual", model["sd_residual"], "residual SD", False)]
    for name, v in model["sd"].items():
        out.append((f"sd_{_stem(name)}", v, f"SD of the random {name}", False))
    for (a, b), v in model["corr"].items():
        out.append((f"corr_{_stem(a)}__{_stem(b)}", v, f"correlation {a} / {b}", True))
    out.append(("icc", model["icc"], "intraclass corr", True))   # below 0 where Psi is
    out.append(("fit_code", model["code"].astype(np.float32), "fit code", False))
    return out


def write_model(analysis, maps, folder: Path) -> None:
    """Write ``model/``: the maps, ``summary.json`` and ``design.tsv``."""
    model = analysis.model
    folder.mkdir(parents=True, exist_ok=True)
    files = {}
    for stem, values, what, signed in model_maps(model):
        maps.estimate(folder, stem, np.asarray(values, np.float32), "mixed model", what,
                      signed=signed, bounded=stem == "icc")
        files[stem] = what
    settings = analysis.settings.get("model", {})
    design = model["design"].copy()
    ids = [str(p) for p in design.index]
    design.insert(0, "participant_id", ids)
    mtable = model["maps"]
    for col in [c for c in (settings.get("within"), "session") if c and c in mtable.columns][::-1]:
        design.insert(1, col, mtable[col].astype(str).to_numpy())
    design.index = range(len(design))
    write_tsv(folder / "design.tsv", design)
    codes = model["code"]
    write_json(folder / MODEL_SUMMARY, {
        "method": model["method"], "columns": model["columns"], "random": model["random"],
        "n_maps": model["n_maps"], "n_participants": model["n_participants"],
        "n_layouts": model["n_layouts"], "map_covariates": settings.get("map_covariates", []),
        "random_slopes": model.get("random_slopes", settings.get("random_slopes", [])),
        "counts": {CODE_TEXT[k]: int(np.sum(codes == k)) for k in CODE_TEXT},
        "n_features": int(codes.size),
        "median": {stem: float(np.median(np.asarray(v, float)[codes != 3]))
                   if np.any(codes != 3) else None
                   for stem, v, _, _ in model_maps(model) if stem != "fit_code"},
        "files": files})


def df_text(cs: dict) -> str:
    """The df of a contrast for the report ('Satterthwaite ...' for the mixed model)."""
    d = cs.get("df_per_feature")
    if cs.get("model") != "mixed" or not d:
        return ", ".join(str(x) for x in cs["df"])
    head = f"{cs['df'][0]}, " if cs["kind"] == "F" else ""
    return (f"{head}Satterthwaite per source and sample: median {d['median']:.3g} "
            f"(range {d['min']:.3g} to {d['max']:.3g})")


def model_section(results: Path, summary: dict, times) -> dict | None:
    """The report's mixed-model section: a table of fit codes, medians and a figure."""
    path = Path(results) / MODEL_DIR / MODEL_SUMMARY
    if not summary.get("mixed_model") or not path.is_file():
        return None
    ms = read_json(path)
    return {"method": ms["method"], "columns": ", ".join(ms["columns"]),
            "random": ", ".join(ms["random"]), "n_maps": ms["n_maps"],
            "n_participants": ms["n_participants"], "n_layouts": ms["n_layouts"],
            "counts": [(k, v, f"{100.0 * v / max(1, ms['n_features']):.2f}%")
                       for k, v in ms["counts"].items()],
            "medians": [(k, "n/a" if v is None else f"{v:.4g}")
                        for k, v in ms["median"].items()]}


def model_figure(results: Path, maps, times, base: Path, unit=None) -> list:
    """Median and 10-90% range over sources, at every sample, of the ICC and of the
    residual SD, and the share of boundary fits (model/ maps, read back); one legend
    below the panels."""
    from .layout import read_values
    folder = Path(results) / MODEL_DIR
    icc = read_values(maps, folder, "icc")
    sd = read_values(maps, folder, "sd_residual")
    code = read_values(maps, folder, "fit_code")
    fig = new_figure(66)
    panels = [(icc, "intraclass correlation"),
              (sd, f"residual SD ({amplitude_label(unit)})")]
    for j, (v, label) in enumerate(panels):
        ax = fig.add_subplot(1, 3, j + 1)
        lo, med, hi = np.nanpercentile(np.where(code == 3, np.nan, v), [10, 50, 90], axis=0)
        ax.fill_between(times, lo, hi, color="#0072B2", alpha=0.25, lw=0)
        ax.plot(times, med, color="#0072B2", lw=1.3)
        ax.set_xlabel("time (ms)")
        ax.set_ylabel(label)
        if j == 0:
            ax.set_ylim(min(0.0, float(np.nanmin(lo))) if np.isfinite(lo).any() else 0.0, 1)
    ax = fig.add_subplot(1, 3, 3)
    ax.plot(times, 100 * (code == 1).mean(axis=0), color="#D55E00", lw=1.3)
    ax.plot(times, 100 * (code >= 2).mean(axis=0), color="#000000", ls="--", lw=1.0)
    ax.set_xlabel("time (ms)")
    ax.set_ylabel("sources (%)")
    handles = [Patch(color="#0072B2", alpha=0.25), Line2D([], [], color="#0072B2", lw=1.3),
               Line2D([], [], color="#D55E00", lw=1.3),
               Line2D([], [], color="#000000", ls="--", lw=1.0)]
    legend_below(fig, handles, ["10-90% of sources", "median over sources",
                                "boundary fits", "not converged / no variance"],
                 ncol=2)
    fig.suptitle("Mixed model fit at every source and sample", fontsize=8.5)
    return save(fig, base)


def model_figures(results: Path, maps, summary, times) -> list:
    """[(caption, png)] of the mixed-model section (drawn into model/figures)."""
    if not summary.get("mixed_model") or not (Path(results) / MODEL_DIR / MODEL_SUMMARY).is_file():
        return []
    figdir = Path(results) / MODEL_DIR / FIGURES
    figdir.mkdir(exist_ok=True)
    base = figdir / "fit_over_time"
    model_figure(results, maps, times, base,
                 unit=(summary.get("settings", {}).get("cohort") or {}).get("unit"))
    return [("Mixed model at every source: median (line) and 10-90% range (band) over sources "
             "of the intraclass correlation and of the residual SD at each sample, and the "
             "share of boundary fits (a participant variance estimated at or below zero, or with "
             "random slopes a variance of zero or a correlation of +-1) or not converged.",
             base.with_suffix(".png"))]
