"""Tidy result tables (one observation per row), computed from a ContrastResult.

``COLUMNS`` documents every column of every table; the README copies it and
the tests check the written files against it, so the two cannot drift.

Effect-size intervals
---------------------
``std_effect`` is Hedges' g (Cohen's d with Hedges' small-sample factor) for
t contrasts and partial eta squared for F contrasts.  Its 95% interval at the
peak is found by inverting the noncentral t distribution of the peak t
(the noncentrality delta with P(T >= t) = 0.025 and P(T <= t) = 0.025, df of
the model), scaled to the standardized scale by sqrt(c' (X'X)^+ c), the
variance factor of the contrast.  For F contrasts the noncentral F is
inverted for lambda and converted with eta^2 = lambda / (lambda + df1 + df2
+ 1).  The interval is exact under normal errors for a point chosen in
advance; at a cluster's peak, which was selected for being large, the
estimate and both intervals are biased away from zero.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import optimize, stats

from ..sources import TimeAxis, VolumeGrid
from .places import mesh_place as _mesh_place
from .places import nullable_ints as _typed

#: column documentation: {table file: {column: "meaning (unit)"}}
COLUMNS = {
    "clusters.tsv": {
        "contrast": "contrast name",
        "cluster": "cluster number, as in clusters.nii.gz (1 = smallest corrected p, then largest mass)",
        "sign": "+1 positive, -1 negative statistic (always +1 for F)",
        "stat_type": "statistic: t or F; z for the mixed model (the z of equal p of its t or F)",
        "mass": "sum of the statistic over the cluster's source x time points (statistic units x points)",
        "n_points": "number of source x time points in the cluster",
        "n_sources": "number of distinct sources in the cluster",
        "n_samples": "number of distinct time samples in the cluster",
        "p_corrected": "cluster-level corrected p: family-wise within this contrast (n/a without correction)",
        "significant": "yes when p_corrected <= alpha (the run's [inference] alpha), else no; n/a without correction (then every cluster is uncorrected)",
        "t_start_ms": "first sample time of the cluster (ms)",
        "t_end_ms": "last sample time of the cluster (ms)",
        "t_peak_ms": "time of the largest |statistic| in the cluster (ms)",
        "peak_hemisphere": "hemisphere of the peak: left or right (surfaces only; n/a for a peak in a CIFTI-2 volume part)",
        "peak_vertex": "vertex index of the peak in its hemisphere's template mesh, from 0 (surfaces only; n/a in a volume part)",
        "peak_structure": "CIFTI-2 structure of a peak in a volume part, e.g. CIFTI_STRUCTURE_THALAMUS_LEFT; n/a on the cortex (CIFTI-2 maps with volume parts only)",
        "peak_i": "voxel index i of a peak in a volume part, in the CIFTI-2 volume, from 0; n/a on the cortex (volume parts only)",
        "peak_j": "voxel index j, likewise (volume parts only)",
        "peak_k": "voxel index k, likewise (volume parts only)",
        "peak_x_mm": "x world coordinate of the peak (mm, template space)",
        "peak_y_mm": "y world coordinate of the peak (mm)",
        "peak_z_mm": "z world coordinate of the peak (mm)",
        "peak_stat": "statistic at the peak (t or F; mixed model: z)",
        "peak_df": "(denominator) degrees of freedom at the peak: the GLM's residual df, or for the mixed model the Satterthwaite df of that source and sample",
        "estimate_at_peak": "contrast estimate at the peak (the [cohort] unit, else input units; n/a for F)",
        "estimate_ci_low": "lower end of the 95% interval of the estimate, estimate - t(0.975, df) se (input units; mixed model: the df at the peak)",
        "estimate_ci_high": "upper end of that interval (input units)",
        "std_effect_at_peak": "standardized effect at the peak (unitless): for t the estimate over the residual SD times Hedges' factor (d_z for a within contrast, g for a group difference, per unit of the covariate for a slope); partial eta squared for F; mixed model: the estimate over the SD of one map",
        "std_effect_ci_low": "lower end of its 95% interval by noncentral t (or F) inversion (unitless; mixed model: the estimate's interval over the same SD, the SD taken as known)",
        "std_effect_ci_high": "upper end of that interval (unitless)",
        "atlas_label_at_peak": "atlas region at the peak (only when an atlas is given, or CIFTI-2 maps have volume parts, whose voxels are named by their structure)",
    },
    "peaks.tsv": {
        "contrast": "contrast name",
        "cluster": "cluster number",
        "peak": "peak number within the cluster (1 = largest |statistic|)",
        "hemisphere": "hemisphere of the peak: left or right (surfaces only; n/a in a CIFTI-2 volume part)",
        "vertex": "vertex index of the peak in its hemisphere's template mesh, from 0 (surfaces only; n/a in a volume part)",
        "structure": "CIFTI-2 structure of a peak in a volume part; n/a on the cortex (CIFTI-2 maps with volume parts only)",
        "i": "voxel index i of a peak in a volume part, from 0; n/a on the cortex (volume parts only)",
        "j": "voxel index j, likewise (volume parts only)",
        "k": "voxel index k, likewise (volume parts only)",
        "x_mm": "x world coordinate (mm)",
        "y_mm": "y world coordinate (mm)",
        "z_mm": "z world coordinate (mm)",
        "time_ms": "sample time (ms)",
        "statistic": "statistic at the peak (t or F)",
        "estimate": "contrast estimate at the peak (input units; n/a for F)",
    },
    "cluster_timecourses.tsv": {
        "participant_id": "participant",
        "group": "participant's group (only when the participants table has a group column)",
        "measure": "what the value is: the contrast's per-participant measure, named as the contrast",
        "cluster": "cluster number",
        "time_ms": "sample time (ms), every sample of the analysed window",
        "value": "mean over the cluster's sources of the participant's measure at that time (input units)",
    },
    "condition_timecourses.tsv": {
        "participant_id": "participant",
        "group": "participant's group (only when the participants table has a group column)",
        "condition": "condition (a level of the within column the contrast weighs)",
        "cluster": "cluster number",
        "time_ms": "sample time (ms), every sample of the analysed window",
        "value": "mean over the cluster's sources of the participant's maps of that condition, sessions averaged (input units)",
    },
    "null_distribution.tsv": {
        "resample": "rearrangement number (0 = the observed data)",
        "max_stat": "largest score over the whole map in that rearrangement, on the scale used for the FWER",
        "max_pos": "largest positive score (cluster mass/extent, TFCE or statistic)",
        "max_neg": "most negative score (n/a when not defined)",
    },
    "cluster_atlas.tsv": {
        "contrast": "contrast name",
        "cluster": "cluster number",
        "label": "atlas label value",
        "name": "atlas region name",
        "n_sources": "cluster sources in that region",
        "share": "fraction of the cluster's sources in that region (0..1)",
    },
}

#: columns written only for a surface source space (they locate a source on its mesh,
#: or in a CIFTI-2 volume part)
SURFACE_COLUMNS = {"clusters.tsv": ("peak_hemisphere", "peak_vertex", "peak_structure",
                                    "peak_i", "peak_j", "peak_k"),
                   "peaks.tsv": ("hemisphere", "vertex", "structure", "i", "j", "k")}
#: of those, the columns written only when the surface carries volume parts
VOLUME_PART_COLUMNS = {"clusters.tsv": ("peak_structure", "peak_i", "peak_j", "peak_k"),
                       "peaks.tsv": ("structure", "i", "j", "k")}
def table_columns(table: str, space, atlas=None) -> list:
    """The columns of ``table`` for this source space (and atlas, for clusters.tsv)."""
    surface = getattr(space, "kind", "volume") == "surface"
    parts = getattr(space, "voxels", None) is not None
    return [c for c in COLUMNS[table]
            if (surface or c not in SURFACE_COLUMNS.get(table, ()))
            and (parts or c not in VOLUME_PART_COLUMNS.get(table, ()))
            and (c != "atlas_label_at_peak" or atlas)]


def columns_markdown() -> str:
    """COLUMNS as Markdown tables, one per file, for the README."""
    out = []
    for table, cols in COLUMNS.items():
        out.append(f"`{table}`\n\n| column | meaning (unit) |\n|---|---|")
        out += [f"| `{c}` | {m.replace('|', chr(92) + '|')} |" for c, m in cols.items()]
        out.append("")
    return "\n".join(out)


def rearrangement_table(matrix, kind, participants) -> pd.DataFrame:
    """The rearrangements used, one row per resample (0 = identity).

    Sign flips: one column per participant holding +1 or -1.  Permutations:
    column ``p`` holds the participant whose data (or Freedman-Lane residual)
    takes ``p``'s place in that resample.
    """
    m = np.asarray(matrix)
    ids = [str(p) for p in participants]
    if kind == "sign-flip":
        body = m.astype(np.int8)
    else:
        body = np.asarray(ids, dtype=object)[m]
    out = pd.DataFrame(body, columns=ids)
    out.insert(0, "resample", np.arange(len(out)))
    return out


#: clusters beyond this many (in table order) get no time courses
MAX_TIMECOURSE_CLUSTERS = 20


def times_ms(time_axis: TimeAxis) -> np.ndarray:
    return np.round(time_axis.times * 1e3, 3)


def reported_clusters(clusters: pd.DataFrame, alpha: float) -> list:
    """Clusters shown in figures: corrected p <= alpha, or all when p is not available."""
    if clusters is None or len(clusters) == 0:
        return []
    p = pd.to_numeric(clusters["p_corrected"], errors="coerce")
    if p.isna().all():
        return [int(c) for c in clusters["cluster"]]
    return [int(c) for c, pv in zip(clusters["cluster"], p) if pv <= alpha]


def contrast_variance_factor(design: pd.DataFrame, weights) -> float:
    """v = c' (X'X)^+ c, so that se = sigma sqrt(v) for a t contrast."""
    X = np.asarray(design, float)
    c = np.asarray(weights, float).reshape(-1)
    return float(c @ np.linalg.pinv(X.T @ X) @ c)


def _walk_root(f, start, step, direction, max_steps=60):
    """Root of f, walking from ``start`` by ``step`` in ``direction`` until f
    changes sign, then bisecting (brentq); NaN when f is not finite first."""
    a, fa = start, f(start)
    if not np.isfinite(fa):
        return np.nan
    if fa == 0:
        return a
    for _ in range(max_steps):
        b = a + direction * step
        fb = f(b)
        if not np.isfinite(fb):
            return np.nan
        if fa * fb <= 0:
            lo, hi = (a, b) if a < b else (b, a)
            return optimize.brentq(f, lo, hi, xtol=1e-8)
        a, fa = b, fb
    return np.nan


def noncentral_t_interval(t, df, level=0.95):
    """Interval for the noncentrality delta of a noncentral t given observed ``t``:
    P(T >= t | delta_low) = P(T <= t | delta_high) = (1 - level) / 2."""
    if not np.isfinite(t):
        return np.nan, np.nan
    a = (1 - level) / 2
    step = 0.5 * np.sqrt(1 + t * t / (2 * df))   # about half a standard deviation of T
    lo = _walk_root(lambda d: stats.nct.sf(t, df, d) - a, t, step, -1)
    hi = _walk_root(lambda d: stats.nct.cdf(t, df, d) - a, t, step, +1)
    return lo, hi


def noncentral_f_interval(F, df1, df2, level=0.95):
    """Interval for lambda of a noncentral F given observed ``F`` (0 if not reached)."""
    if not np.isfinite(F):
        return np.nan, np.nan
    a = (1 - level) / 2
    step = 1.0 + 0.25 * F * df1

    def upper_tail(lam):
        return stats.ncf.sf(F, df1, df2, lam) if lam > 0 else stats.f.sf(F, df1, df2)

    def lower_tail(lam):
        return stats.ncf.cdf(F, df1, df2, lam) if lam > 0 else stats.f.cdf(F, df1, df2)

    lo = 0.0 if upper_tail(0) >= a else _walk_root(lambda m: upper_tail(m) - a, 0.0, step, 1)
    hi = 0.0 if lower_tail(0) <= a else _walk_root(lambda m: lower_tail(m) - a, 0.0, step, 1)
    return lo, hi


def _peak_of(stat, labels, k):
    pts = np.flatnonzero(labels.reshape(-1) == k)
    vals = np.abs(stat.reshape(-1)[pts])
    vals = np.where(np.isfinite(vals), vals, -np.inf)
    best = pts[int(np.argmax(vals))]
    return divmod(int(best), stat.shape[1])


def significance(p, alpha) -> str:
    """The ``significant`` cell: yes / no by the corrected p, n/a without one."""
    p = float(p) if p is not None else np.nan
    if not np.isfinite(p):
        return "n/a"
    return "yes" if p <= alpha else "no"


def cluster_table(contrast, grid: VolumeGrid, time_axis: TimeAxis, atlas=None,
                  alpha=0.05) -> pd.DataFrame:
    """clusters.tsv rows for one contrast (columns of ``COLUMNS['clusters.tsv']``)."""
    inf = contrast.inference
    cols = table_columns("clusters.tsv", grid, atlas)
    table = inf.clusters
    if table is None or len(table) == 0:
        return pd.DataFrame(columns=cols)
    stat = np.asarray(inf.statistic, float)
    labels = np.asarray(inf.cluster_labels)
    tms = times_ms(time_axis)
    coords = grid.coords_mm
    df = inf.df
    if inf.df_map is not None:
        return _mixed_cluster_table(contrast, grid, time_axis, atlas, cols, alpha)
    v = contrast_variance_factor(contrast.design, contrast.weights) if inf.kind == "t" else np.nan
    rows = []
    for rec in table.to_dict("records"):
        k = int(rec["cluster"])
        member = labels == k
        src = np.flatnonzero(member.any(axis=1))
        smp = np.flatnonzero(member.any(axis=0))
        s, t = _peak_of(stat, labels, k)
        row = {"contrast": contrast.name, "cluster": k, "sign": int(rec["sign"]),
               "stat_type": inf.kind, "mass": float(rec["mass"]),
               "n_points": int(member.sum()), "n_sources": int(src.size),
               "n_samples": int(smp.size), "p_corrected": rec.get("p_corrected", np.nan),
               "significant": significance(rec.get("p_corrected"), alpha),
               "t_start_ms": tms[smp[0]], "t_end_ms": tms[smp[-1]], "t_peak_ms": tms[t],
               "peak_x_mm": coords[s, 0], "peak_y_mm": coords[s, 1], "peak_z_mm": coords[s, 2],
               "peak_stat": stat[s, t], "peak_df": float(df[-1])}
        row.update({f"peak_{k}": v for k, v in _mesh_place(grid, s).items()})
        g = float(inf.std_effect[s, t])
        if inf.kind == "t":
            est, se = float(inf.estimate[s, t]), float(inf.se[s, t])
            q = stats.t.ppf(0.975, df[0])
            lo, hi = noncentral_t_interval(stat[s, t], df[0])
            row.update(estimate_at_peak=est, estimate_ci_low=est - q * se,
                       estimate_ci_high=est + q * se, std_effect_at_peak=g,
                       std_effect_ci_low=lo * np.sqrt(v), std_effect_ci_high=hi * np.sqrt(v))
        else:
            lo, hi = noncentral_f_interval(stat[s, t], df[0], df[1])
            conv = df[0] + df[1] + 1
            row.update(estimate_at_peak=np.nan, estimate_ci_low=np.nan, estimate_ci_high=np.nan,
                       std_effect_at_peak=g, std_effect_ci_low=lo / (lo + conv),
                       std_effect_ci_high=hi / (hi + conv))
        if atlas:
            lab = int(atlas["labels"][s])
            row["atlas_label_at_peak"] = atlas.get("names", {}).get(lab, str(lab)) if lab else "none"
        rows.append(row)
    return _typed(pd.DataFrame(rows, columns=cols))


def _mixed_cluster_table(contrast, grid, time_axis, atlas, cols, alpha=0.05) -> pd.DataFrame:
    """clusters.tsv rows of a mixed-model contrast: the statistic is the z of equal p,
    the df differ by feature (the peak's df set the estimate's interval); the
    standardized effect's interval is the estimate's over the same SD (the SD,
    estimated with the variance components, is taken as known: the interval is
    somewhat too narrow)."""
    inf = contrast.inference
    stat, labels = np.asarray(inf.statistic, float), np.asarray(inf.cluster_labels)
    tms, coords = times_ms(time_axis), grid.coords_mm
    rows = []
    for rec in inf.clusters.to_dict("records"):
        k = int(rec["cluster"])
        member = labels == k
        src, smp = np.flatnonzero(member.any(axis=1)), np.flatnonzero(member.any(axis=0))
        s, t = _peak_of(stat, labels, k)
        nu = float(inf.df_map[s, t])
        row = {"contrast": contrast.name, "cluster": k, "sign": int(rec["sign"]),
               "stat_type": "z", "mass": float(rec["mass"]), "n_points": int(member.sum()),
               "n_sources": int(src.size), "n_samples": int(smp.size),
               "p_corrected": rec.get("p_corrected", np.nan),
               "significant": significance(rec.get("p_corrected"), alpha),
               "t_start_ms": tms[smp[0]],
               "t_end_ms": tms[smp[-1]], "t_peak_ms": tms[t], "peak_x_mm": coords[s, 0],
               "peak_y_mm": coords[s, 1], "peak_z_mm": coords[s, 2], "peak_stat": stat[s, t],
               "peak_df": nu, "std_effect_at_peak": float(inf.std_effect[s, t]),
               "std_effect_ci_low": np.nan, "std_effect_ci_high": np.nan}
        if inf.kind == "t":
            est, se = float(inf.estimate[s, t]), float(inf.se[s, t])
            q = stats.t.ppf(0.975, nu)
            row.update(estimate_at_peak=est, estimate_ci_low=est - q * se,
                       estimate_ci_high=est + q * se)
            d = row["std_effect_at_peak"]
            if np.isfinite(d) and d != 0 and est != 0:      # SD = est / d, taken as known
                row.update(std_effect_ci_low=d * (est - q * se) / est,
                           std_effect_ci_high=d * (est + q * se) / est)
                if row["std_effect_ci_low"] > row["std_effect_ci_high"]:
                    row["std_effect_ci_low"], row["std_effect_ci_high"] = \
                        row["std_effect_ci_high"], row["std_effect_ci_low"]
        else:
            row.update(estimate_at_peak=np.nan, estimate_ci_low=np.nan, estimate_ci_high=np.nan)
        if atlas:
            lab = int(atlas["labels"][s])
            row["atlas_label_at_peak"] = atlas.get("names", {}).get(lab, str(lab)) if lab else "none"
        rows.append(row)
    return pd.DataFrame(rows, columns=cols)


def atlas_table(contrast, grid: VolumeGrid, atlas) -> pd.DataFrame:
    """cluster_atlas.tsv: share of each cluster's sources in each atlas region."""
    cols = list(COLUMNS["cluster_atlas.tsv"])
    labels = np.asarray(contrast.inference.cluster_labels)
    per_source = np.asarray(atlas["labels"]).astype(np.int64)
    names = atlas.get("names", {})
    rows = []
    for k in np.unique(labels[labels > 0]):
        src = np.flatnonzero((labels == k).any(axis=1))
        vals, counts = np.unique(per_source[src], return_counts=True)
        for lab, n in sorted(zip(vals, counts), key=lambda x: -x[1]):
            rows.append({"contrast": contrast.name, "cluster": int(k), "label": int(lab),
                         "name": names.get(int(lab), "none" if lab == 0 else str(lab)),
                         "n_sources": int(n), "share": n / src.size})
    return pd.DataFrame(rows, columns=cols)


