"""A cortical surface as source space: the vertices of one or two triangle meshes.

Geometry only, apart from any file format (:mod:`groupsrc.formats.gifti` and
:mod:`groupsrc.formats.cifti` build these objects from files):

* :class:`Hemisphere` -- one triangle mesh (vertices in mm, triangles as
  vertex-index triples) and which of its vertices are sources (the mask,
  e.g. without the medial wall);
* :class:`SurfaceMesh` -- one or two hemispheres behind the
  :class:`~groupsrc.sources.base.SourceSpace` contract;
* mesh helpers: :func:`mesh_edges`, :func:`euler_characteristic`,
  :func:`mesh_defects` (what makes a mesh unusable, or not closed),
  :func:`vertex_normals` and :func:`icosphere` (the subdivided icosahedron).

Conventions
-----------
* Sources are numbered hemisphere after hemisphere (left before right), and
  within a hemisphere in increasing vertex index of its in-mask vertices, so
  source ``k`` is vertex ``labels().vertex[k]`` of hemisphere
  ``labels().hemisphere[k]`` everywhere in groupsrc.
* Neighbours (``adjacency("edge")``, the only kind): two sources are
  neighbours when a triangle edge joins their vertices; the two hemispheres
  are never joined, and masked-out vertices break paths (common practice for
  cluster inference on surfaces).  Samples adjacent in time are joined by
  the cluster code, as for volumes.
* ``maps_format`` names the file format the maps came in ("gifti" or
  "cifti"); result maps follow it (:data:`groupsrc.formats.RESULT_MAPS`).
  Geometry never looks at it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import pandas as pd
from scipy import sparse
from scipy.sparse.csgraph import connected_components

from .base import SourceSpace

HEMISPHERES = ("left", "right")
#: neighbour kinds of a surface: vertices joined by a triangle edge
SURFACE_NEIGHBORS = ("edge",)


# ----------------------------------------------------------------------------
# mesh helpers (plain arrays)
# ----------------------------------------------------------------------------

def mesh_edges(triangles) -> np.ndarray:
    """Unique undirected edges (E, 2) of a triangle list, each row sorted (a < b).

    Examples
    --------
    >>> mesh_edges([[0, 1, 2], [0, 2, 3]]).tolist()
    [[0, 1], [0, 2], [0, 3], [1, 2], [2, 3]]
    """
    tri = np.asarray(triangles, dtype=np.int64).reshape(-1, 3)
    pairs = np.concatenate([tri[:, [0, 1]], tri[:, [1, 2]], tri[:, [2, 0]]])
    pairs.sort(axis=1)
    return np.unique(pairs, axis=0)


def _edge_use(triangles):
    """Sorted edge of every triangle side (3F, 2) and how often each unique edge occurs."""
    tri = np.asarray(triangles, dtype=np.int64).reshape(-1, 3)
    pairs = np.concatenate([tri[:, [0, 1]], tri[:, [1, 2]], tri[:, [2, 0]]])
    pairs.sort(axis=1)
    edges, inverse, counts = np.unique(pairs, axis=0, return_inverse=True, return_counts=True)
    return edges, inverse.reshape(-1), counts


def euler_characteristic(n_vertices: int, triangles) -> int:
    """V - E + F; 2 for a closed surface of genus 0, such as a hemisphere (Euler's formula)."""
    tri = np.asarray(triangles).reshape(-1, 3)
    return int(n_vertices) - int(mesh_edges(tri).shape[0]) + int(tri.shape[0])


def _fans_connected(n_vertices, tri, edges, inverse):
    """Vertices whose triangles do not form one fan (a 'bow tie' vertex), as an array.

    Each corner v of a triangle (v, p, q) joins v's two half-edges (v, p) and
    (v, q); a vertex is a manifold vertex when its half-edges form one
    connected set (its triangles share edges in one fan or ring).
    """
    F = tri.shape[0]
    side = inverse.reshape(3, F).T            # edge index of sides (0,1), (1,2), (2,0)
    # half-edge node id: 2 * edge + (1 if the vertex is the edge's larger end)
    def node(v, e):
        return 2 * e + (edges[e, 1] == v)
    rows, cols = [], []
    # corner 0 joins sides 0 and 2, corner 1 sides 0 and 1, corner 2 sides 1 and 2
    for corner, (s1, s2) in enumerate(((0, 2), (0, 1), (1, 2))):
        v = tri[:, corner]
        rows.append(node(v, side[:, s1]))
        cols.append(node(v, side[:, s2]))
    rows, cols = np.concatenate(rows), np.concatenate(cols)
    n_nodes = 2 * edges.shape[0]
    graph = sparse.coo_matrix((np.ones(rows.size, bool), (rows, cols)), shape=(n_nodes, n_nodes))
    _, comp = connected_components(graph, directed=False)
    owner = np.where(np.arange(n_nodes) % 2 == 1, edges[:, 1].repeat(2), edges[:, 0].repeat(2))
    pairs = np.unique(np.column_stack([owner, comp]), axis=0)
    per_vertex = np.bincount(pairs[:, 0], minlength=n_vertices)
    return np.flatnonzero(per_vertex > 1)


def mesh_defects(n_vertices: int, triangles, closed: bool = True) -> list:
    """Why a triangle mesh cannot serve as a source space; empty when it can.

    Always checked: vertex indices within ``0 .. n_vertices - 1``, no triangle
    naming a vertex twice, no triangle listed twice, no edge shared by more
    than two triangles and no vertex whose triangles form more than one fan
    (both make the surface non-manifold).  With ``closed``: every edge is
    shared by exactly two triangles (no hole or cut) and every vertex belongs
    to a triangle -- the definition of a closed triangulated 2-manifold
    (common practice).  Each entry is one sentence naming counts and a few
    examples.
    """
    tri = np.asarray(triangles)
    if tri.ndim != 2 or tri.shape[1] != 3 or tri.shape[0] == 0:
        return [f"triangles must be a non-empty list of vertex triples, got shape {tri.shape}"]
    tri = tri.astype(np.int64)
    out = []
    bad = np.flatnonzero(((tri < 0) | (tri >= n_vertices)).any(axis=1))
    if bad.size:
        return [f"{bad.size} triangle(s) name vertices outside 0..{n_vertices - 1} "
                f"(first: triangle {bad[0]} = {tri[bad[0]].tolist()})"]
    s = np.sort(tri, axis=1)
    degenerate = np.flatnonzero((s[:, 0] == s[:, 1]) | (s[:, 1] == s[:, 2]))
    if degenerate.size:
        out.append(f"{degenerate.size} triangle(s) name one vertex twice (first: triangle "
                   f"{degenerate[0]} = {tri[degenerate[0]].tolist()})")
    _, first, counts = np.unique(s, axis=0, return_index=True, return_counts=True)
    if (counts > 1).any():
        out.append(f"{int((counts > 1).sum())} triangle(s) are listed more than once "
                   f"(first: triangle {int(first[counts > 1][0])})")
    if out:
        return out
    edges, inverse, use = _edge_use(tri)
    over = np.flatnonzero(use > 2)
    if over.size:
        out.append(f"{over.size} edge(s) are shared by more than two triangles, so the surface "
                   f"is not a manifold (first: vertices {edges[over[0]].tolist()})")
    if closed:
        open_edges = np.flatnonzero(use == 1)
        if open_edges.size:
            out.append(f"{open_edges.size} edge(s) belong to one triangle only, so the mesh "
                       f"has a hole or a cut and is not closed (first: vertices "
                       f"{edges[open_edges[0]].tolist()})")
        unused = np.setdiff1d(np.arange(n_vertices), tri.ravel())
        if unused.size:
            out.append(f"{unused.size} vertex(es) belong to no triangle (first: vertex "
                       f"{unused[0]})")
    if not over.size:
        pinched = _fans_connected(n_vertices, tri, edges, inverse)
        if pinched.size:
            out.append(f"{pinched.size} vertex(es) join surface pieces that share no edge "
                       f"there, so the surface is not a manifold (first: vertex {pinched[0]})")
    return out


def vertex_normals(vertices, triangles) -> np.ndarray:
    """Unit normal per vertex: the area-weighted mean of its triangles' normals.

    Triangle normals follow the right-hand rule of the vertex order, so for a
    consistently ordered closed mesh they all point outwards or all inwards.
    A vertex of no triangle gets a zero vector.
    """
    v = np.asarray(vertices, float)
    tri = np.asarray(triangles, dtype=np.int64)
    face = np.cross(v[tri[:, 1]] - v[tri[:, 0]], v[tri[:, 2]] - v[tri[:, 0]])  # |face| = 2 area
    out = np.zeros_like(v)
    for k in range(3):
        np.add.at(out, tri[:, k], face)
    norm = np.linalg.norm(out, axis=1, keepdims=True)
    return np.divide(out, norm, out=np.zeros_like(out), where=norm > 0)


def icosphere(subdivisions: int = 0):
    """Vertices (V, 3) on the unit sphere and outward-ordered triangles (F, 3).

    The regular icosahedron (12 vertices, 30 edges, 20 faces), each face then
    split ``subdivisions`` times into four at its edge midpoints, every new
    vertex pushed out onto the sphere.  V = 10 * 4^k + 2, E = 30 * 4^k,
    F = 20 * 4^k; the 12 original vertices keep 5 neighbours and every other
    vertex has 6 (geometry of the subdivided icosahedron).

    Examples
    --------
    >>> v, f = icosphere(1)
    >>> v.shape, f.shape
    ((42, 3), (80, 3))
    """
    if subdivisions < 0:
        raise ValueError("subdivisions must be >= 0")
    p = (1 + np.sqrt(5)) / 2
    v = np.array([[-1, p, 0], [1, p, 0], [-1, -p, 0], [1, -p, 0],
                  [0, -1, p], [0, 1, p], [0, -1, -p], [0, 1, -p],
                  [p, 0, -1], [p, 0, 1], [-p, 0, -1], [-p, 0, 1]], float)
    f = np.array([[0, 11, 5], [0, 5, 1], [0, 1, 7], [0, 7, 10], [0, 10, 11],
                  [1, 5, 9], [5, 11, 4], [11, 10, 2], [10, 7, 6], [7, 1, 8],
                  [3, 9, 4], [3, 4, 2], [3, 2, 6], [3, 6, 8], [3, 8, 9],
                  [4, 9, 5], [2, 4, 11], [6, 2, 10], [8, 6, 7], [9, 8, 1]], np.int64)
    v /= np.linalg.norm(v, axis=1, keepdims=True)
    for _ in range(subdivisions):
        edges, inverse, _ = _edge_use(f)
        mid = v[edges].mean(axis=1)
        mid /= np.linalg.norm(mid, axis=1, keepdims=True)
        m = (len(v) + inverse).reshape(3, -1).T       # midpoints of sides ab, bc, ca
        a, b, c = f.T
        ab, bc, ca = m.T
        f = np.concatenate([np.column_stack(t) for t in
                            ((a, ab, ca), (b, bc, ab), (c, ca, bc), (ab, bc, ca))])
        v = np.concatenate([v, mid])
    # outward order: the normal points away from the centre
    normal = np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]])
    inward = (normal * v[f].mean(axis=1)).sum(axis=1) < 0
    f[inward] = f[inward][:, ::-1]
    return v, f


