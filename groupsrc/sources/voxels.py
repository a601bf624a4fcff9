"""Voxels of named structures in one volume: the volume parts of a CIFTI-2 file.

A CIFTI-2 brain-model axis (CIFTI-2 specification, 2014) may hold, next to
the cortex surfaces, voxels of subcortical structures and the cerebellum:
for each structure a list of voxel indices (i, j, k) in one volume shared
by every volume part (one shape, one voxel -> world affine).  A
:class:`VoxelParts` is that geometry, apart from any file format; a
:class:`~groupsrc.sources.surface.SurfaceMesh` carries one as its optional
volume parts (see its docstring for why one space and not two).

Conventions
-----------
* Voxels are numbered structure after structure in the order given (the
  files' order), and within a structure in the files' voxel order, so voxel
  ``m`` is ``ijk[m]`` of structure ``structure_names[m]``.
* World coordinates in mm: ``affine @ (i, j, k, 1)`` (NIfTI / CIFTI-2 voxel
  -> world transform).
* Neighbours: two voxels sharing a face (6-connectivity, as
  ``scipy.ndimage.generate_binary_structure(3, 1)``) *and* belonging to the
  same structure.  Voxels of different structures are never joined, even
  where they touch in the grid: a cluster then lies in one structure (its
  tables name one), and left and right structures that touch at the midline
  do not join the two hemispheres, which the surfaces never join either.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import pandas as pd
from scipy import sparse


@dataclass(frozen=True, eq=False)
class VoxelParts:
    """Voxels of named structures in one volume (see the module docstring).

    Parameters
    ----------
    affine : (4, 4) float, voxel -> world (mm)
    shape : 3 ints, the volume's voxel shape
    parts : tuple of (structure name, (n, 3) int voxel indices)

    Examples
    --------
    >>> import numpy as np
    >>> p = VoxelParts.from_parts(np.eye(4), (3, 3, 3),
    ...                           [("A", [[0, 0, 0], [1, 0, 0]]), ("B", [[2, 0, 0]])])
    >>> p.n_voxels, p.adjacency().nnz    # A's two voxels joined; B touches A, not joined
    (3, 2)
    """

    affine: np.ndarray
    shape: tuple
    parts: tuple = field(repr=False)

    @classmethod
    def from_parts(cls, affine, shape, parts) -> "VoxelParts":
        """Checked construction; ValueError naming what is wrong."""
        A = np.asarray(affine, dtype=float)
        if A.shape != (4, 4) or not np.all(np.isfinite(A)):
            raise ValueError(f"affine must be a finite 4 x 4 matrix, got shape {A.shape}")
        shape = tuple(int(s) for s in shape)
        if len(shape) != 3 or min(shape) < 1:
            raise ValueError(f"volume shape must be 3 positive ints, got {shape}")
        out, names = [], []
        for name, ijk in parts:
            ijk = np.asarray(ijk, dtype=np.int64).reshape(-1, 3)
            if ijk.shape[0] == 0:
                raise ValueError(f"structure {name} has no voxel")
            if ((ijk < 0) | (ijk >= np.array(shape))).any():
                raise ValueError(f"structure {name} has voxel indices outside the volume {shape}")
            names.append(str(name))
            out.append((str(name), ijk))
        if not out:
            raise ValueError("need at least one volume part")
        if len(set(names)) != len(names):
            raise ValueError(f"structure names must be distinct, got {names}")
        flat = np.ravel_multi_index(np.concatenate([p[1] for p in out]).T, shape)
        if np.unique(flat).size != flat.size:
            raise ValueError("a voxel belongs to more than one volume part (or twice to one)")
        return cls(A, shape, tuple(out))

    # -- sizes and order -------------------------------------------------------
    @property
    def names(self) -> tuple:
        return tuple(name for name, _ in self.parts)

    @property
    def n_voxels(self) -> int:
        return int(sum(ijk.shape[0] for _, ijk in self.parts))

    @cached_property
    def ijk(self) -> np.ndarray:
        """(n_voxels, 3) voxel indices in the source order."""
        return np.concatenate([ijk for _, ijk in self.parts])

    @cached_property
    def structure_index(self) -> np.ndarray:
        """(n_voxels,) position of each voxel's structure in ``names``."""
        return np.repeat(np.arange(len(self.parts)), [ijk.shape[0] for _, ijk in self.parts])

    def part_slice(self, name) -> slice:
        """The voxels of structure ``name`` in the voxel order."""
        start = 0
        for n, ijk in self.parts:
            if n == name:
                return slice(start, start + ijk.shape[0])
            start += ijk.shape[0]
        raise KeyError(name)

    # -- geometry ----------------------------------------------------------------
    @property
    def coords_mm(self) -> np.ndarray:
        """(n_voxels, 3) world coordinates in mm (the affine applied to i, j, k)."""
        return self.ijk @ self.affine[:3, :3].T + self.affine[:3, 3]

    @cached_property
    def mask(self) -> np.ndarray:
        """(x, y, z) bool, True at the voxels of any part."""
        m = np.zeros(self.shape, bool)
        m[tuple(self.ijk.T)] = True
        return m

    def to_volume(self, values, fill=np.nan) -> np.ndarray:
        """Per-voxel values (n_voxels, ...) -> an array of the volume's shape (+ trailing)."""
        values = np.asarray(values)
        if values.shape[0] != self.n_voxels:
            raise ValueError(f"expected {self.n_voxels} voxel values, got {values.shape[0]}")
        dtype = np.result_type(values.dtype, np.asarray(fill).dtype)
        out = np.full(self.shape + values.shape[1:], fill, dtype=dtype)
        out[tuple(self.ijk.T)] = values
        return out

    def adjacency(self) -> sparse.csr_matrix:
        """(n_voxels, n_voxels) bool: voxels sharing a face, within one structure."""
        return self._adjacency

    @cached_property
    def _adjacency(self) -> sparse.csr_matrix:
        n = self.n_voxels
        index = np.full(self.shape, -1, dtype=np.int64)
        index[tuple(self.ijk.T)] = np.arange(n)
        rows, cols = [], []
        for axis in range(3):
            step = np.zeros(3, np.int64)
            step[axis] = 1
            nb = self.ijk + step
            inside = nb[:, axis] < self.shape[axis]
            a = np.flatnonzero(inside)
            b = index[tuple(nb[inside].T)]
            keep = b >= 0
            a, b = a[keep], b[keep]
            same = self.structure_index[a] == self.structure_index[b]
            rows += [a[same], b[same]]
            cols += [b[same], a[same]]
        r, c = np.concatenate(rows), np.concatenate(cols)
        A = sparse.csr_matrix((np.ones(r.size, bool), (r, c)), shape=(n, n))
        A.sort_indices()
        return A

    # -- description ---------------------------------------------------------------
    def labels(self) -> pd.DataFrame:
        """Structure and voxel indices (i, j, k) of each voxel."""
        return pd.DataFrame({"structure": np.repeat(self.names, [p[1].shape[0] for p in self.parts]),
                             "i": self.ijk[:, 0], "j": self.ijk[:, 1], "k": self.ijk[:, 2]})

    def describe(self) -> dict:
        return {"shape": list(self.shape), "affine": self.affine.tolist(),
                "structures": [{"name": n, "n_voxels": int(ijk.shape[0])} for n, ijk in self.parts]}
