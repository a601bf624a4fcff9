"""The demo scenario as arrays: template, participants, generators, noise, maps.

The Velmora Listening Lab (an invented site) recorded MEG while participants
heard rare and frequent tones; two groups ("control", "patient"), ages 20 to
70, some participants seen twice.  Nothing is painted onto the maps: for
every participant, session and tone

1. dipole generators with Gaussian waveforms, each with the participant's own
   strength, latency, position and direction jitter, are placed at known
   template locations (``generators`` in the scenario settings);
2. their magnetic field at the radial magnetometers of a helmet-like cap is
   computed with the spherical-conductor formula of Sarvas (1987)
   (:mod:`.forward`);
3. noise of an averaged response is added: spatially correlated background
   brain activity (the field of independent dipoles everywhere in the source
   space, AR(1) in time) plus white sensor noise, each divided by the square
   root of the number of epochs averaged;
4. regularised minimum-norm weights (Hamalainen & Ilmoniemi 1994), computed
   once for the shared template grid and sensors (:mod:`.inverse`), turn the
   sensor data into moment amplitudes (nA m) on the template grid.

Conventions: SI units inside the forward model (m, A m, T); template
coordinates in mm; maps are ``(n_sources, n_times)`` float32 in nA m, source
``k`` being voxel ``grid.ijk[k]``.  Everything is deterministic from the
seed: each random quantity has its own stream
``numpy.random.default_rng([seed, stream, ...])`` (streams below).

No file is read or written here (the settings come as a dict, by default
from :mod:`.settings`); :mod:`.truth` derives the ground truth from these
arrays and :mod:`.build` writes the files.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.signal import lfilter

from ..sources import TimeAxis, VolumeGrid
from .forward import helmet_sensors, lead_field
from .inverse import MinimumNormWeights, minimum_norm_weights
from .settings import CONDITIONS, GROUPS, scenario_settings, size_settings

#: random streams (first entry after the seed)
_TABLE, _PARTICIPANT, _NOISE = 0, 1, 2


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
    """Sample times of the maps: ``t_start`` to ``t_stop`` (s) at the size's rate."""
    dt = 1.0 / float(size_settings(cfg, size)["sfreq"])
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
    n = int(size_settings(cfg, size)["per_group"])
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


