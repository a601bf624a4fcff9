"""The surface demo as arrays: folded cortex, patches of current, MEG, minimum norm.

The same fictional study as :mod:`.model` (the Velmora Listening Lab oddball
study: the same participants, tones, groups, ages and effects), with its
sources on a synthetic folded cortex (:mod:`.cortex`) and oriented normal to
it.  For every participant, session and tone:

1. each generator is a patch of cortex around a sulcal-wall vertex (current
   along the outward normal, Gaussian weights over the distance along the
   mesh), with the participant's own strength, latency and patch position;
2. its field at the radial magnetometers of a helmet-like cap comes from the
   spherical-conductor formula of Sarvas (1987) (:func:`.forward.lead_field`,
   projected on each vertex's normal) -- a source at a gyral crown, whose
   normal is radial, is (nearly) silent;
3. noise of an averaged response as in :mod:`.model` (background activity of
   independent normal sources on the whole cortex, AR(1) in time, plus white
   sensor noise);
4. minimum-norm weights for sources fixed normal to the cortex
   (:func:`normal_minimum_norm`) turn the sensor data into the signed moment
   along the outward normal (nA m) at every source vertex.

Conventions: SI units inside the forward model; positions in mm elsewhere;
maps are ``(n_vertices_total, n_times)`` float32 in nA m, the left
hemisphere's vertices first, 0 on the medial face (not a source).  Random
streams as in :mod:`.model` (``[seed, stream, ...]``), so a map does not depend
on how many others are simulated.  No file is read or written here.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass
from importlib import resources

import numpy as np
import pandas as pd

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

from .cortex import build_cortex, geodesic, vertex_graph
from .forward import helmet_sensors, lead_field
from .inverse import minimum_norm_weights
from .model import _NOISE, _PARTICIPANT, DemoModel, _sessions, participants_table, time_axis
from .settings import CONDITIONS, EFFECTS, ROLES, size_settings

SECTIONS = ("seed", "sizes", "head", "cortex", "participants", "noise", "inverse",
            "generators", "truth")


# ------------------------------------------------------------------ settings

def packaged_text() -> str:
    return resources.files("groupsrc").joinpath("data/demo_surface_scenario.toml").read_text(
        encoding="utf-8")


def surface_settings() -> dict:
    """The packaged surface scenario settings, checked."""
    cfg = tomllib.loads(packaged_text())
    for key in SECTIONS:
        if key not in cfg:
            raise ValueError(f"surface scenario settings lack '{key}'")
    roles = [g.get("role") for g in cfg["generators"]]
    if any(r not in ROLES for r in roles) or any(r not in roles for r, _ in EFFECTS.values()):
        raise ValueError(f"generator roles {roles} must cover {list(ROLES)}")
    for g in cfg["generators"]:
        if g.get("hemisphere") not in ("left", "right") or g.get("polarity") not in (1, -1, 1.0,
                                                                                    -1.0):
            raise ValueError(f"generator {g.get('name')}: hemisphere left/right, polarity +-1")
    return cfg


# ------------------------------------------------------------------ inverse on the normal

@dataclass(frozen=True)
class NormalMinimumNorm:
    """Minimum-norm weights for sources fixed along the cortex normal.

    ``matrix`` is ``(n_sources, n_sensors)``: row ``j`` gives the signed moment
    along source ``j``'s normal.  :meth:`amplitude` is the map value (the
    name follows :class:`.inverse.MinimumNormWeights`, whose map value is an
    amplitude; here it is signed).
    """

    matrix: np.ndarray
    ridge: float

    def amplitude(self, data) -> np.ndarray:
        return np.tensordot(self.matrix, np.asarray(data, float), axes=(1, 0))


def normal_minimum_norm(gain_normal, noise_covariance, **options) -> NormalMinimumNorm:
    """Fixed-orientation minimum norm through :func:`.inverse.minimum_norm_weights`.

    The normal gain ``(m, n)`` is given as three columns per source whose other
    two are zero: the whitened gain power, the prior and ``L R L^T`` are then
    those of the normal sources alone, and the rows of the normal component
    are the fixed-orientation weights (Hamalainen & Ilmoniemi 1994).
    """
    m, n = gain_normal.shape
    padded = np.zeros((m, 3 * n))
    padded[:, 0::3] = gain_normal
    w = minimum_norm_weights(padded, noise_covariance, **options)
    return NormalMinimumNorm(np.ascontiguousarray(w.matrix[0::3]), w.ridge)


def normal_gain(positions_mm, normals, sensor_pos, sensor_ori, chunk=4000) -> np.ndarray:
    """(m, n) field (T per A m) of a unit dipole along each vertex's normal."""
    out = np.empty((sensor_pos.shape[0], positions_mm.shape[0]))
    for a in range(0, positions_mm.shape[0], chunk):
        b = min(a + chunk, positions_mm.shape[0])
        L = lead_field(positions_mm[a:b] * 1e-3, sensor_pos, sensor_ori)
        out[:, a:b] = np.einsum("mjk,jk->mj", L.reshape(L.shape[0], -1, 3), normals[a:b])
    return out


