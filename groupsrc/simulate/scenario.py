"""The demo cohort: a fictional auditory oddball study, simulated from dipoles to maps.

The Velmora Listening Lab (an invented site) recorded MEG while participants
heard rare and frequent tones; two groups ("control", "patient"), ages 20 to
70, some participants seen twice.  Nothing here is painted onto the maps: for
every participant, session and tone

1. dipole generators with Gaussian waveforms, each with the participant's own
   strength, latency, position and direction jitter, are placed at known
   template locations (``generators`` in the scenario settings);
2. their magnetic field at 128 radial magnetometers is computed with the
   spherical-conductor formula of Sarvas (1987) (:mod:`.forward`);
3. noise of an averaged response is added: spatially correlated background
   brain activity (the field of independent dipoles everywhere in the source
   space, AR(1) in time) plus white sensor noise, each divided by the square
   root of the number of epochs averaged;
4. a regularised minimum-norm inverse, computed once for the shared template
   grid and sensors (:mod:`.inverse`), turns the sensor data into moment
   amplitudes (nA m) on the template grid, written as a 4D NIfTI map.

Built-in ground truth (generator roles): a condition effect (rare > frequent
in both groups), a group-by-condition crossover with no main effect of group
or tone, an age effect in both tones, and an early response common to every
tone, group and age that no contrast should find.  Because minimum-norm maps
are blurred, the truth masks are taken from the noise-free run of the same
simulation, reduced like the analysis (see :func:`noise_free_effects`).

Everything is deterministic from the seed: each random quantity has its own
stream ``numpy.random.default_rng([seed, stream, ...])``, and NIfTI files are
gzip-compressed without a timestamp, so two builds with one seed are
byte-identical.
"""

from __future__ import annotations

import json
import os
import shutil
import sys
import tempfile
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.signal import lfilter

from ..atomic import write_bytes
from ..formats import nifti
from ..sources import TimeAxis, VolumeGrid
from .forward import helmet_sensors, lead_field
from .inverse import InverseOperator, minimum_norm

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

CONDITIONS = ("rare", "frequent")
GROUPS = ("control", "patient")
SIZES = ("default", "small")
ROLES = ("common", "condition", "group_by_condition", "age")
#: truth mask name -> (generator role, analysis contrast)
EFFECTS = {"condition_effect": ("condition", "rare_minus_frequent"),
           "group_by_condition": ("group_by_condition", "group_by_tone"),
           "age_effect": ("age", "age_slope")}
MARKER = ".groupsrc-demo-cohort"
#: top-level entries a build writes (the only ones a rebuild replaces)
OWN_ENTRIES = ("participants.tsv", "maps.tsv", "mask.nii.gz", "maps", "truth",
               "analysis.toml", "scenario.toml", MARKER)
#: random streams (first entry after the seed)
_TABLE, _PARTICIPANT, _NOISE = 0, 1, 2


# ------------------------------------------------------------------ settings

def scenario_settings(path=None) -> dict:
    """Generator settings: the packaged file, or the TOML file at ``path``."""
    if path is None:
        text = resources.files("groupsrc").joinpath("data/demo_scenario.toml").read_text(
            encoding="utf-8")
    else:
        text = Path(path).read_text(encoding="utf-8")
    cfg = tomllib.loads(text)
    _check_settings(cfg)
    return cfg


def _check_settings(cfg: dict) -> None:
    for key in ("seed", "sizes", "head", "participants", "noise", "generators", "truth"):
        if key not in cfg:
            raise ValueError(f"scenario settings lack '{key}'")
    roles = [g.get("role") for g in cfg["generators"]]
    bad = sorted({r for r in roles if r not in ROLES}, key=str)
    if bad:
        raise ValueError(f"unknown generator role(s) {bad}; use one of {list(ROLES)}")
    for role, _ in EFFECTS.values():
        if role not in roles:
            raise ValueError(f"no generator has role '{role}'")
    radius = cfg["head"]["brain_radius_mm"]
    for g in cfg["generators"]:
        if np.linalg.norm(g["position_mm"]) >= radius:
            raise ValueError(f"generator {g['name']} lies outside the brain radius")