# ----------------------------------------------------------------------------
# the source space
# ----------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class Hemisphere:
    """One hemisphere's template mesh and its sources.

    Parameters
    ----------
    name : "left" or "right"
    vertices : (V, 3) float, world coordinates in mm
    triangles : (F, 3) int, vertex indices
    mask : (V,) bool, True where a vertex is a source
    """

    name: str
    vertices: np.ndarray
    triangles: np.ndarray
    mask: np.ndarray = field(repr=False)

    @classmethod
    def from_arrays(cls, name, vertices, triangles, mask=None) -> "Hemisphere":
        if name not in HEMISPHERES:
            raise ValueError(f"hemisphere must be one of {HEMISPHERES}, got {name!r}")
        v = np.asarray(vertices, dtype=float)
        if v.ndim != 2 or v.shape[1] != 3:
            raise ValueError(f"vertices must be (n, 3), got {v.shape}")
        t = np.asarray(triangles, dtype=np.int64).reshape(-1, 3)
        m = np.ones(v.shape[0], bool) if mask is None else np.asarray(mask, bool).reshape(-1)
        if m.shape[0] != v.shape[0]:
            raise ValueError(f"mask has {m.shape[0]} values for {v.shape[0]} vertices")
        return cls(name, v, t, m)

    @property
    def n_vertices(self) -> int:
        return int(self.vertices.shape[0])

    @cached_property
    def sources(self) -> np.ndarray:
        """Vertex index of each source of this hemisphere (increasing)."""
        return np.flatnonzero(self.mask)

    @cached_property
    def edges(self) -> np.ndarray:
        return mesh_edges(self.triangles)

    def vertex_graph(self) -> sparse.csr_matrix:
        """(V, V) symmetric boolean matrix of the mesh edges."""
        e = self.edges
        n = self.n_vertices
        data = np.ones(2 * e.shape[0], bool)
        return sparse.csr_matrix((data, (np.r_[e[:, 0], e[:, 1]], np.r_[e[:, 1], e[:, 0]])),
                                 shape=(n, n))