def local_maxima(stat, labels, adjacency) -> np.ndarray:
    """(S, T) bool: points whose |stat| is >= that of every neighbour in the same
    cluster (space neighbours at the same time, the same source at t +/- 1)."""
    a = np.abs(np.asarray(stat, float))
    a = np.where(np.isfinite(a) & (labels > 0), a, -np.inf)
    best = np.full(a.shape, -np.inf)
    coo = adjacency.tocoo()
    r, c = coo.row, coo.col
    for lo in range(0, r.size, 20000):
        rr, cc = r[lo:lo + 20000], c[lo:lo + 20000]
        same = labels[rr] == labels[cc]
        np.maximum.at(best, rr, np.where(same, a[cc], -np.inf))
    same_prev = np.zeros(a.shape, bool)
    same_prev[:, 1:] = labels[:, 1:] == labels[:, :-1]
    prev = np.full(a.shape, -np.inf)
    prev[:, 1:] = np.where(same_prev[:, 1:], a[:, :-1], -np.inf)
    nxt = np.full(a.shape, -np.inf)
    nxt[:, :-1] = np.where(same_prev[:, 1:], a[:, 1:], -np.inf)
    best = np.maximum(best, np.maximum(prev, nxt))
    return (labels > 0) & np.isfinite(a) & (a >= best)


