"""The demo cohort: a fictional auditory study simulated from generators to maps.

For every participant, condition and session: generator waveforms (with the
participant's gain and latency jitter) at known template locations -> MEG
sensor data through the spherical-conductor dipole formula
(:mod:`.forward`) -> spatially and temporally correlated sensor noise ->
regularised minimum-norm inverse (:mod:`.inverse`) -> source amplitudes on
the template grid, written as 4D NIfTI.

Ground truth is computed from noise-free maps of the same pipeline and
written beside the cohort as NIfTI masks (``truth/``) with ``truth.json``.
Everything is deterministic from the seed.
"""

from __future__ import annotations

import json
import os
import sys
from importlib import resources
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd

from ..grid import Grid
from .forward import helmet_sensors, lead_field
from .inverse import minimum_norm

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

CONDITIONS = ("rare", "frequent")
GROUPS = ("control", "patient")


def scenario_settings() -> dict:
    """The generator settings shipped with the package (also demo_cohort/scenario.toml)."""
    text = resources.files("groupsrc").joinpath("data/demo_scenario.toml").read_text()
    return tomllib.loads(text)


def template_grid(spacing_mm: float, brain_radius_mm: float) -> Grid:
    """Sphere-shaped source mask on an isotropic grid centred on the origin."""
    half = int(np.floor(brain_radius_mm / spacing_mm))
    n = 2 * half + 1
    ijk = np.indices((n, n, n)).reshape(3, -1).T
    xyz = (ijk - half) * spacing_mm
    inside = np.linalg.norm(xyz, axis=1) <= brain_radius_mm
    mask = inside.reshape(n, n, n)
    affine = np.diag([spacing_mm, spacing_mm, spacing_mm, 1.0])
    affine[:3, 3] = -half * spacing_mm
    return Grid.from_mask(mask, affine)


def participants_table(cfg: dict, size: str, seed: int) -> pd.DataFrame:
    sz = cfg["sizes"][size]
    rng = np.random.default_rng([seed, 1])
    n = sz["per_group"]
    rows = []
    pc = cfg["participants"]
    for g_i, group in enumerate(GROUPS):
        ages = rng.uniform(pc["age_min"], pc["age_max"], n).round().astype(int)
        sexes = rng.choice(["F", "M"], n)
        for k in range(n):
            rows.append({"group": group, "age": int(ages[k]), "sex": str(sexes[k])})
    order = rng.permutation(len(rows))  # interleave groups in the id order
    rows = [rows[i] for i in order]
    df = pd.DataFrame(rows)
    df.insert(0, "participant_id", [f"sub-{i + 1:02d}" for i in range(len(df))])
    return df


def _noise_cov(sensors, cfg):
    nz = cfg["noise"]
    s = nz["sensor_noise_ft"] * 1e-15
    d = np.linalg.norm(sensors[:, None, :] - sensors[None, :, :], axis=2)
    ell = nz["correlation_length_mm"] * 1e-3
    K = np.exp(-0.5 * (d / ell) ** 2)
    share = nz["correlated_share"]
    return s ** 2 * ((1 - share) * np.eye(len(sensors)) + share * K)


def _amplitude(gen, condition, group, age):
    amp = gen.get("base", 0.0)
    rare = 1.0 if condition == "rare" else 0.0
    g = 0.5 if group == "patient" else -0.5
    amp += gen.get("rare", 0.0) * rare
    amp += gen.get("by_group", 0.0) * g
    amp += gen.get("by_group_rare", 0.0) * g * rare
    amp += gen.get("age_per_year", 0.0) * (age - 45.0)
    return max(amp, 0.0)


def _moments(cfg, times, condition, group, age, gain, shift):
    """(n_generators, 3, n_times) dipole moments in A m."""
    out = []
    for gen in cfg["generators"]:
        d = np.asarray(gen["direction"], float)
        d /= np.linalg.norm(d)
        w = np.exp(-0.5 * ((times - gen["peak_s"] - shift) / gen["width_s"]) ** 2)
        amp = _amplitude(gen, condition, group, age) * gain * 1e-9
        out.append(d[:, None] * (amp * w)[None, :])
    return np.array(out)


