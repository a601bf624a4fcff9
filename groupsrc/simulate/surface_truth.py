"""Ground truth of the surface demo: noise-free effects, expected t, truth masks.

As for the volume demo (:mod:`.truth`): the noise-free maps of the
population model go through the same forward model and inverse, are combined
as the analysis contrasts define them (:func:`.truth.noise_free_effects`,
reused as is), and the masks follow the ``[truth]`` rules.  Here the maps
are signed moments along the cortex normal, so the expected t divides by the
noise standard deviation of that one component, ``sqrt(M_j C M_j^T)`` for the
row ``M_j`` of the normal minimum-norm weights.

Also recorded for the physics note (README, surface demo): how well the MEG
sees each generator -- its patch centre's radiality ``|n . r / |r||`` and
its gain relative to the median source's -- since a radial source in a
spherical conductor gives no external field (Sarvas 1987).

Conventions: arrays over every vertex (left hemisphere first); masks are
False outside the sources.  No file is read or written here.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .settings import EFFECTS
from .surface_model import SurfaceDemoModel
from .truth import noise_free_effects

__all__ = ["expected_t", "noise_free_effects", "truth_masks"]


def expected_t(model: SurfaceDemoModel, effects: dict, participants: pd.DataFrame) -> dict:
    """Expected t (n_vertices, n_times) of each effect under the nominal noise alone.

    The standard-error factors of :func:`.truth.expected_t` (least squares on
    ``[1, group, age]``), with the noise sd of the normal moment estimate.
    """
    M, C = model.inverse.matrix, model.noise_covariance
    sigma = np.sqrt(np.einsum("ij,ij->i", M @ C, M)) * 1e9
    sigma = np.where(sigma > 0, sigma, np.inf)              # not a source: never expected
    g = np.where(participants["group"].to_numpy() == "patient", 0.5, -0.5)
    age = participants["age"].to_numpy(float)
    X = np.column_stack([np.ones(g.size), g, age - age.mean()])
    V = np.linalg.inv(X.T @ X)
    se = {"condition_effect": np.sqrt(2 * V[0, 0]), "group_by_condition": np.sqrt(2 * V[1, 1]),
          "age_effect": np.sqrt(V[2, 2] / 2)}
    return {k: effects[k] / (sigma[:, None] * f) for k, f in se.items()}


def truth_masks(model: SurfaceDemoModel, participants: pd.DataFrame, effects: dict | None = None):
    """(masks {name: bool per vertex}, facts for truth/truth.json) by the [truth] rules."""
    cfg, times = model.cfg, model.times
    effects = noise_free_effects(model) if effects is None else effects
    tmaps = expected_t(model, effects, participants)
    rule = cfg["truth"]
    pos, src = model.cortex.positions, model.source
    windows = {"condition": rule["condition_window_s"],
               "group_by_condition": rule["group_by_condition_window_s"],
               "age": rule["age_window_s"], "common": rule["common_window_s"]}
    masks, info = {}, {}
    quiet = src.copy()
    for name, (role, contrast) in EFFECTS.items():
        eff = effects[name]
        over_time = np.abs(eff).max(axis=1)
        top = float(over_time.max())
        masks[name] = src & (over_time >= rule["effect_fraction"] * top)
        quiet &= over_time < rule["quiet_fraction"] * top
        quiet &= np.abs(tmaps[name]).max(axis=1) < rule["quiet_expected_t"]
        gens = [(g, c) for g, c in zip(model.gens, model.centres) if g["role"] == role]
        for _, c in gens:
            quiet &= np.linalg.norm(pos - pos[c], axis=1) >= rule["quiet_distance_mm"]
        s_pk = int(over_time.argmax())
        t_pk = int(np.abs(eff[s_pk]).argmax())
        info[name] = {
            "contrast": contrast,
            "generators": {g["name"]: _generator_facts(model, g, c) for g, c in gens},
            "window_s": list(windows[role]),
            "units": "nA m per year" if role == "age" else "nA m",
            "noise_free_peak": {"hemisphere": _hemi(model, s_pk), "location_mm": pos[s_pk].tolist(),
                                "time_s": round(float(times[t_pk]), 6),
                                "value": round(float(eff[s_pk, t_pk]), 6)},
            "n_sources": int(masks[name].sum()),
        }
    masks["no_effect"] = quiet
    common = [(g, c) for g, c in zip(model.gens, model.centres) if g["role"] == "common"]
    info["no_effect"] = {"n_sources": int(quiet.sum()),
                         "common_response": {g["name"]: _generator_facts(model, g, c)
                                             for g, c in common},
                         "largest_group_main_effect_nAm": round(float(
                             np.abs(effects["group_main_effect"]).max()), 6)}
    return masks, info


def _hemi(model, vertex) -> str:
    return "left" if vertex < model.space.hemispheres[0].n_vertices else "right"


def _generator_facts(model, gen, centre) -> dict:
    gain = np.linalg.norm(model.gain, axis=0)
    return {"hemisphere": gen["hemisphere"], "centre_vertex_mm":
            model.cortex.positions[centre].round(3).tolist(),
            "radiality": round(float(model.cortex.radiality[centre]), 3),
            "gain_vs_median_source": round(float(gain[centre] / np.median(gain[model.source])), 3)}
