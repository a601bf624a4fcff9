"""A cortical surface as source space: the vertices of one or two triangle meshes.

Geometry only, apart from any file format (:mod:`groupsrc.formats.gifti` and
:mod:`groupsrc.formats.cifti` build these objects from files):

* :class:`Hemisphere` -- one triangle mesh (vertices in mm, triangles as
  vertex-index triples) and which of its vertices are sources (the mask,
  e.g. without the medial wall);
* :class:`SurfaceMesh` -- one or two hemispheres behind the
  :class:`~groupsrc.sources.base.SourceSpace` contract;
* mesh helpers (in :mod:`.mesh`, re-exported here): :func:`mesh_edges`,
  :func:`euler_characteristic`, :func:`mesh_defects` (what makes a mesh
  unusable, or not closed), :func:`vertex_normals` and :func:`icosphere`
  (the subdivided icosahedron).

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
* ``voxels`` (optional, CIFTI-2 only): the volume parts of the files
  (:class:`~groupsrc.sources.voxels.VoxelParts`: subcortical structures,
  cerebellum voxels).  Their voxels are sources after the surfaces' (source
  ``n_surface_sources + m`` is voxel ``m``); they are joined to each other
  by faces within one structure and never to a surface vertex.  The volume
  parts ride on the surface space, not in a second space beside it, because
  they only ever come with a CIFTI-2 file's surfaces and go back into one:
  every place that knows a surface (result maps, figures, tables, the
  report) keeps one kind of space and adds the voxels where it writes or
  draws them, and statistics still see one adjacency matrix.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import pandas as pd
from scipy import sparse

from .base import SourceSpace
from .mesh import (euler_characteristic, icosphere, mesh_defects, mesh_edges,  # noqa: F401
                   vertex_normals)
from .voxels import VoxelParts

HEMISPHERES = ("left", "right")
#: neighbour kinds of a surface: vertices joined by a triangle edge
SURFACE_NEIGHBORS = ("edge",)


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
    voxels: VoxelParts | None = None

    kind = "surface"
    neighbor_kinds = SURFACE_NEIGHBORS

    def __post_init__(self):
        names = [h.name for h in self.hemispheres]
        if not names or len(set(names)) != len(names):
            raise ValueError(f"need one or two distinct hemispheres, got {names}")
        order = sorted(names, key=HEMISPHERES.index)
        if names != order:
            raise ValueError("hemispheres must come left before right")
        if self.voxels is not None and self.maps_format != "cifti":
            raise ValueError("volume parts come only with CIFTI-2 maps")

    @property
    def n_surface_sources(self) -> int:
        """Sources on the meshes (the first sources; the volume parts' voxels follow)."""
        return int(sum(h.sources.size for h in self.hemispheres))

    @property
    def n_sources(self) -> int:
        return self.n_surface_sources + (self.voxels.n_voxels if self.voxels is not None else 0)

    @property
    def voxel_slice(self) -> slice:
        """The sources of the volume parts (empty without them)."""
        return slice(self.n_surface_sources, self.n_sources)

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
        parts = [h.vertices[h.sources] for h in self.hemispheres]
        return np.concatenate(parts + ([self.voxels.coords_mm] if self.voxels else []))

    def labels(self) -> pd.DataFrame:
        """Hemisphere and vertex index of each source.

        With volume parts, also ``structure`` (a voxel's volume part; "" on
        the surfaces) and the voxel indices ``i``, ``j``, ``k`` (-1 on the
        surfaces); a voxel has hemisphere "" and vertex -1.
        """
        out = pd.DataFrame({
            "hemisphere": np.concatenate([[h.name] * h.sources.size for h in self.hemispheres]),
            "vertex": np.concatenate([h.sources for h in self.hemispheres]).astype(np.int64)})
        if self.voxels is None:
            return out
        out = out.assign(structure="", i=-1, j=-1, k=-1)
        vox = self.voxels.labels().assign(hemisphere="", vertex=-1)
        return pd.concat([out, vox[out.columns]], ignore_index=True).astype(
            {c: np.int64 for c in ("vertex", "i", "j", "k")})

    def describe(self) -> dict:
        out = {"kind": self.kind, "n_sources": self.n_sources, "maps_format": self.maps_format,
               "hemispheres": [{"name": h.name, "n_vertices": h.n_vertices,
                                "n_triangles": int(h.triangles.shape[0]),
                                "n_sources": int(h.sources.size)} for h in self.hemispheres]}
        if self.voxels is not None:
            out["volume_parts"] = self.voxels.describe()
        return out

    def adjacency(self, neighbors: str | None = None) -> sparse.csr_matrix:
        """Sources joined by a mesh edge; hemispheres never joined (block diagonal).

        Voxels of the volume parts: by faces within a structure
        (:meth:`VoxelParts.adjacency`), never joined to a vertex.
        """
        neighbors = neighbors or SURFACE_NEIGHBORS[0]
        if neighbors not in SURFACE_NEIGHBORS:
            raise ValueError(f"neighbors must be one of {list(SURFACE_NEIGHBORS)} on a "
                             f"surface, got {neighbors!r}")
        return self._adjacency

    @cached_property
    def _adjacency(self) -> sparse.csr_matrix:
        blocks = [h.vertex_graph()[h.sources][:, h.sources] for h in self.hemispheres]
        if self.voxels is not None:                     # never joined to a vertex
            blocks.append(self.voxels.adjacency())
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
        """{name: (V, ...) array} -> per-source values (n_sources, ...).

        With volume parts the dict also holds each part's voxel values under
        its structure name ((n, ...) in the part's voxel order, as
        :func:`groupsrc.formats.cifti.read_data` returns them).
        """
        parts = [np.asarray(per_hemisphere[h.name])[h.sources] for h in self.hemispheres]
        if self.voxels is not None:
            parts += [np.asarray(per_hemisphere[name]) for name in self.voxels.names]
        return np.concatenate(parts)