def _size(cfg: dict, size: str) -> dict:
    if size not in cfg["sizes"]:
        raise ValueError(f"size must be one of {sorted(cfg['sizes'])}, got {size!r}")
    return cfg["sizes"][size]


# ------------------------------------------------------------------ template

def template_grid(spacing_mm: float, brain_radius_mm: float) -> VolumeGrid:
    """Sphere-shaped source mask on an isotropic grid, sphere centre at the origin.

    Voxel centres sit at odd multiples of half the spacing, so no source lies
    exactly at the centre, where every dipole is silent in MEG.
    """
    half = int(np.ceil(brain_radius_mm / spacing_mm))
    centres = (np.arange(2 * half) - half + 0.5) * spacing_mm
    x, y, z = np.meshgrid(centres, centres, centres, indexing="ij")
    mask = x ** 2 + y ** 2 + z ** 2 <= brain_radius_mm ** 2
    affine = np.diag([spacing_mm, spacing_mm, spacing_mm, 1.0])
    affine[:3, 3] = centres[0]
    return VolumeGrid.from_mask(mask, affine)


def time_axis(cfg: dict, size: str = "default") -> TimeAxis:
    dt = 1.0 / float(_size(cfg, size)["sfreq"])
    head = cfg["head"]
    n = int(round((head["t_stop"] - head["t_start"]) / dt)) + 1
    return TimeAxis(float(head["t_start"]), dt, n)


# ------------------------------------------------------------------ participants