class _Model:
    """Sensors, gain matrices and inverse operator shared by every participant."""

    def __init__(self, cfg, grid):
        head = cfg["head"]
        self.sensors, self.ori = helmet_sensors(head["n_sensors"], head["sensor_radius_mm"] * 1e-3)
        self.grid = grid
        gen_pos = np.array([g["position_mm"] for g in cfg["generators"]]) * 1e-3
        self.L_gen = lead_field(gen_pos, self.sensors, self.ori)            # (M, 3 G)
        L_grid = lead_field(grid.coords_mm * 1e-3, self.sensors, self.ori)  # (M, 3 S)
        self.C = _noise_cov(self.sensors, cfg)
        self.inv = minimum_norm(L_grid, self.C, snr=cfg["noise"]["inverse_snr"],
                                depth=cfg["noise"]["depth_weighting"])
        evals, evecs = np.linalg.eigh(self.C)
        self.C_half = evecs * np.sqrt(np.maximum(evals, 0))

    def sensor_data(self, moments):
        G = moments.shape[0]
        return self.L_gen @ moments.reshape(G * 3, -1)

    def noise(self, rng, n_t, ar):
        white = rng.standard_normal((self.C_half.shape[1], n_t))
        # AR(1) in time, scaled to unit variance, then the spatial covariance
        out = np.empty_like(white)
        out[:, 0] = white[:, 0]
        scale = np.sqrt(1 - ar ** 2)
        for t in range(1, n_t):
            out[:, t] = ar * out[:, t - 1] + scale * white[:, t]
        return self.C_half @ out

    def maps(self, data):
        """Source amplitudes in nA m, (n_sources, n_times)."""
        return self.inv.apply(data) * 1e9


def _save_nifti(path: Path, data, affine, dt=None, t0=None):
    img = nib.Nifti1Image(np.asarray(data), affine)
    img.set_sform(affine, code=2)
    img.set_qform(affine, code=2)
    if dt is not None:
        img.header.set_xyzt_units("mm", "sec")
        img.header.set_zooms(tuple(img.header.get_zooms()[:3]) + (dt,))
        img.header["toffset"] = t0
    else:
        img.header.set_xyzt_units("mm")
    tmp = path.with_name(path.name + ".tmp.nii.gz") if path.name.endswith(".gz") else \
        path.with_name(path.name + ".tmp.nii")
    nib.save(img, str(tmp))
    os.replace(tmp, path)


def build_demo_cohort(out_dir, size: str = "default", seed: int | None = None) -> Path:
    """Simulate the demo cohort into ``out_dir``; return the analysis file path.

    Writes participants.tsv, maps.tsv, mask.nii.gz, maps/*.nii.gz,
    truth/*.nii.gz, truth/truth.json and analysis.toml.  Only files of the
    cohort are written (re-running replaces them).
    """
    cfg = scenario_settings()
    if size not in cfg["sizes"]:
        raise ValueError(f"size must be one of {sorted(cfg['sizes'])}, got {size!r}")
    seed = int(cfg["seed"] if seed is None else seed)
    sz = cfg["sizes"][size]
    out = Path(out_dir)
    (out / "maps").mkdir(parents=True, exist_ok=True)
    (out / "truth").mkdir(exist_ok=True)

    grid = template_grid(sz["spacing_mm"], cfg["head"]["brain_radius_mm"])
    dt = 1.0 / sz["sfreq"]
    n_t = int(round((cfg["head"]["t_stop"] - cfg["head"]["t_start"]) / dt)) + 1
    times = cfg["head"]["t_start"] + dt * np.arange(n_t)
    model = _Model(cfg, grid)
    parts = participants_table(cfg, size, seed)
    ar = cfg["noise"]["temporal_smoothing"] ** (100.0 / sz["sfreq"])
    pc = cfg["participants"]

    rows = []
    for i, p in enumerate(parts.itertuples(index=False)):
        rng = np.random.default_rng([seed, 2, i])
        gain = float(np.exp(rng.normal(0.0, pc["amplitude_jitter"])))
        shift = float(rng.normal(0.0, pc["latency_jitter_s"]))
        n_ses = 2 if (i + 1) % sz["second_session_every"] == 0 else 1
        for ses in range(1, n_ses + 1):
            for cond in CONDITIONS:
                m = _moments(cfg, times, cond, p.group, p.age, gain, shift)
                b = model.sensor_data(m) + model.noise(rng, n_t, ar)
                amp = model.maps(b).astype(np.float32)
                name = f"{p.participant_id}_ses-{ses}_cond-{cond}.nii.gz"
                _save_nifti(out / "maps" / name, grid.to_volume(amp), grid.affine, dt, times[0])
                rows.append({"participant_id": p.participant_id, "condition": cond,
                             "session": str(ses), "path": f"maps/{name}"})

    parts.to_csv(out / "participants.tsv", sep="\t", index=False)
    pd.DataFrame(rows).to_csv(out / "maps.tsv", sep="\t", index=False)
    _save_nifti(out / "mask.nii.gz", grid.mask.astype(np.uint8), grid.affine)
    truth = _truth(cfg, model, times)
    for name, mask in truth["masks"].items():
        _save_nifti(out / "truth" / f"{name}.nii.gz", grid.to_volume(mask.astype(np.uint8)),
                    grid.affine)
    (out / "truth" / "truth.json").write_text(json.dumps(truth["info"], indent=2))
    (out / "analysis.toml").write_text(_analysis_text(cfg, sz))
    return out / "analysis.toml"