def peak_table(contrast, grid: VolumeGrid, time_axis: TimeAxis, adjacency, min_separation_mm=20.0,
               max_per_cluster=10) -> pd.DataFrame:
    """peaks.tsv: local maxima of |statistic| per cluster, at least
    ``min_separation_mm`` apart in space, largest first."""
    cols = table_columns("peaks.tsv", grid)
    inf = contrast.inference
    labels = np.asarray(inf.cluster_labels)
    if not np.any(labels > 0):
        return pd.DataFrame(columns=cols)
    stat = np.asarray(inf.statistic, float)
    est = np.asarray(inf.estimate, float)
    coords = grid.coords_mm
    tms = times_ms(time_axis)
    lm = local_maxima(stat, labels, adjacency)
    s_idx, t_idx = np.nonzero(lm)
    order = np.argsort(-np.abs(stat[s_idx, t_idx]), kind="stable")
    s_idx, t_idx = s_idx[order], t_idx[order]
    ks = labels[s_idx, t_idx]
    rows = []
    for k in np.unique(ks):
        chosen = []
        for s, t in zip(s_idx[ks == k], t_idx[ks == k]):
            if any(np.linalg.norm(coords[s] - coords[c]) < min_separation_mm for c, _ in chosen):
                continue
            chosen.append((s, t))
            if len(chosen) >= max_per_cluster:
                break
        for j, (s, t) in enumerate(chosen, start=1):
            rows.append({"contrast": contrast.name, "cluster": int(k), "peak": j,
                         "x_mm": coords[s, 0], "y_mm": coords[s, 1], "z_mm": coords[s, 2],
                         "time_ms": tms[t], "statistic": stat[s, t],
                         "estimate": est[s, t] if inf.kind == "t" else np.nan,
                         **_mesh_place(grid, s)})
    return _typed(pd.DataFrame(rows, columns=cols))


