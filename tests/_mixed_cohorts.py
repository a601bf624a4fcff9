"""Null cohorts for the mixed model's calibrations (arrays only; invented data that the
tests feed to groupsrc, never check values).

A cohort: two groups of participants (sizes given), two conditions, 1 to
``max_sessions`` sessions of both conditions per participant (participants in
``missing`` lack condition 1), between design ``[1, group, age]`` crossed with ``[1,
condition]``.  Every map is, at every feature, a participant intercept plus a
participant condition slope (``slope_sd``) plus residual noise; the small group's
maps are ``sd_ratio`` times as variable (all three parts).  With ``negative`` the
condition-1 maps get minus ``negative`` times the intercept (a negative
within-participant correlation when ``negative > 0``: the participant effect moves the
two conditions apart).  Fields are smooth in space (6x6x6 box, face neighbours) and
time (10 samples), or ``INDEPENDENT`` independent features with ``smooth = False``.  No effect
anywhere: every contrast's null hypothesis holds.

The random effects of the model follow groupsrc's default (``random_slopes =
"auto"``): a condition slope where repeated maps identify it
(``groupsrc.inputs.mixed_design.auto_slope``).
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from groupsrc.inputs.mixed_design import auto_slope, map_layout
from groupsrc.sources import VolumeGrid
from groupsrc.stats.models.mixed.model import MixedDesign

SHAPE, T = (6, 6, 6), 10
#: within: the condition effect averaged over the groups at the mean age; between: the
#: group difference averaged over the conditions (columns 1, c, g, g:c, age, age:c)
CONTRASTS = {"within": ([0, 1.0, 0, 0.5, 0, 0], "sign-flip"),
             "between": ([0, 0, 1.0, 0.5, 0, 0], "permutation")}


def grid():
    return VolumeGrid.from_mask(np.ones(SHAPE, bool), np.eye(4))


def design(rng, sizes=(8, 8), max_sessions=3, missing=(), slopes="auto"):
    """The design (random effects by the default rule, or ``slopes`` True / False) and
    each map's (participant, condition, small-group) rows."""
    n = sum(sizes)
    small = np.argmin(sizes)
    grp = np.r_[np.zeros(sizes[0]), np.ones(sizes[1])]
    B = np.c_[np.ones(n), grp, rng.uniform(-1, 1, n)]
    rows = []
    for i in range(n):
        conds = (0,) if i in missing else (0, 1)
        for _ in range(int(rng.integers(1, max_sessions + 1))):
            rows += [(i, c) for c in conds]
    rows = np.array(rows)
    g, cond = rows[:, 0], rows[:, 1].astype(float)
    W = np.c_[np.ones(len(g)), cond]
    X = np.stack([np.kron(B[gi], W[k]) for k, gi in enumerate(g)])
    use = auto_slope(W, g, n, "condition")[0] if slopes == "auto" else bool(slopes)
    Z = W if use else np.ones((len(g), 1))
    d = MixedDesign(X, Z, g, between=B, within=W, layout=map_layout(Z, g, n))
    return d, grp[g] == small


#: independent features per data set (smooth = False): enough for the point-wise rate
INDEPENDENT = 600


def noise(rng, n, smooth):
    if not smooth:
        return rng.standard_normal((n, INDEPENDENT))
    vol = ndimage.gaussian_filter(rng.standard_normal((n,) + SHAPE + (T,)),
                                  (0, 1.0, 1.0, 1.0, 1.2))
    sd = vol.std()
    return (vol / sd).reshape(n, -1)


def cohort(seed, sizes=(8, 8), max_sessions=3, missing=(), sd_intercept=0.8, slope_sd=0.0,
           sd_ratio=1.0, negative=0.0, smooth=True, slopes="auto"):
    """(MixedDesign, Y float32 (maps, features), small-group mask per participant)."""
    rng = np.random.default_rng([20261204, seed])
    d, small_map = design(rng, sizes, max_sessions, missing, slopes)
    g = np.asarray(d.groups)
    cond = np.asarray(d.within)[:, 1]
    n = int(g.max()) + 1
    b0 = noise(rng, n, smooth)[g]
    b1 = noise(rng, n, smooth)[g] if slope_sd else 0.0
    e = noise(rng, len(g), smooth)
    Y = sd_intercept * b0 * (1.0 - (1.0 + negative) * cond[:, None] if negative else 1.0) \
        + slope_sd * b1 * cond[:, None] + e
    Y *= np.where(small_map, sd_ratio, 1.0)[:, None]
    small = np.zeros(n, bool)
    small[np.unique(g[small_map])] = True
    return d, Y.astype(np.float32), small
