"""The backend contract (groupsrc/stats/backends.py): every backend gives the serial
backend's null distribution bit for bit, whatever its worker count or batch size.

Every backend in ``BACKENDS`` is tried automatically, with a job of every statistic
kernel in ``KERNEL_JOBS``; a backend that needs a running service (a cluster) can be
given a factory in ``FACTORIES``.  The
promise checked is the project's own (DESIGN.md: a seed gives the same result
whatever the batch size, worker count or engine); no outside value is
involved.
"""

from __future__ import annotations

import numpy as np
import pytest

from groupsrc.sources import VolumeGrid
from groupsrc.stats.engine.backends import BACKENDS, NullJob, make_backend
from groupsrc.stats.corrections.scorers import TfceOptions, make_correction
from groupsrc.stats.models import ols as kernels
from groupsrc.stats.models.mixed import kernel as mixed_kernel
from groupsrc.stats.models.ols import OLSKernel
from groupsrc.stats.models.mixed.model import MixedCore
from groupsrc.stats.models.mixed.fit import fit_features
from groupsrc.stats.models.mixed.kernel import MixedKernel
from groupsrc.stats.models.groupvar import GroupVarianceKernel

from _mixed_data import simulate, unbalanced_design

#: how to build each backend for the test (default: make_backend(name, workers)); the
#: Dask backend runs on a local cluster of `workers` processes on the loopback interface
FACTORIES = {"dask": lambda name, workers: make_backend(name, workers,
                                                        scheduler=f"local:{workers}")}


GRID = VolumeGrid.from_mask(np.ones((5, 4, 3), bool), np.eye(4))
T = 7


def _ols_kernel(scheme):
    rng = np.random.default_rng(2)
    n = 12
    Y = rng.standard_normal((n, GRID.n_sources * T)).astype(np.float32) + 0.3
    if scheme == "sign-flip":
        X = np.c_[np.ones(n), rng.standard_normal(n)]          # covariate: Freedman-Lane
        C = [1.0, 0.0]
    else:
        X = np.c_[np.repeat([1.0, 0.0], n // 2), np.repeat([0.0, 1.0], n // 2),
                  rng.standard_normal(n)]
        C = [1.0, -1.0, 0.0]
    return OLSKernel(Y, X, C, scheme=scheme)


def _mixed_kernel(scheme):
    design = unbalanced_design(14, seed=31, missing=(2,), max_sessions=2,
                               random_slope=scheme == "sign-flip")
    Y = simulate(design, GRID.n_sources * T, seed=32)
    kernel = MixedKernel(fit_features(MixedCore(design), Y), Y,
                         [0, 1.0, 0, 0, 0, 0] if scheme == "sign-flip" else [0, 0, 1.0, 0, 0, 0],
                         scheme=scheme)
    kernel.observed("two")
    return kernel


def _groupvar_kernel(scheme):
    """Variance groups (Welch's v with an age covariate): sign flips only."""
    rng = np.random.default_rng(4)
    g = np.repeat([0, 1], [5, 9])
    Y = (rng.standard_normal((g.size, GRID.n_sources * T)) * np.where(g == 0, 2.0, 1.0)[:, None]
         ).astype(np.float32)
    X = np.c_[np.ones(g.size), g, rng.standard_normal(g.size)]
    return GroupVarianceKernel(Y, X, [0.0, 1.0, 0.0], g)


#: a kernel of each kind, for a rearrangement scheme
KERNEL_JOBS = {"ols": _ols_kernel, "mixed": _mixed_kernel, "groupvar": _groupvar_kernel}
#: kernels that use one rearrangement scheme only
ONLY_SCHEME = {"groupvar": "sign-flip"}


def _job(correction, scheme="sign-flip", kernel="ols", m=70, seed=5):
    kernel = KERNEL_JOBS[kernel](scheme)
    rearr = kernel.rearrangements(m, seed)
    assert rearr.kind == scheme
    kernel.prepare(rearr)
    thr = kernel.threshold(0.05, "two")
    corr = make_correction(correction, kernel.kind, "two", (GRID.n_sources, T),
                           GRID.adjacency("face"), threshold=thr, tfce=TfceOptions(steps=20))
    return NullJob(kernel, corr), m


def _null(backend, job, m, batch):
    pos, neg = np.full(m, np.nan), np.full(m, np.nan)

    def collect(lo, p, q):
        pos[lo:lo + p.size] = p
        neg[lo:lo + q.size] = q
    backend.run(job, [(a, min(m, a + batch)) for a in range(0, m, batch)], collect)
    return pos, neg


@pytest.mark.parametrize("correction", ["cluster-mass", "tfce", "max-stat"])
@pytest.mark.parametrize("scheme", ["sign-flip", "permutation"])
@pytest.mark.parametrize("kernel", list(KERNEL_JOBS))
@pytest.mark.parametrize("name", list(BACKENDS))
def test_every_backend_gives_the_serial_null_bit_for_bit(name, kernel, scheme, correction,
                                                        monkeypatch):
    # feature chunks of 64 (7 per map) so that threads sharing a batch's products by
    # runs of chunks really split them
    monkeypatch.setattr(kernels, "FEATURE_CHUNK", 64)
    monkeypatch.setattr(mixed_kernel, "FEATURE_CHUNK", 64)
    if ONLY_SCHEME.get(kernel, scheme) != scheme:
        pytest.skip(f"the {kernel} kernel uses {ONLY_SCHEME[kernel]} only")
    job, m = _job(correction, scheme, kernel)
    assert job.kernel.fc == 64
    ref = _null(make_backend("serial"), job, m, batch=m)
    assert not np.isnan(ref[0]).any()
    for workers, batch in [(1, 16), (2, 7), (2, 33)]:
        backend = FACTORIES.get(name, make_backend)(name, workers)
        got = _null(backend, job, m, batch)
        for a, b in zip(got, ref):
            np.testing.assert_array_equal(a, b, err_msg=f"{name}, {workers} workers, "
                                                         f"batch {batch}")


@pytest.mark.parametrize("name", list(BACKENDS))
def test_every_backend_refuses_a_bad_worker_count(name):
    with pytest.raises(ValueError, match="workers"):
        make_backend(name, 0)