def timecourse_table(contrast, participants: pd.DataFrame, time_axis: TimeAxis,
                     max_clusters=MAX_TIMECOURSE_CLUSTERS) -> pd.DataFrame:
    """cluster_timecourses.tsv: per participant, cluster and sample, the mean
    of the per-participant measure over the cluster's sources (first
    ``max_clusters`` clusters in table order)."""
    labels = np.asarray(contrast.inference.cluster_labels)
    ids = [str(p) for p in (contrast.data_participants if contrast.data_participants
                            is not None else contrast.participants)]
    groups = None
    if participants is not None and "group" in participants.columns:
        parts = participants.copy()
        if "participant_id" in parts.columns:
            parts = parts.set_index(parts["participant_id"].astype(str), drop=False)
        parts.index = parts.index.astype(str)
        groups = parts.loc[ids, "group"].astype(str).to_numpy()
    cols = [c for c in COLUMNS["cluster_timecourses.tsv"] if c != "group" or groups is not None]
    clusters = contrast.inference.clusters
    ks = [int(k) for k in clusters["cluster"]][:max_clusters] if clusters is not None else []
    tms = times_ms(time_axis)
    data = np.asarray(contrast.data)
    frames = []
    for k in ks:
        src = np.flatnonzero((labels == k).any(axis=1))
        if src.size == 0:
            continue
        vals = data[:, src, :].astype(np.float64).mean(axis=1)  # (n, T)
        n, T = vals.shape
        f = {"participant_id": np.repeat(ids, T)}
        if groups is not None:
            f["group"] = np.repeat(groups, T)
        f.update({"measure": contrast.name, "cluster": k, "time_ms": np.tile(tms, n),
                  "value": vals.reshape(-1)})
        frames.append(pd.DataFrame(f, columns=cols))
    if not frames:
        return pd.DataFrame(columns=cols)
    return pd.concat(frames, ignore_index=True)


