"""The time axis shared by every map: first sample time, sampling interval, samples.

Format-free: each file format reads its own header fields into a
:class:`TimeAxis` (see :mod:`groupsrc.formats`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


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