# ------------------------------------------------------------------ the model

@dataclass
class _Person:
    gain: np.ndarray          # (n_sessions, G)
    latency: np.ndarray       # (G,) s
    patches: list             # per generator: (vertex indices, weights x polarity)
    noise_scale: float


def patch_centre(cortex, gen) -> int:
    """The vertex with the most tangential normal within search_mm of the target."""
    pos = cortex.positions
    n_left = cortex.space.hemispheres[0].n_vertices
    on = np.arange(len(pos)) < n_left if gen["hemisphere"] == "left" else \
        np.arange(len(pos)) >= n_left
    candidates = np.flatnonzero(on & ~cortex.medial & (np.linalg.norm(
        pos - np.asarray(gen["target_mm"], float), axis=1) <= gen["search_mm"]))
    if candidates.size == 0:
        raise ValueError(f"generator {gen['name']}: no source within search_mm of its target")
    return int(candidates[np.argmin(cortex.radiality[candidates])])


class SurfaceDemoModel(DemoModel):
    """Sensors, cortex, normal gain, noise and inverse shared by all participants.

    Reuses :class:`.model.DemoModel`'s amplitudes, time courses, noise and ``to_map``; the
    geometry and generators are its own.  ``source`` marks the vertices that
    are sources (the cortex without its medial face); maps hold 0 elsewhere.
    """

    def __init__(self, cfg: dict, size: str = "default"):
        self.cfg, self.size = cfg, size
        sz = size_settings(cfg, size)
        head = cfg["head"]
        self.cortex = build_cortex(int(sz["mesh_order"]), cfg["cortex"], int(cfg["seed"]))
        self.space = self.cortex.space
        self.grid = self.space
        self.source = ~self.cortex.medial
        self.time = time_axis(cfg, size)
        self.times = self.time.times
        self.sensor_pos, self.sensor_ori = helmet_sensors(
            int(head["n_sensors"]), head["sensor_radius_mm"] * 1e-3,
            head["sensor_lowest_z_mm"] * 1e-3)
        self.gens = cfg["generators"]
        self.graph = vertex_graph(self.space)
        self.gain = normal_gain(self.cortex.positions, self.cortex.normals, self.sensor_pos,
                                self.sensor_ori)
        L = self.gain[:, self.source]
        nz = cfg["noise"]
        m = L.shape[0]
        brain = L @ L.T                        # independent normal sources everywhere
        brain *= (nz["brain_noise_ft"] * 1e-15) ** 2 / np.mean(np.diag(brain))
        white = (nz["sensor_noise_ft"] * 1e-15) ** 2 * np.eye(m)
        epochs = float(nz["epochs"])
        self.cov_brain, self.cov_white = brain / epochs, white / epochs
        self.noise_covariance = self.cov_brain + self.cov_white
        ev, evec = np.linalg.eigh(self.cov_brain)
        self._brain_half = evec * np.sqrt(np.clip(ev, 0.0, None))
        self._white_sd = float(np.sqrt(self.cov_white[0, 0]))
        self.ar = float(nz["brain_noise_ar"]) ** (100.0 / float(sz["sfreq"]))
        inv = cfg["inverse"]
        on_sources = normal_minimum_norm(L, self.noise_covariance,
                                         regularisation=float(inv["regularisation"]),
                                         depth_exponent=float(inv["depth_exponent"]),
                                         gain_floor=float(inv["gain_floor"]))
        full = np.zeros((len(self.source), m))
        full[self.source] = on_sources.matrix
        self.inverse = NormalMinimumNorm(full, on_sources.ridge)
        self.centres = [patch_centre(self.cortex, g) for g in self.gens]

    def _patch(self, centre, gen):
        radius = float(gen["patch_radius_mm"])
        d = geodesic(self.graph, centre, radius)
        idx = np.flatnonzero(np.isfinite(d) & self.source)
        w = np.exp(-0.5 * (d[idx] / (radius / 2)) ** 2)
        return idx, float(gen["polarity"]) * w / w.sum()

    def _moved_centre(self, rng, centre, sd):
        """A vertex near ``centre`` shifted by a random offset (sd per axis), along the mesh."""
        pos = self.cortex.positions
        near = geodesic(self.graph, centre, 3 * sd)
        cand = np.flatnonzero(np.isfinite(near) & self.source)
        target = pos[centre] + rng.normal(0.0, sd, 3)
        return int(cand[np.argmin(np.linalg.norm(pos[cand] - target, axis=1))])

    def person(self, seed: int, index: int, n_sessions: int, jitter: bool = True) -> _Person:
        pc, G = self.cfg["participants"], len(self.gens)
        gain, latency, noise_scale = np.ones((2, G)), np.zeros(G), 1.0
        centres = list(self.centres)
        if jitter:
            rng = np.random.default_rng([seed, _PARTICIPANT, index])
            gain = np.exp(rng.normal(0.0, pc["gain_sd"], G)
                          + np.vstack([np.zeros(G), rng.normal(0.0, pc["session_gain_sd"], G)]))
            latency = rng.normal(0.0, pc["latency_sd_s"], G)
            centres = [self._moved_centre(rng, c, float(pc["position_sd_mm"])) for c in centres]
            noise_scale = float(np.exp(rng.normal(0.0, self.cfg["noise"]["participant_noise_sd"])))
        patches = [self._patch(c, g) for c, g in zip(centres, self.gens)]
        return _Person(gain[:n_sessions], latency, patches, noise_scale)

    def sensor_signal(self, person: _Person, session: int, condition: str, group: str,
                      age: float) -> np.ndarray:
        """Noise-free sensor data (n_sensors, n_times) in T."""
        courses = self.time_courses(person, session, condition, group, age)
        out = np.zeros((self.gain.shape[0], self.times.size))
        for (idx, w), course in zip(person.patches, courses):
            out += np.outer(self.gain[:, idx] @ w, course)
        return out