def participants_table(size: str = "default", seed: int | None = None,
                       cfg: dict | None = None) -> pd.DataFrame:
    """The participants table (participant_id, group, age, sex) of a build.

    Ages are stratified within each group (one draw per equal-width age band),
    so both groups span 20 to 70 alike and age is nearly uncorrelated with
    group.  Participant ids are in a random order of the two groups.
    """
    cfg = scenario_settings() if cfg is None else cfg
    seed = int(cfg["seed"] if seed is None else seed)
    n = int(_size(cfg, size)["per_group"])
    pc = cfg["participants"]
    lo, hi = float(pc["age_min"]), float(pc["age_max"])
    rng = np.random.default_rng([seed, _TABLE])
    rows = []
    for group in GROUPS:
        ages = lo + (np.arange(n) + rng.uniform(size=n)) * (hi - lo) / n
        ages = np.clip(np.round(ages), lo, hi).astype(int)[rng.permutation(n)]
        sexes = np.array(["F", "M"] * (n // 2) + list(rng.choice(["F", "M"], n % 2)))
        sexes = sexes[rng.permutation(n)]
        rows += [{"group": group, "age": int(a), "sex": str(s)} for a, s in zip(ages, sexes)]
    rows = [rows[i] for i in rng.permutation(len(rows))]
    df = pd.DataFrame(rows, columns=["group", "age", "sex"])
    width = max(2, len(str(len(df))))
    df.insert(0, "participant_id", [f"sub-{i + 1:0{width}d}" for i in range(len(df))])
    return df


def participants_tsv(df: pd.DataFrame) -> str:
    """The participants table as written (tab-separated, LF line ends)."""
    return df.to_csv(sep="\t", index=False, lineterminator="\n")


def _sessions(parts: pd.DataFrame, cfg: dict, size: str, seed: int) -> np.ndarray:
    """Number of sessions (1 or 2) per participant: a share of each group twice."""
    share = float(_size(cfg, size)["second_session_share"])
    rng = np.random.default_rng([seed, _TABLE, 1])
    out = np.ones(len(parts), int)
    for group in GROUPS:
        idx = np.nonzero(parts["group"].to_numpy() == group)[0]
        k = int(round(share * idx.size))
        out[rng.choice(idx, size=k, replace=False)] = 2
    return out


# ------------------------------------------------------------------ the model

@dataclass
class _Person:
    """One participant's generator parameters (all generators, both sessions)."""
    gain: np.ndarray          # (n_sessions, G) multiplicative strength
    latency: np.ndarray       # (G,) s
    position_m: np.ndarray    # (G, 3) m
    direction: np.ndarray     # (G, 3) unit, tangential
    noise_scale: float


class DemoModel:
    """Sensors, template, gain matrix and inverse operator shared by all participants."""

    def __init__(self, cfg: dict, size: str = "default"):
        self.cfg, self.size = cfg, size
        sz = _size(cfg, size)
        head = cfg["head"]
        self.grid = template_grid(float(sz["spacing_mm"]), float(head["brain_radius_mm"]))
        self.time = time_axis(cfg, size)
        self.times = self.time.times
        self.sensor_pos, self.sensor_ori = helmet_sensors(
            int(head["n_sensors"]), head["sensor_radius_mm"] * 1e-3,
            head["sensor_lowest_z_mm"] * 1e-3)
        self.gens = cfg["generators"]
        L = lead_field(self.grid.coords_mm * 1e-3, self.sensor_pos, self.sensor_ori)
        nz = cfg["noise"]
        m = L.shape[0]
        # background brain activity: independent dipoles of equal variance at every
        # source and orientation -> covariance proportional to L L^T
        brain = L @ L.T
        brain *= (nz["brain_noise_ft"] * 1e-15) ** 2 / np.mean(np.diag(brain))
        white = (nz["sensor_noise_ft"] * 1e-15) ** 2 * np.eye(m)
        epochs = float(nz["epochs"])
        self.cov_brain = brain / epochs       # of an averaged response
        self.cov_white = white / epochs
        self.noise_cov = self.cov_brain + self.cov_white
        ev, evec = np.linalg.eigh(self.cov_brain)
        self._brain_half = evec * np.sqrt(np.clip(ev, 0.0, None))
        self._white_sd = float(np.sqrt(self.cov_white[0, 0]))
        self.ar = float(nz["brain_noise_ar"]) ** (100.0 / float(sz["sfreq"]))
        self.inverse: InverseOperator = minimum_norm(
            L, self.noise_cov, snr=float(nz["inverse_snr"]), depth=float(nz["depth"]),
            depth_limit=float(nz["depth_limit"]))

    # -- participants ---------------------------------------------------------
    def person(self, seed: int, index: int, n_sessions: int, jitter: bool = True) -> _Person:
        pc, radius = self.cfg["participants"], self.cfg["head"]["brain_radius_mm"]
        G = len(self.gens)
        pos = np.array([g["position_mm"] for g in self.gens], float)
        dirs = np.array([g["direction"] for g in self.gens], float)
        gain = np.ones((2, G))
        latency = np.zeros(G)
        noise_scale = 1.0
        if jitter:
            rng = np.random.default_rng([seed, _PARTICIPANT, index])
            gain = np.exp(rng.normal(0.0, pc["gain_sd"], G)
                          + np.vstack([np.zeros(G), rng.normal(0.0, pc["session_gain_sd"], G)]))
            latency = rng.normal(0.0, pc["latency_sd_s"], G)
            pos = pos + rng.normal(0.0, pc["position_sd_mm"], (G, 3))
            dirs = dirs + rng.normal(0.0, np.deg2rad(pc["direction_sd_deg"]), (G, 3))
            noise_scale = float(np.exp(rng.normal(0.0, self.cfg["noise"]["participant_noise_sd"])))
            r = np.linalg.norm(pos, axis=1, keepdims=True)
            limit = radius - 5.0
            pos = np.where(r > limit, pos * limit / r, pos)
        radial = pos / np.linalg.norm(pos, axis=1, keepdims=True)
        dirs = dirs - (dirs * radial).sum(1, keepdims=True) * radial
        dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
        return _Person(gain[:n_sessions], latency, pos * 1e-3, dirs, noise_scale)

    def amplitudes_nAm(self, condition: str, group: str, age: float) -> np.ndarray:
        """Generator amplitudes (G,) of the population model for one tone and person."""
        c = 1.0 if condition == "rare" else -1.0
        g = 1.0 if group == "patient" else -1.0
        ref = float(self.cfg["participants"]["age_ref"])
        out = []
        for gen in self.gens:
            a = gen.get("base_nAm", 0.0)
            a += gen.get("rare_nAm", 0.0) * (condition == "rare")
            a += gen.get("crossover_nAm", 0.0) * c * g
            a += gen.get("age_nAm_per_year", 0.0) * (age - ref)
            out.append(max(a, 0.0))
        return np.array(out)

    def sensor_signal(self, person: _Person, session: int, condition: str, group: str,
                      age: float) -> np.ndarray:
        """Noise-free sensor data (n_sensors, n_times) in T."""
        amp = self.amplitudes_nAm(condition, group, age) * person.gain[session - 1] * 1e-9
        peak = np.array([g["peak_s"] for g in self.gens]) + person.latency
        width = np.array([g["width_s"] for g in self.gens])
        wave = np.exp(-0.5 * ((self.times[None, :] - peak[:, None]) / width[:, None]) ** 2)
        moments = person.direction[:, :, None] * (amp[:, None] * wave)[:, None, :]  # (G,3,T)
        L = lead_field(person.position_m, self.sensor_pos, self.sensor_ori)       # (m, 3G)
        return L @ moments.reshape(-1, self.times.size)

    def noise(self, rng: np.random.Generator, scale: float = 1.0) -> np.ndarray:
        """Noise of one averaged response (n_sensors, n_times) in T."""
        m, n = self.sensor_pos.shape[0], self.times.size
        e = rng.standard_normal((m, n))
        ar = self.ar
        zi = e[:, :1] * ar          # stationary start: x[0] = e[0] (unit variance)
        brain = lfilter([np.sqrt(1 - ar ** 2)], [1.0, -ar], e[:, 1:], axis=1,
                        zi=zi)[0] if n > 1 else np.zeros((m, 0))
        brain = np.concatenate([e[:, :1], brain], axis=1)
        white = rng.standard_normal((m, n)) * self._white_sd
        return scale * (self._brain_half @ brain + white)

    def to_map(self, data) -> np.ndarray:
        """Inverse amplitudes (n_sources, n_times) in nA m, float32."""
        return (self.inverse.amplitude(data) * 1e9).astype(np.float32)


# ------------------------------------------------------------------ simulation

@dataclass
class Simulation:
    """Everything a build computes, before any file is written."""
    model: DemoModel
    participants: pd.DataFrame
    sessions: np.ndarray               # 1 or 2 per participant
    maps: pd.DataFrame                 # participant_id, condition, session, path
    data: list                         # float32 (n_sources, n_times) per maps row
    seed: int
    size: str


def simulate(size: str = "default", seed: int | None = None, cfg: dict | None = None,
             noise: bool = True) -> Simulation:
    """Simulate every map of the cohort in memory (``noise=False``: without noise)."""
    cfg = scenario_settings() if cfg is None else cfg
    seed = int(cfg["seed"] if seed is None else seed)
    model = DemoModel(cfg, size)
    parts = participants_table(size, seed, cfg)
    sessions = _sessions(parts, cfg, size, seed)
    rows, sensor_data = [], []
    for i, p in enumerate(parts.itertuples(index=False)):
        person = model.person(seed, i, int(sessions[i]))
        for ses in range(1, int(sessions[i]) + 1):
            for c_i, cond in enumerate(CONDITIONS):
                b = model.sensor_signal(person, ses, cond, p.group, p.age)
                if noise:
                    rng = np.random.default_rng([seed, _NOISE, i, ses, c_i])
                    b = b + model.noise(rng, person.noise_scale)
                sensor_data.append(b)
                name = f"{p.participant_id}_ses-{ses}_cond-{cond}.nii.gz"
                rows.append({"participant_id": p.participant_id, "condition": cond,
                             "session": str(ses), "path": f"maps/{name}"})
    data = []
    for start in range(0, len(sensor_data), 16):     # one operator, batches of maps
        amp = model.to_map(np.stack(sensor_data[start:start + 16], axis=1))
        data += [np.ascontiguousarray(amp[:, k]) for k in range(amp.shape[1])]
    return Simulation(model, parts, sessions, pd.DataFrame(rows), data, seed, size)


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
    response: per source, ``sigma_j^2 = trace(W_j C W_j^T) / 2``, the noise
    variance of one tangential moment component of the estimate.  Between-
    participant variability would only make the real t smaller.  Minimum-norm
    maps are much less noisy at deep sources than near the sensors, so a faint
    blurred copy of an effect can be detectable far from its generator; this
    is what the no-effect region must avoid.
    """
    W, C = model.inverse.W, model.noise_cov
    sigma = np.sqrt(np.einsum("ij,ij->i", W @ C, W).reshape(-1, 3).sum(axis=1) / 2) * 1e9
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


# ------------------------------------------------------------------ files

def _nifti_gz(data, affine, dt=None, t0=None, descrip="") -> bytes:
    """A gzip-compressed NIfTI-1 image as bytes (no timestamp: reproducible)."""
    return nifti.gz_bytes(nifti.grid_image(data, affine, dt, t0, descrip))


def _write(path: Path, payload) -> None:
    """Write bytes or text atomically (see :mod:`groupsrc.atomic`)."""
    write_bytes(path, payload.encode("utf-8") if isinstance(payload, str) else payload)


def check_cohort_target(out: Path, problems, option: str = "the cohort folder") -> None:
    """Add a problem when ``out`` may not receive a demo build.

    ``out`` must be new, empty or a previous demo build (it holds the build
    marker); a folder of anything else is never written into.
    """
    out = Path(out)
    if out.exists() and not out.is_dir():
        problems.add(out, "exists and is not a folder", f"choose another {option}")
    elif out.is_dir() and any(out.iterdir()) and not (out / MARKER).exists():
        problems.add(out, "the folder is not empty and was not built by 'groupsrc demo'; "
                     "nothing was written", f"choose a new or empty {option}")


def _check_target(out: Path) -> None:
    from ..inputs.problems import InputError, ProblemList
    problems = ProblemList()
    check_cohort_target(out, problems)
    if problems:
        raise InputError(problems)


def _install(staging: Path, out: Path) -> None:
    """Move the built entries into ``out``, replacing only a previous build's entries."""
    out.mkdir(parents=True, exist_ok=True)
    for name in OWN_ENTRIES:
        src, dst = staging / name, out / name
        if not src.exists():
            continue
        if dst.is_dir() and not dst.is_symlink():
            old = out / f".{name}.old-{os.getpid()}"
            os.replace(dst, old)
            os.replace(src, dst)
            shutil.rmtree(old)
        else:
            os.replace(src, dst)


def build_demo_cohort(out_dir, size: str = "default", seed: int | None = None) -> Path:
    """Simulate the demo cohort into ``out_dir``; return the path of its analysis.toml.

    Writes participants.tsv, maps.tsv, mask.nii.gz, maps/*.nii.gz (float32 4D,
    x, y, z, time; moment amplitude in nA m), truth/*.nii.gz (uint8 masks, and
    the noise-free effect maps), truth/truth.json, analysis.toml and the
    scenario settings used (scenario.toml).  ``out_dir`` must be new, empty or
    a previous demo build; a rebuild replaces only the entries a build writes
    (a results folder made inside it is kept).  Files are assembled in a
    temporary folder beside ``out_dir`` and renamed into place.
    """
    cfg = scenario_settings()
    sz = _size(cfg, size)
    seed = int(cfg["seed"] if seed is None else seed)
    out = Path(out_dir).absolute()
    _check_target(out)
    sim = simulate(size, seed, cfg)
    effects = noise_free_effects(sim.model)
    masks, info = truth_masks(sim.model, sim.participants, effects)
    grid, t = sim.model.grid, sim.model.time
    aff = grid.affine

    out.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(dir=out.parent, prefix=f".{out.name}.building-"))
    try:
        for row, m in zip(sim.maps.itertuples(index=False), sim.data):
            _write(staging / row.path, _nifti_gz(grid.to_volume(m), aff, t.dt, t.t0,
                                                 "groupsrc demo: minimum-norm amplitude, nA m"))
        _write(staging / "participants.tsv", participants_tsv(sim.participants))
        _write(staging / "maps.tsv", sim.maps.to_csv(sep="\t", index=False, lineterminator="\n"))
        _write(staging / "mask.nii.gz", _nifti_gz(grid.mask.astype(np.uint8), aff,
                                                  descrip="groupsrc demo: source mask"))
        for name, mask in masks.items():
            _write(staging / "truth" / f"{name}.nii.gz",
                   _nifti_gz(grid.to_volume(mask.astype(np.uint8)), aff,
                             descrip=f"groupsrc demo truth: {name}"))
        for name in EFFECTS:
            _write(staging / "truth" / f"noise_free_{name}.nii.gz",
                   _nifti_gz(grid.to_volume(effects[name].astype(np.float32)), aff, t.dt,
                             t.t0, f"groupsrc demo: noise-free {name}"))
        record = {"study": cfg["study"], "size": size, "seed": seed,
                  "rule": ("effect region: sources whose noise-free |effect| over time "
                           f"reaches {cfg['truth']['effect_fraction']:g} of its maximum; "
                           "no-effect region: every effect below "
                           f"{cfg['truth']['quiet_fraction']:g} of its maximum, its expected "
                           f"t below {cfg['truth']['quiet_expected_t']:g} at every time, and "
                           f"at least {cfg['truth']['quiet_distance_mm']:g} mm from every "
                           "effect generator"),
                  "grid": {"spacing_mm": float(sz["spacing_mm"]), "n_sources": grid.n_sources},
                  "time": {"t0_s": t.t0, "dt_s": t.dt, "n": t.n},
                  "effects": {k: info[k] for k in EFFECTS},
                  "no_effect": info["no_effect"]}
        _write(staging / "truth" / "truth.json", json.dumps(record, indent=2) + "\n")
        _write(staging / "analysis.toml", analysis_text(cfg, size))
        _write(staging / "scenario.toml",
               f"# settings of this build: size = {size!r}, seed = {seed}\n"
               + resources.files("groupsrc").joinpath("data/demo_scenario.toml").read_text(
                   encoding="utf-8"))
        _write(staging / MARKER, json.dumps({"size": size, "seed": seed}) + "\n")
        _check_target(out)                 # nothing appeared there meanwhile
        _install(staging, out)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return out / "analysis.toml"


def demo_truth(cohort_dir) -> dict:
    """Read a built cohort's truth: ``{"masks": {name: bool (x, y, z)}, "info": dict}``."""
    root = Path(cohort_dir)
    if root.suffix == ".toml":
        root = root.parent
    info = json.loads((root / "truth" / "truth.json").read_text(encoding="utf-8"))
    masks = {}
    for name in list(EFFECTS) + ["no_effect"]:
        masks[name] = nifti.read_volume(root / "truth" / f"{name}.nii.gz") > 0
    return {"masks": masks, "info": info}


def analysis_text(cfg: dict, size: str) -> str:
    sz = _size(cfg, size)
    return f'''# Analysis of the groupsrc demo cohort ({size} size): {cfg["study"]}.
# Every key is described in the groupsrc README.
title = "Velmora Listening Lab: rare versus frequent tones in patients and controls (demo)"

[cohort]
participants = "participants.tsv"
maps = "maps.tsv"
mask = "mask.nii.gz"

[model]
between = "group + age"
within = "condition"

[[contrasts]]
name = "rare_minus_frequent"
description = "rare minus frequent tones, the two groups weighted equally"
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
resamples = {int(sz["resamples"])}
seed = 20261201
forming_p = {float(sz["forming_p"])}
alpha = 0.05
tails = "two"
time_window = [0.0, 0.6]
neighbors = "face"
'''
