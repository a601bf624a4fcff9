"""Ground truth of the demo as arrays: noise-free effects, expected t, masks.

Minimum-norm maps are blurred, so the true region of an effect is not the
voxel of its generator.  The truth is therefore taken from the noise-free
run of the same simulation (:mod:`.model`: forward model of Sarvas 1987,
minimum-norm weights of Hamalainen & Ilmoniemi 1994) for the population
model, reduced like the analysis contrasts (DESIGN: contrast meaning), and
the masks follow the rules of the ``[truth]`` settings.

Conventions: effect maps are ``(n_sources, n_times)`` float64 in nA m (the
age effect in nA m per year); masks are bool per source (``grid.ijk``
order).  No file is read or written here; :mod:`.build` writes the masks,
the noise-free maps and ``truth/truth.json``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .model import DemoModel
from .settings import CONDITIONS, EFFECTS, GROUPS


def noise_free_effects(model: DemoModel) -> dict:
    """Noise-free effect maps (n_sources, n_times) of the population model.

    A typical participant (no individual jitter, no noise) of each group, tone
    and age goes through the same forward model and inverse; the maps are then
    combined as the analysis contrasts define them (DESIGN: contrast meaning):

    * ``condition_effect``: rare - frequent, the two groups weighted equally, at
      the reference age;
    * ``group_by_condition``: (rare - frequent) of patients minus that of controls;
    * ``age_effect``: change per year from the youngest to the oldest age, averaged
      over tones and groups (nA m per year);
    * ``group_main_effect``: patients minus controls averaged over tones (zero
      by design: the group effect is a pure interaction);
    * ``common_response``: the mean map of all tones and groups.

    Taking the population model rather than the simulated participants keeps
    the chance correlations of a finite sample (say between age and a
    participant's overall strength) out of the truth; those are exactly what
    the permutation test must treat as noise.
    """
    pc = model.cfg["participants"]
    lo, ref, hi = float(pc["age_min"]), float(pc["age_ref"]), float(pc["age_max"])
    typical = model.person(0, 0, 1, jitter=False)
    keys = [(c, g, a) for c in CONDITIONS for g in GROUPS for a in (lo, ref, hi)]
    signals = np.stack([model.sensor_signal(typical, 1, c, g, a) for c, g, a in keys], axis=1)
    amp = model.inverse.amplitude(signals) * 1e9                 # (sources, keys, T)
    m = {k: amp[:, i] for i, k in enumerate(keys)}
    diff = {g: m[("rare", g, ref)] - m[("frequent", g, ref)] for g in GROUPS}
    return {
        "condition_effect": 0.5 * (diff["control"] + diff["patient"]),
        "group_by_condition": diff["patient"] - diff["control"],
        "age_effect": np.mean([(m[(c, g, hi)] - m[(c, g, lo)]) / (hi - lo)
                               for c in CONDITIONS for g in GROUPS], axis=0),
        "group_main_effect": np.mean([m[(c, "patient", ref)] - m[(c, "control", ref)]
                                      for c in CONDITIONS], axis=0),
        "common_response": np.mean([m[(c, g, ref)] for c in CONDITIONS for g in GROUPS],
                                   axis=0),
    }


def expected_t(model: DemoModel, effects: dict, participants: pd.DataFrame) -> dict:
    """Expected t (n_sources, n_times) of each noise-free effect for a cohort.

    The effect divided by its least-squares standard error on ``[1, group,
    age]`` when the only variation is the nominal noise of one averaged
    response: per source, ``sigma_j^2 = trace(M_j C M_j^T) / 2`` (``M_j``: the
    three rows of source ``j`` in the minimum-norm weight matrix), the noise
    variance of one tangential moment component of the estimate.  Between-
    participant variability would only make the real t smaller.  Minimum-norm
    maps are much less noisy at deep sources than near the sensors, so a faint
    blurred copy of an effect can be detectable far from its generator; this
    is what the no-effect region must avoid.
    """
    M, C = model.inverse.matrix, model.noise_covariance
    sigma = np.sqrt(np.einsum("ij,ij->i", M @ C, M).reshape(-1, 3).sum(axis=1) / 2) * 1e9
    g = np.where(participants["group"].to_numpy() == "patient", 0.5, -0.5)
    age = participants["age"].to_numpy(float)
    X = np.column_stack([np.ones(g.size), g, age - age.mean()])
    V = np.linalg.inv(X.T @ X)
    se = {"condition_effect": np.sqrt(2 * V[0, 0]),      # rare - frequent: var 2 sigma^2
          "group_by_condition": np.sqrt(2 * V[1, 1]),
          "age_effect": np.sqrt(V[2, 2] / 2)}             # tone average: var sigma^2 / 2
    return {k: effects[k] / (sigma[:, None] * f) for k, f in se.items()}


def truth_masks(model: DemoModel, participants: pd.DataFrame, effects: dict | None = None):
    """Truth masks (bool per source) and the facts written to truth/truth.json.

    Effect region: the sources whose noise-free ``|effect|`` over time reaches
    ``effect_fraction`` of the effect's maximum.  No-effect region: the sources
    where, for every effect, the noise-free ``|effect|`` stays below
    ``quiet_fraction`` of its maximum *and* the expected t (:func:`expected_t`)
    below ``quiet_expected_t`` at every time, at least ``quiet_distance_mm``
    from every effect generator.
    """
    cfg, grid, times = model.cfg, model.grid, model.times
    effects = noise_free_effects(model) if effects is None else effects
    tmaps = expected_t(model, effects, participants)
    rule = cfg["truth"]
    xyz = grid.coords_mm
    windows = {"condition": rule["condition_window_s"],
               "group_by_condition": rule["group_by_condition_window_s"],
               "age": rule["age_window_s"], "common": rule["common_window_s"]}
    masks, info = {}, {}
    quiet = np.ones(grid.n_sources, bool)
    for name, (role, contrast) in EFFECTS.items():
        eff = effects[name]
        peak_over_time = np.abs(eff).max(axis=1)
        top = float(peak_over_time.max())
        t_over_time = np.abs(tmaps[name]).max(axis=1)
        masks[name] = peak_over_time >= rule["effect_fraction"] * top
        quiet &= peak_over_time < rule["quiet_fraction"] * top
        quiet &= t_over_time < rule["quiet_expected_t"]
        s_pk = int(peak_over_time.argmax())
        t_pk = int(np.abs(eff[s_pk]).argmax())
        above = np.nonzero(np.abs(eff[s_pk]) >= rule["effect_fraction"] * top)[0]
        gens = [g for g in cfg["generators"] if g["role"] == role]
        gpos = np.array([g["position_mm"] for g in gens], float)
        for p in gpos:
            quiet &= np.linalg.norm(xyz - p, axis=1) >= rule["quiet_distance_mm"]
        s_t = int(t_over_time.argmax())
        info[name] = {
            "contrast": contrast,
            "generators": {g["name"]: g["position_mm"] for g in gens},
            "location_mm": gpos[0].tolist(),
            "window_s": list(windows[role]),
            "sign": "positive" if eff[s_pk, t_pk] > 0 else "negative",
            "units": "nA m per year" if role == "age" else "nA m",
            "noise_free_peak": {
                "location_mm": xyz[s_pk].tolist(),
                "time_s": round(float(times[t_pk]), 6),
                "value": round(float(eff[s_pk, t_pk]), 6),
                "distance_to_generator_mm": round(float(
                    np.linalg.norm(gpos - xyz[s_pk], axis=1).min()), 3),
                "window_s": [round(float(times[above[0]]), 6),
                             round(float(times[above[-1]]), 6)]},
            "expected_t_peak": {
                "location_mm": xyz[s_t].tolist(),
                "value": round(float(t_over_time[s_t]), 3)},
            "n_sources": int(masks[name].sum()),
        }
    masks["no_effect"] = quiet
    common = [g for g in cfg["generators"] if g["role"] == "common"]
    near_common = np.zeros(grid.n_sources, bool)
    for g in common:
        near_common |= np.linalg.norm(xyz - np.array(g["position_mm"]), axis=1) <= 20.0
    info["no_effect"] = {
        "n_sources": int(quiet.sum()),
        "common_response": {
            "generators": {g["name"]: g["position_mm"] for g in common},
            "window_s": list(windows["common"]),
            "n_sources_within_20_mm": int(near_common.sum()),
            "n_sources_within_20_mm_in_no_effect": int((quiet & near_common).sum())},
        "largest_group_main_effect_nAm": round(float(
            np.abs(effects["group_main_effect"]).max()), 6),
    }
    return masks, info

