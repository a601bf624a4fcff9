"""The report's tables as plain values for the template: the "Results at a glance"
table, each contrast's cluster table (significant rows first, the rest on
demand) and the generic table view, each with its column meanings shown.

Rules the tables follow (for a reader of a paper):

* p-values are cluster-level (family-wise within the contrast); a cluster's
  time span and peak are descriptions, never paired with a p as if they were
  estimates of onset or location;
* intervals at a non-significant cluster's peak would be read as evidence of
  an effect where the test found none, and any peak interval is of a point the
  data selected: the glance table shows significant clusters only, and the
  full table leaves the intervals of non-significant clusters out (they stay in
  clusters.tsv, whose column meanings say they are uncorrected and selected).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

#: what the glance table's columns mean; ``{unit}`` and ``{effect}`` are filled in
GLANCE_COLUMNS = {
    "contrast": "contrast name (its section below has every cluster)",
    "cluster": "cluster number, as in the contrast's clusters.tsv and maps",
    "sign": "positive or negative statistic (F: any difference)",
    "time span (ms)": "first to last sample of the cluster: a description of where the data "
                      "passed the threshold, not an estimate of the effect's onset or offset",
    "peak time (ms)": "sample of the largest |statistic| in the cluster",
    "peak place": "peak position in template mm (x, y, z), with its atlas region or "
                  "hemisphere and vertex where known",
    "sources": "number of distinct sources in the cluster",
    "cluster-level p": "family-wise corrected p of the whole cluster, within this contrast",
    "peak estimate [95% CI]": "contrast estimate at the peak ({unit}) with its 95% t-interval; "
                              "selected for being large, so it overstates the effect",
    "standardized effect [95% CI]": "standardized effect at the peak (the contrast's kind, "
                                    "in brackets after the value) with its 95% interval; "
                                    "also selected",
}


def _num(v, digits=3):
    try:
        v = float(v)
    except (TypeError, ValueError):
        return str(v)
    return "n/a" if not np.isfinite(v) else f"{v:.{digits}g}"


def _with_ci(v, lo, hi):
    if not np.isfinite(float(v)):
        return "n/a"
    if np.isfinite(float(lo)) and np.isfinite(float(hi)):
        return f"{_num(v)} [{_num(lo)}, {_num(hi)}]"
    return _num(v)


def significant_rows(clusters: pd.DataFrame, alpha: float) -> pd.DataFrame:
    if clusters is None or not len(clusters):
        return clusters
    p = pd.to_numeric(clusters["p_corrected"], errors="coerce")
    return clusters[p <= alpha]


def peak_place(r) -> str:
    text = f"({_num(r['peak_x_mm'])}, {_num(r['peak_y_mm'])}, {_num(r['peak_z_mm'])}) mm"
    where = []
    if "atlas_label_at_peak" in r and str(r["atlas_label_at_peak"]) not in ("", "nan", "none"):
        where.append(str(r["atlas_label_at_peak"]))
    if "peak_hemisphere" in r and str(r["peak_hemisphere"]) not in ("", "nan", "n/a"):
        where.append(f"{r['peak_hemisphere']} vertex {r['peak_vertex']}")
    if "peak_structure" in r and str(r["peak_structure"]) not in ("", "nan", "n/a"):
        where.append(str(r["peak_structure"]))
    return text + (", " + ", ".join(where) if where else "")


def sign_word(r, kind) -> str:
    if kind == "F":
        return "any (F)"
    return "positive" if r["sign"] > 0 else "negative"


def glance(contrasts: list, tables: dict, effect_names: dict, unit: str) -> dict:
    """Rows of the "Results at a glance" table: every significant cluster of every
    contrast, and one row per contrast without one."""
    rows = []
    for c in contrasts:
        t = tables.get(c["name"])
        kind = c["kind"]
        sig = significant_rows(t, c["alpha"]) if c.get("has_p_corrected", True) else None
        head = {"contrast": c["name"], "statistic": c.get("statistic_label", kind)}
        if sig is None:
            rows.append({**head, "none": f"no correction: {c.get('n_clusters', 0)} clusters, "
                                        "none tested for the family-wise error"})
            continue
        if not len(sig):
            p = pd.to_numeric(t["p_corrected"], errors="coerce") if t is not None and len(t) \
                else pd.Series([], dtype=float)
            best = f" (smallest cluster-level p = {_num(p.min())})" if p.notna().any() else ""
            rows.append({**head, "none": f"no cluster with cluster-level p <= {c['alpha']}"
                                         f"{best}"})
            continue
        for _, r in sig.iterrows():
            rows.append({**head, "none": None, "cells": [
                c["name"], str(int(r["cluster"])), sign_word(r, kind),
                f"{_num(r['t_start_ms'], 4)} to {_num(r['t_end_ms'], 4)}",
                _num(r["t_peak_ms"], 4), peak_place(r), str(int(r["n_sources"])),
                _num(r["p_corrected"]),
                _with_ci(r["estimate_at_peak"], r["estimate_ci_low"], r["estimate_ci_high"]),
                _with_ci(r["std_effect_at_peak"], r["std_effect_ci_low"],
                         r["std_effect_ci_high"]) + f" ({effect_names.get(c['name'], '')})"]})
    legend = [(k, v.format(unit=unit)) for k, v in GLANCE_COLUMNS.items()]
    columns = [{**header(k), "unit": unit if k in UNIT_COLUMNS else ""} for k in GLANCE_COLUMNS]
    return {"columns": columns, "rows": rows, "legend": legend,
            "width": len(GLANCE_COLUMNS)}


#: the report's compact cluster table: column -> meaning (clusters.tsv has every column)
COMPACT_COLUMNS = {
    "cluster": "cluster number, as in clusters.tsv and the cluster maps (1 = smallest "
               "corrected p, then largest mass)",
    "sign": "positive or negative statistic (F: any difference)",
    "cluster-level p": "family-wise corrected p of the whole cluster, within this contrast",
    "significant": "yes when the cluster-level p is at or below alpha",
    "mass": "sum of the statistic over the cluster's source x time points",
    "sources": "number of distinct sources in the cluster",
    "time span (ms)": "first to last sample of the cluster (a description, not an onset or "
                      "offset estimate)",
    "peak time (ms)": "sample of the largest |statistic| in the cluster",
    "peak place": "peak position in template mm (x, y, z), with its atlas region or "
                  "hemisphere and vertex where known",
    "peak statistic": "statistic at the peak, with its (denominator) df",
    "peak estimate [95% CI]": "contrast estimate at the peak ({unit}) with its 95% t-interval",
    "standardized effect [95% CI]": "standardized effect at the peak with its 95% interval",
}


def compact_clusters(frame: pd.DataFrame, kind: str, alpha: float, unit: str,
                     corrected=True) -> tuple:
    """(DataFrame of text cells, docs) of the report's cluster table; the intervals of
    clusters that are not significant are left out ("-")."""
    rows = []
    for _, r in frame.iterrows():
        p = float(r["p_corrected"]) if np.isfinite(float(r["p_corrected"])) else np.nan
        sig = bool(np.isfinite(p) and p <= alpha)
        keep = sig or not corrected
        rows.append({
            "cluster": str(int(r["cluster"])), "sign": sign_word(r, kind),
            "cluster-level p": _num(p), "significant": ("yes" if sig else "no") if np.isfinite(p) else "n/a",
            "mass": _num(r["mass"], 4), "sources": str(int(r["n_sources"])),
            "time span (ms)": f"{_num(r['t_start_ms'], 4)} to {_num(r['t_end_ms'], 4)}",
            "peak time (ms)": _num(r["t_peak_ms"], 4), "peak place": peak_place(r),
            "peak statistic": f"{r.get('stat_type', kind)} = {_num(r['peak_stat'])} "
                              f"(df {_num(r['peak_df'])})",
            "peak estimate [95% CI]": (_with_ci(r["estimate_at_peak"], r["estimate_ci_low"],
                                                r["estimate_ci_high"]) if keep
                                       else _num(r["estimate_at_peak"]) + " -"),
            "standardized effect [95% CI]": (_with_ci(r["std_effect_at_peak"],
                                                      r["std_effect_ci_low"],
                                                      r["std_effect_ci_high"]) if keep
                                             else _num(r["std_effect_at_peak"]) + " -"),
        })
    docs = {k: v.format(unit=unit) for k, v in COMPACT_COLUMNS.items()}
    return pd.DataFrame(rows, columns=list(COMPACT_COLUMNS)), docs


def header(name: str) -> dict:
    """A column header that may wrap after its underscores."""
    parts = name.split("_")
    return {"name": name, "parts": parts, "unit": ""}


def _cell(v) -> str:
    if isinstance(v, (float, np.floating)):
        return "n/a" if not np.isfinite(v) else f"{v:.4g}"
    return str(v)


#: columns in the maps' unit (their headers show it)
UNIT_COLUMNS = ("estimate_at_peak", "estimate_ci_low", "estimate_ci_high", "estimate", "value",
                "peak estimate [95% CI]")


def table_view(frame: pd.DataFrame | None, columns=None, docs=None, highlight=None,
               max_rows=50, unit=None, text_only=False, hidden=False) -> dict:
    """A table for the template: headers (wrapping), legend (column meanings shown, not
    only as hover text), rows (first ``max_rows``).  ``text_only``: every column is
    text (left-aligned); ``hidden``: some interval cells were left out (a note says
    why)."""
    if frame is None or len(frame) == 0:
        return {"columns": [], "rows": [], "more": 0, "legend": [], "hidden": False}
    cols = [c for c in (columns or frame.columns) if c in frame.columns]
    text = {c: text_only or not pd.api.types.is_numeric_dtype(frame[c]) for c in cols}
    rows = []
    for _, r in frame.head(max_rows).iterrows():
        cells = [{"text": _cell(r[c]), "left": text[c]} for c in cols]
        rows.append({"sig": bool(highlight(r)) if highlight is not None else False,
                     "cells": cells, "cluster": _cell(r["cluster"]) if "cluster" in r else ""})
    docs = docs or {}
    legend = [(c, _unit_doc(docs.get(c, ""), unit)) for c in cols if docs.get(c)]
    return {"columns": [{**header(c), "doc": docs.get(c, ""), "left": text[c],
                         "unit": unit if unit and c in UNIT_COLUMNS else ""} for c in cols],
            "rows": rows, "more": max(0, len(frame) - max_rows), "legend": legend,
            "hidden": hidden}


def _unit_doc(doc: str, unit) -> str:
    if unit:
        return doc.replace("the [cohort] unit, else input units", unit).replace(
            "input units", unit)
    return doc