# ------------------------------------------------------------------ simulation

@dataclass
class SurfaceSimulation:
    """The cohort's tables and model; maps come one at a time from :meth:`maps_iter`."""
    model: SurfaceDemoModel
    participants: pd.DataFrame
    sessions: np.ndarray
    maps: pd.DataFrame                 # participant_id, condition, session, path_left, path_right
    seed: int
    size: str

    def maps_iter(self, noise: bool = True, batch: int = 16):
        """(maps-table row, (n_vertices_total, n_times) float32 nA m), in table order."""
        model, seed = self.model, self.seed
        keys = [(i, int(ses), c_i) for i, n in enumerate(self.sessions)
                for ses in range(1, int(n) + 1) for c_i in range(len(CONDITIONS))]
        rows = list(self.maps.itertuples(index=False))
        people = {}
        for start in range(0, len(keys), batch):
            data = []
            for i, ses, c_i in keys[start:start + batch]:
                p = self.participants.iloc[i]
                if i not in people:
                    people = {i: model.person(seed, i, int(self.sessions[i]))}
                b = model.sensor_signal(people[i], ses, CONDITIONS[c_i], p.group, p.age)
                if noise:
                    rng = np.random.default_rng([seed, _NOISE, i, ses, c_i])
                    b = b + model.noise(rng, people[i].noise_scale)
                data.append(b)
            amp = model.to_map(np.stack(data, axis=1))
            for k in range(amp.shape[1]):
                yield rows[start + k], np.ascontiguousarray(amp[:, k])


def simulate_surface(size: str = "default", seed: int | None = None,
                     cfg: dict | None = None) -> SurfaceSimulation:
    """The model and tables of a surface cohort (maps are computed lazily)."""
    cfg = surface_settings() if cfg is None else cfg
    seed = int(cfg["seed"] if seed is None else seed)
    model = SurfaceDemoModel(cfg, size)
    parts = participants_table(size, seed, cfg)
    sessions = _sessions(parts, cfg, size, seed)
    rows = []
    for i, p in enumerate(parts.itertuples(index=False)):
        for ses in range(1, int(sessions[i]) + 1):
            for cond in CONDITIONS:
                stem = f"maps/{p.participant_id}_ses-{ses}_cond-{cond}"
                rows.append({"participant_id": p.participant_id, "condition": cond,
                             "session": str(ses), "path_left": f"{stem}.left.func.gii",
                             "path_right": f"{stem}.right.func.gii"})
    return SurfaceSimulation(model, parts, sessions, pd.DataFrame(rows), seed, size)
