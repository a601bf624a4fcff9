"""A synthetic folded cortex of our own: two hemispheres made from subdivided icosahedra.

Each hemisphere starts as the smooth surface of a half-ball -- the part of a
ball of radius ``radius_mm`` around the origin (the centre of the spherical
conductor) on its side of the midline, with a flattened base -- and is then
folded: every point moves along the smooth surface's normal by

    fold_depth_mm / 2 * tanh(sharpness * s(p))

(except on the medial wall: an ellipse of the medial face, ``wall_size_mm``
half-axes about ``wall_centre_mm`` in (y, z), where a real hemisphere joins the
rest of the brain; it stays flat and is not a source)
where ``s`` is a sum of plane waves in space evaluated on the smooth surface
(random directions and phases from the seed, wavelength ``fold_wavelength_mm``).  Positive ``s`` gives gyri (crowns pushed out), negative
``s`` sulci (pushed in); ``tanh`` makes crowns and fundi broad and the walls
between them steep.

Consequences the demo relies on (checked in tests/test_surface_demo.py):

* on the outer face the smooth surface is a sphere about the conductor's
  centre, so a gyral crown's normal is radial, and a source oriented normal to
  the cortex there is (nearly) silent in MEG (Sarvas 1987: a radial dipole in
  a spherically symmetric conductor gives no external field); sulcal walls
  are tilted and their sources are seen;
* each hemisphere is a closed genus-0 surface (V - E + F = 2), since it is a
  star-shaped deformation of a sphere;
* the medial wall is left out of the demo's source mask, as templates
  usually leave out theirs.

Units: mm; x to the right, y to the front, z up (as the volume demo).
No file is read or written here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.sparse.csgraph import dijkstra

from ..sources.surface import Hemisphere, SurfaceMesh, icosphere, vertex_normals

#: labels of the demo's invented atlas (GIfTI label table of the build); 0 = none
ATLAS = {0: "none", 1: "frontal", 2: "central", 3: "parietal", 4: "temporal",
         5: "occipital", 6: "medial"}


@dataclass(frozen=True)
class Cortex:
    """The folded hemispheres and what the demo needs of them."""

    space: SurfaceMesh            # every vertex of both hemispheres; mask = the demo's sources
    normals: np.ndarray           # (n_vertices_total, 3) unit outward normals, left then right
    radiality: np.ndarray         # |normal . position / |position||, per vertex
    medial: np.ndarray            # bool per vertex: on the medial wall (not a source)
    atlas: np.ndarray             # int per vertex (ATLAS keys)

    @property
    def positions(self) -> np.ndarray:
        return np.concatenate([h.vertices for h in self.space.hemispheres])


def _smooth_body(p, sign, cfg):
    """Smooth-maximum constraint value (< 0 inside) of a hemisphere's half-ball."""
    R, g = cfg["radius_mm"], cfg["midline_gap_mm"]
    floor, s = cfg["base_mm"], cfg["rim_softness_mm"]
    terms = np.stack([np.linalg.norm(p, axis=-1) - R, -sign * p[..., 0] + g, -p[..., 2] - floor])
    top = terms.max(axis=0)
    return top + s * np.log(np.exp((terms - top) / s).sum(axis=0))


def _gradient(p, sign, cfg, h=1e-3):
    grad = np.stack([(_smooth_body(p + h * e, sign, cfg) - _smooth_body(p - h * e, sign, cfg))
                     / (2 * h) for e in np.eye(3)], axis=-1)
    return grad / np.linalg.norm(grad, axis=-1, keepdims=True)


def _base_surface(u, sign, cfg):
    """Points where rays from inside the half-ball along ``u`` meet its smooth surface."""
    R, g = cfg["radius_mm"], cfg["midline_gap_mm"]
    centre = np.array([sign * (g + 0.4 * (R - g)), 0.0, 0.1 * R])
    lo, hi = np.zeros(len(u)), np.full(len(u), 2.5 * R)
    for _ in range(60):                       # the constraint is convex along each ray
        mid = (lo + hi) / 2
        inside = _smooth_body(centre + mid[:, None] * u, sign, cfg) < 0
        lo, hi = np.where(inside, mid, lo), np.where(inside, hi, mid)
    return centre + ((lo + hi) / 2)[:, None] * u


