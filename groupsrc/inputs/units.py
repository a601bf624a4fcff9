"""The maps' unit scale: every map is stored centred and scaled, in float32.

Why.  Source maps come in any unit: nA m, unitless dSPM values, power in SI units
(1e-18 and below), or values riding on a large constant (a baseline of 1e9).  The
resampling runs in float32, where squares underflow below about 1e-19 and a value of
1e9 keeps no digit of a signal of 1.  So while the maps are decoded (in float64),
each is stored as::

    Y_k = (raw_k - offset) / scale          (float32)

with ``offset`` the first decoded map itself (source by source and sample by sample)
when its values ride on a level more than ``OFFSET_RATIO`` times their spread (a
baseline), else 0 -- centring on a first map that is itself an outlier (one map saved in
another unit, a billion billion times larger) would leave the others no digit -- and
``scale`` the root mean square deviation of that map from its own mean (times a
power of two when the stored values would otherwise be far from order one,
:meth:`Standardizer.settle`).  Both
follow the data: multiplying every map by ``c`` multiplies ``scale`` by ``c``, adding
a constant adds it to ``offset``, so the stored array -- and every statistic,
threshold and p-value computed from it -- is the same (to float64 rounding) whatever
the unit.  Statistics are invariant to the scale, and a contrast whose within weights
sum to zero, or whose between contrast does not test the mean level itself, never
sees the offset (see :func:`tests_level`); a contrast that does gets ``offset /
scale`` added back (:meth:`Units.level`).  Estimates, standard errors, variance
components and every map or time course that is written go back to the input's
units (``raw = scale * Y + weight_sum * offset``).

The offset travels with the stored maps as two extra float32 rows holding
``offset / scale`` in two parts (a float32 and the float32 of what it leaves), about
48 bits of the float64 value, so that the loading cache keeps one array per entry.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: rows after the maps that hold ``offset / scale`` (high and low float32 parts)
LEVEL_ROWS = 2


#: the first map's mean level over its spread above which maps are stored centred on it
OFFSET_RATIO = 100.0


class Standardizer:
    """Decoding-time centring and scaling: ``(raw - offset) / scale`` in float64, the
    offset and scale fixed by the first map it sees (module docstring)."""

    def __init__(self):
        self.offset = None
        self.scale = None

    def __call__(self, raw) -> np.ndarray:
        raw = np.asarray(raw, dtype=np.float64)
        if self.offset is None:
            finite = np.isfinite(raw)
            # non-finite values are problems of their own map; never spread them
            first = np.where(finite, raw, 0.0)
            self.scale = _spread(first[finite]) if finite.any() else 1.0
            level = abs(float(first[finite].mean())) if finite.any() else 0.0
            # centred only when the values ride on a level far above their spread (a
            # baseline): centring on an outlying first map (one map in another unit)
            # would wipe out every other map's digits
            self.offset = first if level > OFFSET_RATIO * self.scale else np.zeros_like(first)
        return (raw - self.offset) / self.scale

    def settle(self, stored, n_maps, chunk=64) -> None:
        """After every map is stored: if the stored values are far from order one (the
        first map's spread was no guide to the others'), multiply them by the power of
        two that brings their root mean square nearest 1 -- exact in floating point, and
        the same power whatever the input's unit -- and the scale by its inverse."""
        if self.offset is None or n_maps == 0:
            return
        total, count = 0.0, 0
        for a in range(0, n_maps, chunk):
            block = np.asarray(stored[a:min(n_maps, a + chunk)], np.float64)
            ok = np.isfinite(block)
            total += float(np.sum(block[ok] ** 2))
            count += int(ok.sum())
        rms = np.sqrt(total / count) if count else 0.0
        if not (np.isfinite(rms) and rms > 0) or 1e-6 <= rms <= 1e6:
            return
        k = int(np.round(np.log2(rms)))
        factor = np.float32(2.0 ** -k)
        for a in range(0, n_maps, chunk):
            stored[a:min(n_maps, a + chunk)] *= factor
        self.scale *= 2.0 ** k

    def level_rows(self, shape) -> np.ndarray:
        """(2, S, T) float32: ``offset / scale`` as a high and a low part."""
        if self.offset is None:
            return np.zeros((LEVEL_ROWS,) + tuple(shape), np.float32)
        level = self.offset / self.scale
        hi = level.astype(np.float32)
        lo = (level - hi.astype(np.float64)).astype(np.float32)
        return np.stack([hi, lo])


def _spread(values) -> float:
    """Root mean square deviation from the mean; the largest magnitude when that is 0;
    1 when everything is 0 (float64)."""
    v = np.asarray(values, dtype=np.float64)
    dev = v - v.mean()
    s = float(np.sqrt(np.mean(dev * dev)))
    if not (np.isfinite(s) and s > 0):
        s = float(np.max(np.abs(v))) if v.size else 0.0
    if not (np.isfinite(s) and s > 0):
        s = 1.0
    return s


@dataclass
class Units:
    """How the stored maps relate to the input's units: ``raw = scale * Y + offset``,
    with ``offset / scale`` in the two float32 rows ``level_rows`` (2, S, T)."""

    scale: float = 1.0
    level_rows: np.ndarray | None = None

    def level(self, sources=slice(None), samples=slice(None)) -> np.ndarray:
        """``offset / scale`` (float64) over the given sources and samples."""
        if self.level_rows is None:
            raise ValueError("no offset stored")
        hi = np.asarray(self.level_rows[0][sources, samples], np.float64)
        return hi + np.asarray(self.level_rows[1][sources, samples], np.float64)

    def to_input(self, values, weight_sum, sources=slice(None), samples=slice(None),
                 level_included=False, chunk=4096) -> np.ndarray:
        """Model-unit ``values`` (n, S', T') made from the stored maps with weights
        summing to ``weight_sum`` per row -> the input's units, in place (float32 or
        float64 arrays; chunked over sources).  ``level_included``: the values already
        hold ``weight_sum * offset / scale`` (contrasts that test the level)."""
        add = (weight_sum != 0) and not level_included and self.level_rows is not None
        S = values.shape[1]
        src = np.arange(self.level_rows.shape[1])[sources] if add else None
        for a in range(0, S, chunk):
            part = values[:, a:a + chunk]
            v = part.astype(np.float64) * self.scale
            if add:
                v += weight_sum * self.scale * self.level(src[a:a + chunk], samples)
            part[...] = v
        return values


def tests_level(X, contrast, weight_sum, tol=1e-9) -> bool:
    """Whether a GLM contrast sees the maps' mean level: the reduced maps carry
    ``weight_sum * offset`` (the same for every participant), which the design absorbs
    when the constant lies in its column space and the contrast gives the constant's
    coefficients zero weight (``C X^+ 1 = 0``)."""
    if abs(weight_sum) <= tol:
        return False
    X = np.asarray(X, np.float64)
    one = np.ones(X.shape[0])
    coef = np.linalg.pinv(X) @ one
    if np.linalg.norm(X @ coef - one) > 1e-8 * np.sqrt(X.shape[0]):
        return True                                    # no constant in the design
    C = np.atleast_2d(np.asarray(contrast, np.float64))
    return bool(np.abs(C @ coef).max() > tol * max(1.0, np.abs(C).max()))


def split_units(stored, meta):
    """(maps, :class:`Units`) of a stored array (maps, then the ``LEVEL_ROWS`` rows)."""
    n = stored.shape[0] - LEVEL_ROWS
    return stored[:n], Units(float(meta.get("scale", 1.0)), stored[n:])