def null_table(contrast) -> pd.DataFrame:
    cols = list(COLUMNS["null_distribution.tsv"])
    null = contrast.inference.null
    if null is None or len(null) == 0:
        return pd.DataFrame(columns=cols)
    out = null.copy()
    for c in cols:
        if c not in out.columns:
            out[c] = np.nan
    return out[cols]


def condition_timecourse_table(contrast, maps: pd.DataFrame, within_col, participants,
                               maps_data, time_index, time_axis: TimeAxis,
                               max_clusters=MAX_TIMECOURSE_CLUSTERS) -> pd.DataFrame:
    """condition_timecourses.tsv: for a contrast with within weights, per participant,
    condition the contrast weighs, cluster and sample, the mean over the cluster's
    sources of the participant's maps of that condition (sessions averaged first).
    Participants without a map of a condition have no rows for it."""
    cols = [c for c in COLUMNS["condition_timecourses.tsv"]]
    labels = np.asarray(contrast.inference.cluster_labels)
    clusters = contrast.inference.clusters
    if (not contrast.within or maps_data is None or within_col is None or clusters is None
            or not len(clusters)):
        return pd.DataFrame(columns=cols)
    ids = [str(p) for p in contrast.participants]
    group_of = None
    if participants is not None and "group" in participants.columns:
        parts = participants.copy()
        key = parts["participant_id"] if "participant_id" in parts.columns else parts.index
        group_of = dict(zip(key.astype(str), parts["group"].astype(str)))
    else:
        cols.remove("group")
    pid = maps["participant_id"].astype(str).to_numpy()
    cond = maps[within_col].astype(str).to_numpy()
    tidx = np.asarray(time_index)
    tms = times_ms(time_axis)
    frames = []
    for k in [int(k) for k in clusters["cluster"]][:max_clusters]:
        src = np.flatnonzero((labels == k).any(axis=1))
        if src.size == 0:
            continue
        # every map's mean over the cluster's sources (maps x samples), float64
        per_map = np.stack([np.asarray(maps_data[m][src][:, tidx], np.float64).mean(axis=0)
                            for m in range(len(maps))])
        for c in contrast.within:
            for p in ids:
                sel = np.flatnonzero((pid == p) & (cond == str(c)))
                if sel.size == 0:
                    continue
                f = {"participant_id": p, "condition": str(c), "cluster": k,
                     "time_ms": tms, "value": per_map[sel].mean(axis=0)}
                if group_of is not None:
                    f["group"] = group_of.get(p, "n/a")
                frames.append(pd.DataFrame(f, columns=cols))
    if not frames:
        return pd.DataFrame(columns=cols)
    return pd.concat(frames, ignore_index=True)