def folding_pattern(points_mm, cfg, seed):
    """s(p): a sum of plane waves in space (random directions and phases), about
    unit variance; on a surface its crests and troughs form a labyrinth whose
    spacing is about ``fold_wavelength_mm`` in every direction."""
    rng = np.random.default_rng([seed, 7])
    k = 2 * np.pi / cfg["fold_wavelength_mm"]
    n = int(cfg["fold_waves"])
    w = rng.standard_normal((n, 3))
    w /= np.linalg.norm(w, axis=1, keepdims=True)
    phase = rng.uniform(0, 2 * np.pi, n)
    return np.cos(k * points_mm @ w.T + phase).sum(axis=1) / np.sqrt(n / 2)


def hemisphere(name, order, cfg, seed):
    """(vertices (V, 3) mm, triangles (F, 3), medial wall bool (V,)) of one hemisphere."""
    sign = -1.0 if name == "left" else 1.0
    u, tri = icosphere(order)
    base = _base_surface(u, sign, cfg)
    normal = _gradient(base, sign, cfg)
    s = folding_pattern(base, cfg, seed)
    depth = 0.5 * cfg["fold_depth_mm"] * np.tanh(cfg["fold_sharpness"] * s)
    facing = -normal[:, 0] * sign              # 1 where the smooth surface faces the midline
    wall = (facing > 0.7) & (((base[:, 1] - cfg["wall_centre_mm"][0]) / cfg["wall_size_mm"][0])
                             ** 2 + ((base[:, 2] - cfg["wall_centre_mm"][1])
                                     / cfg["wall_size_mm"][1]) ** 2 <= 1)
    # shallower folds on the medial face keep the hemispheres apart; the wall stays flat
    depth *= 1.0 - (1.0 - cfg["medial_fold_share"]) * np.clip((facing - 0.5) / 0.4, 0.0, 1.0)
    depth[wall] = 0.0
    vertices = base + depth[:, None] * normal
    medial = wall
    return vertices, tri, medial


def _atlas(vertices, medial):
    """Invented lobes by position (mm): a coarse, plausible division for the demo."""
    x, y, z = vertices.T
    lab = np.full(len(vertices), 3)                              # parietal
    lab[y > 15] = 1                                              # frontal
    lab[(y <= 15) & (y > -15) & (z > 20)] = 2                    # central
    lab[(z <= 20) & (y > -45)] = 4                               # temporal
    lab[y <= -45] = 5                                            # occipital
    lab[np.abs(x) < 12] = 6                                      # medial face
    return lab


def build_cortex(order: int, cfg: dict, seed: int) -> Cortex:
    """Both hemispheres; the source mask leaves out the medial walls."""
    parts, normals, radial, medial_all, atlas = [], [], [], [], []
    for name in ("left", "right"):
        v, tri, medial = hemisphere(name, order, cfg, seed + (0 if name == "left" else 1))
        n = vertex_normals(v, tri)
        parts.append(Hemisphere.from_arrays(name, v, tri, mask=~medial))
        normals.append(n)
        radial.append(np.abs((n * v).sum(axis=1)) / np.linalg.norm(v, axis=1))
        medial_all.append(medial)
        atlas.append(_atlas(v, medial))
    return Cortex(SurfaceMesh(tuple(parts)), np.concatenate(normals), np.concatenate(radial),
                  np.concatenate(medial_all), np.concatenate(atlas))


def vertex_graph(space: SurfaceMesh) -> sparse.csr_matrix:
    """Edge lengths (mm) between vertices of all hemispheres (block diagonal)."""
    blocks = []
    for h in space.hemispheres:
        e = h.edges
        w = np.linalg.norm(h.vertices[e[:, 0]] - h.vertices[e[:, 1]], axis=1)
        n = h.n_vertices
        blocks.append(sparse.csr_matrix((np.r_[w, w], (np.r_[e[:, 0], e[:, 1]],
                                                       np.r_[e[:, 1], e[:, 0]])), shape=(n, n)))
    return sparse.block_diag(blocks, format="csr")


def geodesic(graph, start: int, limit: float) -> np.ndarray:
    """Distances (mm) along mesh edges from vertex ``start`` (inf beyond ``limit``)."""
    return dijkstra(graph, indices=int(start), limit=float(limit))