def _truth(cfg, model, times):
    """Effect regions from noise-free maps of typical participants.

    A source belongs to an effect's region where the noise-free effect (its
    largest absolute value over time) exceeds 20 % of its maximum; the
    no-effect region holds the sources where every effect stays below 5 %
    of its maximum.
    """
    def amp(cond, group, age=45.0):
        return model.maps(model.sensor_data(_moments(cfg, times, cond, group, age, 1.0, 0.0)))

    cond_eff = np.mean([amp("rare", g) - amp("frequent", g) for g in GROUPS], axis=0)
    inter = ((amp("rare", "patient") - amp("frequent", "patient"))
             - (amp("rare", "control") - amp("frequent", "control")))
    age_eff = np.mean([(amp(c, g, 70.0) - amp(c, g, 20.0)) / 50.0
                       for c in CONDITIONS for g in GROUPS], axis=0)
    effects = {"condition_effect": cond_eff, "group_by_condition": inter, "age_effect": age_eff}
    masks, info = {}, {"effects": {}, "study": cfg["study"]}
    quiet = np.ones(model.grid.n_sources, bool)
    for name, eff in effects.items():
        peak = np.abs(eff).max(axis=1)
        masks[name] = peak >= 0.2 * peak.max()
        quiet &= peak < 0.05 * peak.max()
        gen = next(g for g in cfg["generators"] if g["name"] == name)
        t_peak = times[np.abs(eff).max(axis=0).argmax()]
        info["effects"][name] = {"generator_mm": gen["position_mm"], "peak_s": gen["peak_s"],
                                 "noise_free_peak_time_s": float(t_peak),
                                 "n_sources": int(masks[name].sum())}
    masks["no_effect"] = quiet
    info["no_effect_sources"] = int(quiet.sum())
    info["rule"] = ("effect region: noise-free |effect| over time >= 20% of its maximum; "
                    "no-effect region: every effect < 5% of its maximum")
    return {"masks": masks, "info": info}


def _analysis_text(cfg, sz) -> str:
    return f'''# Analysis of the groupsrc demo cohort: {cfg["study"]}
title = "Rare versus frequent tones in patients and controls (demo)"

[cohort]
participants = "participants.tsv"
maps = "maps.tsv"
mask = "mask.nii.gz"

[model]
between = "group + age"
within = "condition"

[[contrasts]]
name = "rare_minus_frequent"
description = "rare minus frequent tones, groups weighted equally"
within = {{ rare = 1, frequent = -1 }}

[[contrasts]]
name = "group_by_tone"
description = "rare-minus-frequent difference, patients minus controls"
within = {{ rare = 1, frequent = -1 }}
compare = {{ group = ["patient", "control"] }}

[[contrasts]]
name = "age_slope"
description = "change per year of age of the response averaged over tones"
slope = "age"

[inference]
correction = "cluster-mass"
resamples = {sz["resamples"]}
seed = 20261201
forming_p = {sz["forming_p"]}
alpha = 0.05
tails = "two"
time_window = [0.0, 0.6]
neighbors = "face"
'''
