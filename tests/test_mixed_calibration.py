"""Family-wise error of the permutation-corrected mixed model on unbalanced noise cohorts.

Each dataset: 16 participants (two groups), 1 to 3 sessions of two conditions,
one participant without condition 1, a fresh random layout per dataset; on a
6x6x6 box grid (face neighbours) x 10 samples every map is a smooth participant
field (the random intercept) plus a smooth residual field (Gaussian smoothing in
space and time), with no effect anywhere.  The mixed model (random intercept,
REML) tests the condition effect (whole-participant sign flips of leverage-adjusted
residuals) and the group effect (whole-participant permutations within map
layouts of equal covariance, or sign flips when too few participants share one); a dataset
counts as a rejection when any point has corrected p <= 0.05.  Under the null the
rejection probability is 0.05, so the count over independent datasets is
Binomial(n, 0.05) with its central 95% interval (scipy.stats.binom.interval;
common practice, as in tests/test_null_calibration.py).  A sharper reading: the
share of points whose own permutation p is <= 0.05, averaged over datasets --
exactly 0.05 for an exact test (200 resamples; 10 of 200 is a whole number).

Quick version (default suite): max-stat, 80 datasets x 100 resamples,
interval [1, 8] for Binomial(80, 0.05) -- it catches gross miscalibration only.
Long version (about 15 minutes on 2 cores; ``-s`` prints the counts):

    .venv/bin/python -m pytest -m slow -s tests/test_mixed_calibration.py

* 16 participants, 800 datasets x 200 resamples, max-stat and cluster mass
  (cluster-forming p 0.01), each contrast: at most the top of the interval
  [29, 51] (a valid test; with 16 participants the within effect is somewhat
  conservative) and a point-wise rate within ``POINT_TOLERANCE`` of 0.05 (plain,
  unadjusted sign flips gave 6.3% and 6.8% family-wise and 5.75% point-wise here --
  liberal, and this test fails on them);
* 32 participants, 400 datasets: inside the interval [12, 29], point-wise rate
  within ``POINT_TOLERANCE``.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage, stats

from groupsrc.sources import VolumeGrid
from groupsrc.stats.corrections.clusters import check_adjacency
from groupsrc.stats.corrections.scorers import make_correction, max_from
from groupsrc.stats.inference import InferenceSpec, infer
from groupsrc.stats.models.mixed.model import MixedCore
from groupsrc.stats.models.mixed.fit import fit_features
from groupsrc.stats.models.mixed.kernel import MixedKernel
from groupsrc.stats.resampling import RTOL

from _mixed_data import unbalanced_design

ALPHA = 0.05
#: null data sets of the long calibration (16 participants)
N_LONG = 800
#: largest distance of the mean point-wise rejection rate from ALPHA (a tenth of it)
POINT_TOLERANCE = 0.005
SHAPE, T = (6, 6, 6), 10
CONTRASTS = {"within": ([0, 1.0, 0, 0.5, 0, 0], "sign-flip"),
             "between": ([0, 0, 1.0, 0.5, 0, 0], "permutation")}


def _field(rng, n):
    vol = rng.standard_normal((n,) + SHAPE + (T,))
    return ndimage.gaussian_filter(vol, (0, 1.0, 1.0, 1.0, 1.2))


def _dataset(k, grid, n=16):
    rng = np.random.default_rng([20261201, k])
    design = unbalanced_design(n, seed=int(rng.integers(1 << 30)), missing=(5,))
    g = np.asarray(design.groups)
    b = _field(rng, n)[g]
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


def null_outcomes(contrast, k, n_resamples, grid=None, n=16):
    """One null data set, one set of resampled maps, three readings:
    (max-stat rejects, cluster-mass rejects at forming p 0.01, the share of
    points whose own permutation p is <= ALPHA).  The corrections are the
    package's (:mod:`groupsrc.stats.corrections.scorers`); ``test_outcomes_match_infer``
    checks that this shortcut gives what :func:`infer` gives."""
    grid = grid or VolumeGrid.from_mask(np.ones(SHAPE, bool), np.eye(4))
    adj = check_adjacency(grid.adjacency("face"), grid.n_sources)
    L, scheme = CONTRASTS[contrast]
    design, Y = _dataset(k, grid, n)
    kernel = MixedKernel(fit_features(MixedCore(design), Y), Y, L, scheme=scheme)
    z = np.asarray(kernel.observed("two").statistic, float)
    rearr = kernel.rearrangements(n_resamples, 1000 + k)
    kernel.prepare(rearr)
    m = rearr.n_resamples
    maps = kernel.resampled(0, m, np.empty((m, kernel.n_features), np.float32))[0]
    shape = (grid.n_sources, T)
    out = []
    for name in ("max-stat", "cluster-mass"):
        corr = make_correction(name, kernel.kind, "two", shape, adj,
                               threshold=kernel.threshold(0.01, "two"))
        pos, neg = ((maps.max(axis=1), maps.min(axis=1)) if name == "max-stat"
                    else corr.null_extremes(maps, 0, m))
        res = corr.outcome(z.reshape(shape), max_from(pos, neg, kernel.kind, "two"), ALPHA)
        out.append(bool(np.nanmin(res.p_corrected) <= ALPHA))
    a = np.abs(z)
    point_p = (np.abs(maps.astype(float)) >= a - RTOL * a).sum(axis=0) / m
    out.append(float(np.mean(point_p <= ALPHA)))
    return tuple(out)


@pytest.mark.parametrize("contrast", list(CONTRASTS))
def test_fwer_quick(contrast):
    lo, hi = stats.binom.interval(0.95, 80, ALPHA)       # scipy.stats binomial interval
    hits = _rejections(contrast, "max-stat", 80, 100)
    assert lo <= hits <= hi, (contrast, hits, (lo, hi))


@pytest.mark.parametrize("contrast", list(CONTRASTS))
def test_outcomes_match_infer(contrast):
    """The shortcut of :func:`null_outcomes` against the full :func:`infer` path."""
    grid = VolumeGrid.from_mask(np.ones(SHAPE, bool), np.eye(4))
    L, scheme = CONTRASTS[contrast]
    for k in (3, 11):
        fast = null_outcomes(contrast, k, 60, grid)
        design, Y = _dataset(k, grid)
        for i, correction in enumerate(("max-stat", "cluster-mass")):
            kernel = MixedKernel(fit_features(MixedCore(design), Y), Y, L, scheme=scheme)
            res = infer(kernel, grid.adjacency("face"),
                        InferenceSpec(correction=correction, n_resamples=60, seed=1000 + k,
                                      forming_p=0.01, alpha=ALPHA))
            assert fast[i] == bool(np.nanmin(res.p_corrected) <= ALPHA), (k, correction)


def calibrate(contrast, first, count, n_resamples=200, n=16):
    """Readings of :func:`null_outcomes` for data sets first..first+count-1, (count, 3)."""
    grid = VolumeGrid.from_mask(np.ones(SHAPE, bool), np.eye(4))
    return np.array([null_outcomes(contrast, k, n_resamples, grid, n)
                     for k in range(first, first + count)], float)


def verdict(rows):
    """Rejection counts with their Binomial(n, ALPHA) 95% interval (scipy.stats; common
    practice) and the mean point-wise rate with its standard error across data sets."""
    n = len(rows)
    lo, hi = stats.binom.interval(0.95, n, ALPHA)
    rate = rows[:, 2].mean()
    se = rows[:, 2].std(ddof=1) / np.sqrt(n)
    return dict(n=n, max_stat=int(rows[:, 0].sum()), cluster_mass=int(rows[:, 1].sum()),
                interval=(int(lo), int(hi)), point_rate=float(rate), point_se=float(se))


def _report(contrast, v, n):
    print(f"\nmixed model, {contrast} effect, {n} participants, {v['n']} null data sets: "
          f"max-stat {v['max_stat']}, cluster mass {v['cluster_mass']} rejected (interval "
          f"{list(v['interval'])}); point-wise rate {v['point_rate']:.4f} "
          f"+- {v['point_se']:.4f}")


def _long(request):
    if "slow" not in (request.config.getoption("-m") or ""):
        pytest.skip("long calibration: run  pytest -m slow -s tests/test_mixed_calibration.py")


@pytest.mark.slow
@pytest.mark.parametrize("contrast", list(CONTRASTS))
def test_calibration_small_cohorts(contrast, request):
    """16 participants: valid (never above the interval), point-wise rate near ALPHA."""
    _long(request)
    v = verdict(calibrate(contrast, 0, N_LONG))
    _report(contrast, v, 16)
    assert v["max_stat"] <= v["interval"][1], v
    assert v["cluster_mass"] <= v["interval"][1], v
    assert abs(v["point_rate"] - ALPHA) <= POINT_TOLERANCE, v


@pytest.mark.slow
@pytest.mark.parametrize("contrast", list(CONTRASTS))
def test_calibration_32_participants(contrast, request):
    """32 participants: family-wise error inside the Binomial 95% interval."""
    _long(request)
    v = verdict(calibrate(contrast, 0, 400, n=32))
    _report(contrast, v, 32)
    lo, hi = v["interval"]
    assert lo <= v["max_stat"] <= hi, v
    assert lo <= v["cluster_mass"] <= hi, v
    assert abs(v["point_rate"] - ALPHA) <= POINT_TOLERANCE, v
