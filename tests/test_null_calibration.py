"""Family-wise error calibration on smooth pure-noise cohorts.

Each dataset: 16 participants of gaussian-smoothed white noise on an 8x8x8
box grid (face neighbours) x 20 samples, no effect anywhere; one-sample t with
sign flips; cluster-forming p 0.01.  TFCE uses 25 height steps (observed and
resampled maps get the same transform, so calibration does not depend on the
step); in the quick run TFCE uses a 6x6x6 x 12 grid to stay fast.  A dataset counts as a family-wise rejection when any point has
corrected p <= 0.05.  Under exchangeability the rejection probability is 0.05
(for m resamples including the identity, P(rank of the identity among m <= 0.05 m)
= 0.05 when 0.05 m is an integer; common practice), so the count over
independent datasets is Binomial(n_datasets, 0.05) and must fall in its
central 95% interval (scipy.stats.binom.interval).

Quick version (default suite, cluster mass, cluster extent, TFCE and max-stat):
100 datasets x 100 resamples; the 95% interval
for Binomial(100, 0.05) is [1, 10] -- wide, it catches gross miscalibration
only.  Long version:  pytest -m slow tests/test_null_calibration.py
(400 datasets x 200 resamples on the 8x8x8 x 20 grid for every correction;
interval for Binomial(400, 0.05) is [12, 29]; about half an hour on 2 cores,
mostly TFCE; max-stat alone takes ~15 s).
"""

import numpy as np
import pytest
from scipy import ndimage, stats

from groupsrc.sources import VolumeGrid
from groupsrc.stats.corrections.scorers import TfceOptions
from groupsrc.stats.inference import run_inference

ALPHA = 0.05
SHAPE, T, N = (8, 8, 8), 20, 16


def _datasets(count, seed, shape=SHAPE, n_times=T):
    grid = VolumeGrid.from_mask(np.ones(shape, bool), np.eye(4))
    rng = np.random.default_rng(seed)
    for _ in range(count):
        vol = rng.standard_normal((N,) + shape + (n_times,))
        vol = ndimage.gaussian_filter(vol, (0, 1.2, 1.2, 1.2, 1.5))
        yield grid, np.stack([grid.from_volume(v) for v in vol]).astype(np.float32)


def _rejections(correction, n_datasets, n_resamples, seed, **grid):
    hits = 0
    for k, (grid, Y) in enumerate(_datasets(n_datasets, seed, **grid)):
        r = run_inference(Y, np.ones((N, 1)), [1.0], grid.adjacency("face"),
                          scheme="sign-flip", correction=correction,
                          n_resamples=n_resamples, seed=1000 + k, forming_p=0.01,
                          tfce=TfceOptions(steps=25))
        hits += bool(np.nanmin(r.p_corrected) <= ALPHA)
    return hits


@pytest.mark.parametrize("correction", ["cluster-mass", "cluster-extent", "tfce", "max-stat"])
def test_fwer_quick(correction):
    lo, hi = stats.binom.interval(0.95, 100, ALPHA)   # scipy.stats binomial interval
    small = {"shape": (6, 6, 6), "n_times": 12} if correction == "tfce" else {}
    hits = _rejections(correction, 100, 100, seed=7, **small)
    assert lo <= hits <= hi, (correction, hits, (lo, hi))


@pytest.mark.slow
@pytest.mark.parametrize("correction", ["cluster-mass", "cluster-extent", "tfce", "max-stat"])
def test_fwer_long(correction, request):
    if "slow" not in (request.config.getoption("-m") or ""):
        pytest.skip("long calibration: run  pytest -m slow tests/test_null_calibration.py")
    lo, hi = stats.binom.interval(0.95, 400, ALPHA)   # scipy.stats binomial interval
    hits = _rejections(correction, 400, 200, seed=8)
    assert lo <= hits <= hi, (correction, hits, (lo, hi))