@dataclass(frozen=True, eq=False)
class SurfaceMesh(SourceSpace):
    """One or two hemisphere meshes as a source space (see the module docstring).

    Examples
    --------
    >>> v, f = icosphere(0)
    >>> s = SurfaceMesh((Hemisphere.from_arrays("left", 50 * v, f),))
    >>> s.n_sources, int(s.adjacency().sum(axis=1).min())
    (12, 5)
    """

    hemispheres: tuple
    maps_format: str = "gifti"

    kind = "surface"
    neighbor_kinds = SURFACE_NEIGHBORS

    def __post_init__(self):
        names = [h.name for h in self.hemispheres]
        if not names or len(set(names)) != len(names):
            raise ValueError(f"need one or two distinct hemispheres, got {names}")
        order = sorted(names, key=HEMISPHERES.index)
        if names != order:
            raise ValueError("hemispheres must come left before right")

    @property
    def n_sources(self) -> int:
        return int(sum(h.sources.size for h in self.hemispheres))

    def hemisphere(self, name) -> Hemisphere:
        for h in self.hemispheres:
            if h.name == name:
                return h
        raise KeyError(name)

    @property
    def names(self) -> tuple:
        return tuple(h.name for h in self.hemispheres)

    def source_slice(self, name) -> slice:
        """The sources of hemisphere ``name`` in the source order."""
        start = 0
        for h in self.hemispheres:
            if h.name == name:
                return slice(start, start + h.sources.size)
            start += h.sources.size
        raise KeyError(name)

    @property
    def coords_mm(self) -> np.ndarray:
        return np.concatenate([h.vertices[h.sources] for h in self.hemispheres])

    def labels(self) -> pd.DataFrame:
        """Hemisphere and vertex index of each source."""
        return pd.DataFrame({
            "hemisphere": np.concatenate([[h.name] * h.sources.size for h in self.hemispheres]),
            "vertex": np.concatenate([h.sources for h in self.hemispheres]).astype(np.int64)})

    def describe(self) -> dict:
        return {"kind": self.kind, "n_sources": self.n_sources, "maps_format": self.maps_format,
                "hemispheres": [{"name": h.name, "n_vertices": h.n_vertices,
                                 "n_triangles": int(h.triangles.shape[0]),
                                 "n_sources": int(h.sources.size)} for h in self.hemispheres]}

    def adjacency(self, neighbors: str | None = None) -> sparse.csr_matrix:
        """Sources joined by a mesh edge; hemispheres never joined (block diagonal)."""
        neighbors = neighbors or SURFACE_NEIGHBORS[0]
        if neighbors not in SURFACE_NEIGHBORS:
            raise ValueError(f"neighbors must be one of {list(SURFACE_NEIGHBORS)} on a "
                             f"surface, got {neighbors!r}")
        return self._adjacency

    @cached_property
    def _adjacency(self) -> sparse.csr_matrix:
        blocks = [h.vertex_graph()[h.sources][:, h.sources] for h in self.hemispheres]
        A = sparse.block_diag(blocks, format="csr").astype(bool)
        A.eliminate_zeros()
        A.sort_indices()
        return A

    def to_vertices(self, values, name, fill=0.0) -> np.ndarray:
        """Per-source values (n_sources, ...) -> hemisphere ``name``'s vertices (V, ...)."""
        values = np.asarray(values)
        if values.shape[0] != self.n_sources:
            raise ValueError(f"expected {self.n_sources} source values, got {values.shape[0]}")
        h = self.hemisphere(name)
        out = np.full((h.n_vertices,) + values.shape[1:], fill, dtype=values.dtype)
        out[h.sources] = values[self.source_slice(name)]
        return out

    def from_vertices(self, per_hemisphere: dict) -> np.ndarray:
        """{name: (V, ...) array} -> per-source values (n_sources, ...)."""
        return np.concatenate([np.asarray(per_hemisphere[h.name])[h.sources]
                               for h in self.hemispheres])
