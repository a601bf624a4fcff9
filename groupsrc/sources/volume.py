"""A volume grid as source space: the voxels of a mask on a template grid.

A :class:`VolumeGrid` describes the common template every participant's maps
are resampled onto: the voxel shape, the voxel-to-world affine (mm), which
voxels are sources (the mask) and how sources neighbour each other.  It
honours the :class:`~groupsrc.sources.base.SourceSpace` contract; its
volume-only parts (``ijk``, ``to_volume``, ``from_volume``, ``flat_index``)
are for the volume file formats and figures.

Sources are numbered in C order of their voxel indices (``numpy.nonzero`` of
the mask), so source ``k`` is voxel ``grid.ijk[k]`` everywhere in groupsrc.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
import pandas as pd
from scipy import sparse

from .base import SourceSpace

#: Connectivity names accepted in the analysis file and their neighbour counts
#: for an interior voxel (faces 6, faces + edges 18, faces + edges + corners 26).
CONNECTIVITY = {"face": 1, "edge": 2, "vertex": 3}
NEIGHBOUR_COUNT = {"face": 6, "edge": 18, "vertex": 26}


@dataclass(frozen=True, eq=False)
class VolumeGrid(SourceSpace):
    """A volumetric template grid restricted to a source mask.

    Parameters
    ----------
    shape : tuple of 3 int
        Voxel shape of the template volume.
    affine : (4, 4) array
        Voxel -> world (mm) transform, as in the NIfTI sform.
    mask : (x, y, z) bool array
        True where a voxel is a source.

    Examples
    --------
    >>> import numpy as np
    >>> m = np.zeros((3, 3, 3), bool); m[1, 1, :] = True
    >>> g = VolumeGrid.from_mask(m, np.eye(4))
    >>> g.n_sources, g.coords_mm[0].tolist()
    (3, [1.0, 1.0, 0.0])
    """

    shape: tuple
    affine: np.ndarray
    mask: np.ndarray
    ijk: np.ndarray = field(repr=False)

    @classmethod
    def from_mask(cls, mask, affine) -> "VolumeGrid":
        mask = np.asarray(mask).astype(bool)
        if mask.ndim != 3:
            raise ValueError(f"a grid mask must be 3D, got shape {mask.shape}")
        affine = np.asarray(affine, dtype=float)
        if affine.shape != (4, 4):
            raise ValueError(f"affine must be 4x4, got {affine.shape}")
        ijk = np.argwhere(mask)  # C order, same as np.nonzero
        return cls(tuple(int(s) for s in mask.shape), affine, mask, ijk)

    kind = "volume"
    neighbor_kinds = tuple(CONNECTIVITY)

    @property
    def n_sources(self) -> int:
        return int(self.ijk.shape[0])

    def labels(self) -> pd.DataFrame:
        """Voxel indices (i, j, k) of each source in the template volume."""
        return pd.DataFrame(self.ijk, columns=["i", "j", "k"])

    def describe(self) -> dict:
        return {"kind": self.kind, "n_sources": self.n_sources, "shape": list(self.shape),
                "affine": self.affine.tolist(),
                "voxel_size_mm": [float(v) for v in self.voxel_size]}

    @property
    def voxel_size(self) -> np.ndarray:
        """Voxel edge lengths in mm (column norms of the affine's 3x3 part)."""
        return np.sqrt((self.affine[:3, :3] ** 2).sum(axis=0))

    @property
    def coords_mm(self) -> np.ndarray:
        """World coordinates (mm) of each source, shape (n_sources, 3)."""
        return self.ijk @ self.affine[:3, :3].T + self.affine[:3, 3]

    @property
    def flat_index(self) -> np.ndarray:
        """Index of each source into the raveled (C order) 3D volume."""
        return np.ravel_multi_index(self.ijk.T, self.shape)

    def to_volume(self, values, fill=0.0):
        """Scatter per-source values (n_sources, ...) back into (x, y, z, ...)."""
        values = np.asarray(values)
        if values.shape[0] != self.n_sources:
            raise ValueError(
                f"expected {self.n_sources} source values, got {values.shape[0]}")
        out = np.full(self.shape + values.shape[1:], fill, dtype=values.dtype)
        out[tuple(self.ijk.T)] = values
        return out

    def from_volume(self, volume) -> np.ndarray:
        """Gather a (x, y, z, ...) array into (n_sources, ...)."""
        volume = np.asarray(volume)
        return volume[tuple(self.ijk.T)]

    def adjacency(self, neighbors: str | None = None) -> sparse.csr_matrix:
        """Symmetric source x source neighbour matrix (no self loops).

        ``neighbors`` is ``"face"`` (6-connectivity, the default), ``"edge"``
        (18) or ``"vertex"`` (26), the usual 3D voxel connectivities.
        """
        neighbors = neighbors or "face"
        if neighbors not in CONNECTIVITY:
            raise ValueError(
                f"neighbors must be one of {sorted(CONNECTIVITY)}, got {neighbors!r}")
        return _adjacency(self, neighbors)


@lru_cache(maxsize=8)
def _adjacency_cached(shape, ijk_bytes, n, neighbors):
    ijk = np.frombuffer(ijk_bytes, dtype=np.int64).reshape(n, 3)
    order = CONNECTIVITY[neighbors]
    lookup = np.full(shape, -1, dtype=np.int64)
    lookup[tuple(ijk.T)] = np.arange(n)
    rows, cols = [], []
    offsets = [(a, b, c) for a in (-1, 0, 1) for b in (-1, 0, 1) for c in (-1, 0, 1)
               if 0 < abs(a) + abs(b) + abs(c) <= order]
    for off in offsets:
        nb = ijk + np.array(off)
        ok = np.all((nb >= 0) & (nb < np.array(shape)), axis=1)
        src = np.nonzero(ok)[0]
        dst = lookup[tuple(nb[ok].T)]
        keep = dst >= 0
        rows.append(src[keep])
        cols.append(dst[keep])
    rows = np.concatenate(rows) if rows else np.zeros(0, np.int64)
    cols = np.concatenate(cols) if cols else np.zeros(0, np.int64)
    data = np.ones(rows.size, dtype=bool)
    return sparse.csr_matrix((data, (rows, cols)), shape=(n, n))


def _adjacency(grid: VolumeGrid, neighbors: str):
    ijk = np.ascontiguousarray(grid.ijk, dtype=np.int64)
    return _adjacency_cached(grid.shape, ijk.tobytes(), ijk.shape[0], neighbors)