def _sessions(parts: pd.DataFrame, cfg: dict, size: str, seed: int) -> np.ndarray:
    """Number of sessions (1 to 3) per participant: a share of each group twice, and a
    (smaller) share of those a third time."""
    sz = size_settings(cfg, size)
    share = float(sz["second_session_share"])
    third = float(sz.get("third_session_share", 0.0))
    rng = np.random.default_rng([seed, _TABLE, 1])
    out = np.ones(len(parts), int)
    twice = {}
    for group in GROUPS:
        idx = np.nonzero(parts["group"].to_numpy() == group)[0]
        k = int(round(share * idx.size))
        twice[group] = rng.choice(idx, size=k, replace=False)
        out[twice[group]] = 2
    for group in GROUPS:                       # drawn after the second sessions: those stay
        k = min(int(round(third * (out.size // len(GROUPS)))), twice[group].size)
        if k:
            out[rng.choice(twice[group], size=k, replace=False)] = 3
    return out


def _missing_condition(parts: pd.DataFrame, sessions, cfg: dict, size: str, seed: int) -> set:
    """Participants whose frequent-tone maps are missing: patients seen once."""
    k = int(size_settings(cfg, size).get("missing_condition", 0))
    if not k:
        return set()
    rng = np.random.default_rng([seed, _TABLE, 2])
    idx = np.nonzero((parts["group"].to_numpy() == "patient") & (sessions == 1))[0]
    return set(parts["participant_id"].to_numpy()[rng.choice(idx, size=k, replace=False)])


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
    """Sensors, template, gain matrix, noise and minimum-norm weights shared by all participants.

    ``noise_covariance`` (T^2) is that of one averaged response: background
    brain activity (covariance proportional to ``L L^T``) plus white sensor
    noise, each divided by the number of epochs.  ``inverse`` holds the
    minimum-norm weights built from it with the ``[inverse]`` settings.
    """

    def __init__(self, cfg: dict, size: str = "default"):
        self.cfg, self.size = cfg, size
        sz = size_settings(cfg, size)
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
        self.noise_covariance = self.cov_brain + self.cov_white
        ev, evec = np.linalg.eigh(self.cov_brain)
        self._brain_half = evec * np.sqrt(np.clip(ev, 0.0, None))
        self._white_sd = float(np.sqrt(self.cov_white[0, 0]))
        self.ar = float(nz["brain_noise_ar"]) ** (100.0 / float(sz["sfreq"]))
        inv = cfg["inverse"]
        self.inverse: MinimumNormWeights = minimum_norm_weights(
            L, self.noise_covariance, regularisation=float(inv["regularisation"]),
            depth_exponent=float(inv["depth_exponent"]), gain_floor=float(inv["gain_floor"]))

    # -- participants ---------------------------------------------------------
    def person(self, seed: int, index: int, n_sessions: int, jitter: bool = True) -> _Person:
        pc, radius = self.cfg["participants"], self.cfg["head"]["brain_radius_mm"]
        G = len(self.gens)
        pos = np.array([g["position_mm"] for g in self.gens], float)
        dirs = np.array([g["direction"] for g in self.gens], float)
        gain = np.ones((3, G))
        latency = np.zeros(G)
        noise_scale = 1.0
        if jitter:
            rng = np.random.default_rng([seed, _PARTICIPANT, index])
            base = rng.normal(0.0, pc["gain_sd"], G)
            gain = np.exp(base + np.vstack([np.zeros(G),
                                            rng.normal(0.0, pc["session_gain_sd"], G)]))
            latency = rng.normal(0.0, pc["latency_sd_s"], G)
            pos = pos + rng.normal(0.0, pc["position_sd_mm"], (G, 3))
            dirs = dirs + rng.normal(0.0, np.deg2rad(pc["direction_sd_deg"]), (G, 3))
            noise_scale = float(np.exp(rng.normal(0.0, self.cfg["noise"]["participant_noise_sd"])))
            if n_sessions > 2:   # drawn last, so a third session changes nothing else
                third = np.exp(base + rng.normal(0.0, pc["session_gain_sd"], G))
                gain = np.vstack([gain, third])
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

    def time_courses(self, person: _Person, session: int, condition: str, group: str,
                     age: float) -> np.ndarray:
        """Generator moments over time (G, n_times) in A m: amplitude x Gaussian wave."""
        amp = self.amplitudes_nAm(condition, group, age) * person.gain[session - 1] * 1e-9
        peak = np.array([g["peak_s"] for g in self.gens]) + person.latency
        width = np.array([g["width_s"] for g in self.gens])
        wave = np.exp(-0.5 * ((self.times[None, :] - peak[:, None]) / width[:, None]) ** 2)
        return amp[:, None] * wave

    def sensor_signal(self, person: _Person, session: int, condition: str, group: str,
                      age: float) -> np.ndarray:
        """Noise-free sensor data (n_sensors, n_times) in T."""
        courses = self.time_courses(person, session, condition, group, age)
        moments = person.direction[:, :, None] * courses[:, None, :]              # (G,3,T)
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
        """Minimum-norm moment amplitudes (n_sources, ...) in nA m, float32, for data in T."""
        return (self.inverse.amplitude(data) * 1e9).astype(np.float32)


# ------------------------------------------------------------------ simulation

@dataclass
class Simulation:
    """Everything a build computes, before any file is written."""
    model: DemoModel
    participants: pd.DataFrame
    sessions: np.ndarray               # 1 to 3 per participant
    maps: pd.DataFrame                 # participant_id, condition, session, path
    data: list                         # float32 (n_sources, n_times) per maps row
    seed: int
    size: str


def simulate(size: str = "default", seed: int | None = None, cfg: dict | None = None,
             noise: bool = True) -> Simulation:
    """Simulate every map of the cohort in memory (``noise=False``: without noise).

    One map per participant, session and tone, in the order of the maps
    table (participants as in :func:`participants_table`, then sessions,
    then tones rare, frequent) -- except the frequent tone of the patients
    the size's ``missing_condition`` picks (seen once); ``path`` is where :mod:`.build` writes it,
    relative to the cohort folder.  The noise of map (participant ``i``,
    session ``s``, tone ``c``) comes from the stream ``[seed, 2, i, s, c]``, so
    a map does not depend on how many others are simulated.
    """
    cfg = scenario_settings() if cfg is None else cfg
    seed = int(cfg["seed"] if seed is None else seed)
    model = DemoModel(cfg, size)
    parts = participants_table(size, seed, cfg)
    sessions = _sessions(parts, cfg, size, seed)
    lacking = _missing_condition(parts, sessions, cfg, size, seed)
    rows, sensor_data = [], []
    for i, p in enumerate(parts.itertuples(index=False)):
        person = model.person(seed, i, int(sessions[i]))
        for ses in range(1, int(sessions[i]) + 1):
            for c_i, cond in enumerate(CONDITIONS):
                if cond == "frequent" and p.participant_id in lacking:
                    continue
                b = model.sensor_signal(person, ses, cond, p.group, p.age)
                if noise:
                    rng = np.random.default_rng([seed, _NOISE, i, ses, c_i])
                    b = b + model.noise(rng, person.noise_scale)
                sensor_data.append(b)
                name = f"{p.participant_id}_ses-{ses}_cond-{cond}.nii.gz"
                rows.append({"participant_id": p.participant_id, "condition": cond,
                             "session": str(ses), "path": f"maps/{name}"})
    data = []
    for start in range(0, len(sensor_data), 16):     # one weight matrix, batches of maps
        amp = model.to_map(np.stack(sensor_data[start:start + 16], axis=1))
        data += [np.ascontiguousarray(amp[:, k]) for k in range(amp.shape[1])]
    return Simulation(model, parts, sessions, pd.DataFrame(rows), data, seed, size)
