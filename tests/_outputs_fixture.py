"""Synthetic AnalysisResult for the output-stage tests.

Everything here is computed with plain numpy/scipy, independently of the
groupsrc statistics engine: a two-group cohort of 12 fictional participants
whose per-participant maps carry one positive and one negative space-time
blob plus noise; a t contrast (mean over everyone) and an F contrast (group
difference) fitted by ordinary least squares; clusters found with
scipy.ndimage.label on the thresholded space-time map; a random null
distribution with p = (b + 1) / (m + 1).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import ndimage, stats

from groupsrc.sources import TimeAxis, VolumeGrid
from groupsrc.stats.results import (AnalysisResult, ContrastResult, InferenceResult,
                                    ResamplingRecord)

SHAPE = (11, 13, 9)
VOXEL_MM = 5.0
AFFINE = np.array([[VOXEL_MM, 0, 0, -25.0], [0, VOXEL_MM, 0, -35.0],
                   [0, 0, VOXEL_MM, -15.0], [0, 0, 0, 1]])
T0, DT, NT = 0.05, 0.01, 16          # analysed window 50..200 ms
THRESHOLD = 3.2
ALPHA = 0.05


def _mask():
    i, j, k = np.indices(SHAPE)
    c = (np.array(SHAPE) - 1) / 2
    r = ((i - c[0]) / 5.2) ** 2 + ((j - c[1]) / 6.2) ** 2 + ((k - c[2]) / 4.2) ** 2
    return r <= 1.0


def _blob(grid, centre_mm, width_mm, t_centre, t_width, times):
    d2 = ((grid.coords_mm - np.asarray(centre_mm)) ** 2).sum(axis=1)
    space = np.exp(-d2 / (2 * width_mm ** 2))
    time = np.exp(-((times - t_centre) ** 2) / (2 * t_width ** 2))
    return space[:, None] * time[None, :]


def label_clusters(stat, grid, threshold):
    """Space-time clusters (face neighbours in space, adjacent samples in time)."""
    vol = grid.to_volume(stat.astype(float))            # (x, y, z, t)
    inmask = grid.mask[..., None]
    struct = ndimage.generate_binary_structure(4, 1)
    out = np.zeros(stat.shape, np.int32)
    rows = []
    for sign in (1, -1):
        lab, n = ndimage.label((sign * vol > threshold) & inmask, structure=struct)
        per_src = grid.from_volume(lab)
        for c in range(1, n + 1):
            m = per_src == c
            rows.append((sign, m, float(stat[m].sum())))
    rows.sort(key=lambda r: -abs(r[2]))
    table = []
    for k, (sign, m, mass) in enumerate(rows, start=1):
        out[m] = k
        table.append({"cluster": k, "sign": sign, "mass": mass, "extent": int(m.sum()),
                      "n_sources": int(m.any(axis=1).sum()), "n_samples": int(m.any(axis=0).sum())})
    return out, pd.DataFrame(table)


def make_analysis(seed=7, with_atlas=True) -> AnalysisResult:
    rng = np.random.default_rng(seed)
    grid = VolumeGrid.from_mask(_mask(), AFFINE)
    taxis = TimeAxis(T0, DT, NT)
    times = taxis.times
    ids = [f"sub-{i:02d}" for i in range(1, 13)]
    groups = ["control"] * 6 + ["patient"] * 6
    participants = pd.DataFrame({"participant_id": ids, "group": groups,
                                 "age": rng.integers(21, 60, 12)}).set_index(
        "participant_id", drop=False)
    maps = pd.DataFrame([{"participant_id": p, "condition": c, "path": f"maps/{p}_{c}.nii.gz"}
                         for p in ids for c in ("deviant", "standard")])
    pos = _blob(grid, (10, 5, 0), 8.0, 0.11, 0.02, times)
    neg = _blob(grid, (-12, -15, 5), 7.0, 0.16, 0.015, times)
    g = np.array([0.5 if x == "patient" else -0.5 for x in groups])
    S = grid.n_sources
    data = (3.0 * pos[None] - 2.5 * neg[None] + 3.0 * g[:, None, None] * pos[None]
            + rng.standard_normal((12, S, NT))).astype(np.float32)
    X = pd.DataFrame({"Intercept": 1.0, "group[patient]": g}, index=ids)
    Xa = X.to_numpy()
    Yf = data.reshape(12, -1).astype(np.float64)
    beta, *_ = np.linalg.lstsq(Xa, Yf, rcond=None)
    resid = Yf - Xa @ beta
    df = 12 - 2
    sigma2 = (resid ** 2).sum(axis=0) / df
    xtx_inv = np.linalg.inv(Xa.T @ Xa)
    J = 1 - 3 / (4 * df - 1)                     # Hedges 1981 small-sample factor
    contrasts = []
    # t contrast: the intercept (mean of both groups, centred group coding)
    c = np.array([1.0, 0.0])
    est = c @ beta
    se = np.sqrt(sigma2 * (c @ xtx_inv @ c))
    t = est / se
    contrasts.append(_contrast("deviant_minus_standard", "deviant - standard, both groups",
                               "t", (df,), t, est, est / np.sqrt(sigma2) * J, se,
                               2 * stats.t.sf(np.abs(t), df), grid, data, ids, X, c, rng))
    # F contrast on the group coefficient (df1 = 1)
    cf = np.array([[0.0, 1.0]])
    estg = (cf @ beta)[0]
    F = estg ** 2 / (sigma2 * (cf @ xtx_inv @ cf.T)[0, 0])
    eta = F / (F + df)
    contrasts.append(_contrast("group_difference", "patient vs control (F)", "F", (1, df),
                               F, np.full_like(F, np.nan), eta, np.full_like(F, np.nan),
                               stats.f.sf(F, 1, df), grid, data, ids, X, cf, rng))
    settings = {
        "title": "Fictional oddball study (synthetic)",
        "model": {"between": "group", "within": "condition", "mixed": False},
        "inference": {"correction": "cluster-mass", "resamples": 200, "seed": 11,
                      "forming_p": 0.02, "alpha": ALPHA, "tails": "two",
                      "time_window": [T0, T0 + DT * (NT - 1)], "neighbors": "face"},
        "check_summary": {"participants": 12, "maps": 24, "sources": S, "samples": NT + 5,
                          "time_range_ms": [0.0, 200.0], "sampling_interval_ms": 10.0,
                          "per_group": {"control": 6, "patient": 6},
                          "conditions": ["deviant", "standard"]},
    }
    if with_atlas:
        lab = np.zeros(SHAPE, np.int32)
        lab[: SHAPE[0] // 2] = 1
        lab[SHAPE[0] // 2:] = 2
        lab[~grid.mask] = 0
        settings["atlas"] = {"labels": grid.from_volume(lab),
                             "names": {1: "left half", 2: "right half"}}
    return AnalysisResult(title=settings["title"], grid=grid, time_axis=taxis,
                          contrasts=contrasts, participants=participants, maps=maps,
                          settings=settings, timings={})


def _contrast(name, desc, kind, df, stat, est, eff, se, p, grid, data, ids, X, w, rng):
    S, T = grid.n_sources, NT
    shape = (S, T)
    stat = stat.reshape(shape)
    thr = THRESHOLD if kind == "t" else THRESHOLD ** 2
    labels, table = label_clusters(stat, grid, thr)
    m = 200
    null_pos = rng.gamma(2.0, 20.0, m)
    null_neg = -rng.gamma(2.0, 20.0, m)
    if kind == "F":
        null_neg = np.full(m, np.nan)
    null_max = np.fmax(null_pos, -null_neg)
    obs = np.abs(table["mass"].to_numpy()) if len(table) else np.zeros(0)
    null_max[0] = max(null_max[0], obs.max() if obs.size else 0)   # identity holds the observed
    pc = np.array([(np.sum(null_max[1:] >= v) + 1) / m for v in obs])
    table["p_corrected"] = pc
    # keep the table order "smallest p, then largest mass" as the engine does
    order = np.lexsort((-obs, pc))
    relabel = np.zeros(len(table) + 1, np.int32)
    relabel[table["cluster"].to_numpy()[order]] = np.arange(1, len(table) + 1)
    labels = relabel[labels]
    table = table.iloc[order].reset_index(drop=True)
    table["cluster"] = np.arange(1, len(table) + 1)
    pmap = np.ones(shape)
    for k, pv in zip(table["cluster"], table["p_corrected"]):
        pmap[labels == k] = pv
    null = pd.DataFrame({"resample": np.arange(m), "max_stat": null_max, "max_pos": null_pos,
                         "max_neg": null_neg})
    inf = InferenceResult(kind=kind, df=df, statistic=stat, estimate=est.reshape(shape),
                          std_effect=eff.reshape(shape), se=se.reshape(shape),
                          p_uncorrected=p.reshape(shape), p_corrected=pmap,
                          cluster_labels=labels, clusters=table, null=null, threshold=thr,
                          n_resamples=m, exact=False,
                          scheme="sign-flip" if kind == "t" else "permutation",
                          correction="cluster-mass", tails="two",
                          cluster_rule="points beyond the cluster-forming threshold",
                          resampling=ResamplingRecord(
                              seed=11, kind="sign-flip" if kind == "t" else "permutation",
                              n_resamples=m, exact=False, batch_size=m, freedman_lane=False,
                              critical_value=float(np.quantile(null_max, 0.95,
                                                               method="higher"))))
    return ContrastResult(name=name, description=desc, inference=inf, data=data,
                          participants=ids, design=X, weights=w,
                          within={"deviant": 1, "standard": -1})


RUN_RECORD = {"groupsrc_version": "0.1.0", "command": ["groupsrc", "run", "analysis.toml"],
              "seed": 11, "inputs_sha256": {"maps.tsv": "0" * 64}, "timings_s": {"load": 0.1}}


_CACHE = {}


def results_folder(tmp_path_factory, with_atlas=True):
    """Write the synthetic analysis once per test session; return (analysis, folder)."""
    key = with_atlas
    if key not in _CACHE:
        from groupsrc.outputs import write_results
        analysis = make_analysis(with_atlas=with_atlas)
        out = tmp_path_factory.mktemp("outputs_results")
        write_results(analysis, out, dict(RUN_RECORD))
        _CACHE[key] = (analysis, out)
    return _CACHE[key]
