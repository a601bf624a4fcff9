"""Family-wise error of the permutation-corrected mixed model on unbalanced noise cohorts.

Each dataset: 16 participants (two groups), 1 to 3 sessions of two conditions,
one participant without condition 1, a fresh random layout per dataset; on a
6x6x6 box grid (face neighbours) x 10 samples every map is a smooth participant
field (the random intercept) plus a smooth residual field (Gaussian smoothing in
space and time), with no effect anywhere.  The mixed model (random intercept,
REML) tests the condition effect (whole-participant sign flips) and the group
effect (whole-participant permutations within map layouts, or sign flips when
too few participants share a layout); a dataset counts as a rejection when any
point has corrected p <= 0.05.  Under the null the rejection probability is
0.05, so the count over independent datasets is Binomial(n, 0.05) and must fall
in its central 95% interval (scipy.stats.binom.interval; common practice, as in
tests/test_null_calibration.py).

Quick version (default suite): max-stat, 80 datasets x 100 resamples,
interval [1, 8] for Binomial(80, 0.05) -- it catches gross miscalibration only.
Long version (about 2 to 3 minutes on 2 cores):

    .venv/bin/python -m pytest -m slow tests/test_mixed_calibration.py

400 datasets x 200 resamples for max-stat and cluster mass (cluster-forming
p 0.01), each contrast; interval [12, 29] for Binomial(400, 0.05).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage, stats

from groupsrc.sources import VolumeGrid
from groupsrc.stats.inference import InferenceSpec, infer
from groupsrc.stats.mixed import MixedCore
from groupsrc.stats.mixed_fit import fit_features
from groupsrc.stats.mixed_kernel import MixedKernel

from _mixed_data import unbalanced_design

ALPHA = 0.05
SHAPE, T = (6, 6, 6), 10
CONTRASTS = {"within": ([0, 1.0, 0, 0.5, 0, 0], "sign-flip"),
             "between": ([0, 0, 1.0, 0.5, 0, 0], "permutation")}


def _field(rng, n):
    vol = rng.standard_normal((n,) + SHAPE + (T,))
    return ndimage.gaussian_filter(vol, (0, 1.0, 1.0, 1.0, 1.2))


def _dataset(k, grid):
    rng = np.random.default_rng([20261201, k])
    design = unbalanced_design(16, seed=int(rng.integers(1 << 30)), missing=(5,))
    g = np.asarray(design.groups)
    b = _field(rng, 16)[g]
    e = _field(rng, len(g))
    Y = np.stack([grid.from_volume(v) for v in (0.8 * b + e)]).astype(np.float32)
    return design, Y.reshape(len(g), -1)


def _rejections(contrast, correction, n_datasets, n_resamples):
    grid = VolumeGrid.from_mask(np.ones(SHAPE, bool), np.eye(4))
    adj = grid.adjacency("face")
    L, scheme = CONTRASTS[contrast]
    hits = 0
    for k in range(n_datasets):
        design, Y = _dataset(k, grid)
        kernel = MixedKernel(fit_features(MixedCore(design), Y), Y, L, scheme=scheme)
        res = infer(kernel, adj, InferenceSpec(correction=correction, n_resamples=n_resamples,
                                               seed=1000 + k, forming_p=0.01))
        hits += bool(np.nanmin(res.p_corrected) <= ALPHA)
    return hits


@pytest.mark.parametrize("contrast", list(CONTRASTS))
def test_fwer_quick(contrast):
    lo, hi = stats.binom.interval(0.95, 80, ALPHA)       # scipy.stats binomial interval
    hits = _rejections(contrast, "max-stat", 80, 100)
    assert lo <= hits <= hi, (contrast, hits, (lo, hi))


@pytest.mark.slow
@pytest.mark.parametrize("correction", ["max-stat", "cluster-mass"])
@pytest.mark.parametrize("contrast", list(CONTRASTS))
def test_fwer_long(contrast, correction, request):
    if "slow" not in (request.config.getoption("-m") or ""):
        pytest.skip("long calibration: run  pytest -m slow tests/test_mixed_calibration.py")
    lo, hi = stats.binom.interval(0.95, 400, ALPHA)      # scipy.stats binomial interval
    hits = _rejections(contrast, correction, 400, 200)
    print(f"\nmixed model, {contrast} effect, {correction}: {hits} of 400 null data sets "
          f"rejected (interval [{lo:g}, {hi:g}])")
    assert lo <= hits <= hi, (contrast, correction, hits, (lo, hi))
