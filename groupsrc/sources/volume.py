"""Template grid and time axis.

A :class:`Grid` describes the common template every participant's maps are
resampled onto: the voxel shape, the voxel-to-world affine (mm), which voxels
are sources (the mask) and how sources neighbour each other.  A
:class:`TimeAxis` describes the sample times of the fourth NIfTI dimension.

Sources are numbered in C order of their voxel indices (``numpy.nonzero`` of
the mask), so source ``k`` is voxel ``grid.ijk[k]`` everywhere in groupsrc.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
from scipy import sparse

#: Connectivity names accepted in the analysis file and their neighbour counts
#: for an interior voxel (faces 6, faces + edges 18, faces + edges + corners 26).
CONNECTIVITY = {"face": 1, "edge": 2, "vertex": 3}
NEIGHBOUR_COUNT = {"face": 6, "edge": 18, "vertex": 26}


@dataclass(frozen=True, eq=False)
class Grid:
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
    >>> g = Grid.from_mask(m, np.eye(4))
    >>> g.n_sources, g.coords_mm[0].tolist()
    (3, [1.0, 1.0, 0.0])
    """

    shape: tuple
    affine: np.ndarray
    mask: np.ndarray
    ijk: np.ndarray = field(repr=False)

    @classmethod
    def from_mask(cls, mask, affine) -> "Grid":
        mask = np.asarray(mask).astype(bool)
        if mask.ndim != 3:
            raise ValueError(f"a grid mask must be 3D, got shape {mask.shape}")
        affine = np.asarray(affine, dtype=float)
        if affine.shape != (4, 4):
            raise ValueError(f"affine must be 4x4, got {affine.shape}")
        ijk = np.argwhere(mask)  # C order, same as np.nonzero
        return cls(tuple(int(s) for s in mask.shape), affine, mask, ijk)

    @property
    def n_sources(self) -> int:
        return int(self.ijk.shape[0])

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

    def adjacency(self, neighbors: str = "face") -> sparse.csr_matrix:
        """Symmetric source x source neighbour matrix (no self loops).

        ``neighbors`` is ``"face"`` (6-connectivity), ``"edge"`` (18) or
        ``"vertex"`` (26), the usual 3D voxel connectivities.
        """
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


def _adjacency(grid: Grid, neighbors: str):
    ijk = np.ascontiguousarray(grid.ijk, dtype=np.int64)
    return _adjacency_cached(grid.shape, ijk.tobytes(), ijk.shape[0], neighbors)


#: NIfTI-1 xyzt_units time codes (nifti1.h): 8 = seconds, 16 = milliseconds,
#: 24 = microseconds; the factor converts the header value to seconds.
NIFTI_TIME_UNITS = {8: 1.0, 16: 1e-3, 24: 1e-6}


@dataclass(frozen=True)
class TimeAxis:
    """Sample times of the fourth dimension: ``t0 + dt * arange(n)`` seconds.

    Examples
    --------
    >>> TimeAxis(-0.1, 0.01, 3).times.round(3).tolist()
    [-0.1, -0.09, -0.08]
    """

    t0: float
    dt: float
    n: int

    @property
    def times(self) -> np.ndarray:
        return self.t0 + self.dt * np.arange(self.n)

    def window(self, start: float | None, stop: float | None) -> np.ndarray:
        """Indices of samples with start <= t <= stop (half a sample tolerance)."""
        t = self.times
        tol = 1e-6 * max(abs(self.dt), 1e-12)
        keep = np.ones(self.n, bool)
        if start is not None:
            keep &= t >= start - tol
        if stop is not None:
            keep &= t <= stop + tol
        return np.nonzero(keep)[0]

    def subset(self, index) -> "TimeAxis":
        index = np.asarray(index)
        if index.size == 0:
            raise ValueError("empty time window")
        if index.size > 1 and not np.all(np.diff(index) == 1):
            raise ValueError("a time subset must be contiguous")
        t0 = float(self.times[index[0]])
        # drop floating-point dust such as -1e-17 s (it would print as "-0 ms")
        t0 = round(t0 / self.dt) * self.dt if abs(t0 / self.dt - round(t0 / self.dt)) < 1e-6 else t0
        return TimeAxis(t0 + 0.0, self.dt, int(index.size))

    def close_to(self, other: "TimeAxis", rtol: float = 1e-4) -> bool:
        scale = max(abs(self.dt), 1e-12)
        return (self.n == other.n and abs(self.dt - other.dt) <= rtol * scale
                and abs(self.t0 - other.t0) <= rtol * scale)

    @classmethod
    def from_header(cls, header, n: int | None = None) -> "TimeAxis":
        """Read the time axis from a NIfTI-1/2 header.

        pixdim[4] is the sampling interval and toffset the first sample time,
        both in the time unit of xyzt_units (NIfTI-1 standard, nifti1.h).  An
        unset time unit (0) is taken as seconds.
        """
        _, tunit = header.get_xyzt_units()
        code = int(header["xyzt_units"]) & 0x38
        factor = NIFTI_TIME_UNITS.get(code, 1.0)
        dt = float(header["pixdim"][4]) * factor
        t0 = float(header["toffset"]) * factor
        if n is None:
            shape = header.get_data_shape()
            n = int(shape[3]) if len(shape) > 3 else 1
        return cls(t0, dt, int(n))
