"""The backend contract for the mixed-model kernel: every backend, worker count and
batch size gives the serial null distribution bit for bit (DESIGN.md: a seed gives
the same result whatever the batch size, worker count or engine).  The project's
own promise; no outside value is involved."""

from __future__ import annotations

import numpy as np
import pytest

from groupsrc.sources import VolumeGrid
from groupsrc.stats.backends import BACKENDS, NullJob, make_backend
from groupsrc.stats.corrections import TfceOptions, make_correction
from groupsrc.stats.mixed import MixedCore
from groupsrc.stats.mixed_fit import fit_features
from groupsrc.stats.mixed_kernel import MixedKernel

from _mixed_data import simulate, unbalanced_design
from test_backend_contract import FACTORIES, _null


def _job(correction, scheme, m=70, seed=5):
    grid = VolumeGrid.from_mask(np.ones((5, 4, 3), bool), np.eye(4))
    T = 7
    design = unbalanced_design(14, seed=31, missing=(2,), max_sessions=2,
                               random_slope=scheme == "sign-flip")
    Y = simulate(design, grid.n_sources * T, seed=32)
    kernel = MixedKernel(fit_features(MixedCore(design), Y), Y,
                         [0, 1.0, 0, 0, 0, 0] if scheme == "sign-flip" else [0, 0, 1.0, 0, 0, 0],
                         scheme=scheme)
    kernel.observed("two")
    rearr = kernel.rearrangements(m, seed)
    assert rearr.kind == scheme
    kernel.prepare(rearr)
    corr = make_correction(correction, kernel.kind, "two", (grid.n_sources, T),
                           grid.adjacency("face"), threshold=kernel.threshold(0.05, "two"),
                           tfce=TfceOptions(steps=20))
    return NullJob(kernel, corr), m


@pytest.mark.parametrize("correction", ["cluster-mass", "tfce", "max-stat"])
@pytest.mark.parametrize("scheme", ["sign-flip", "permutation"])
@pytest.mark.parametrize("name", list(BACKENDS))
def test_every_backend_gives_the_serial_null_bit_for_bit(name, scheme, correction):
    job, m = _job(correction, scheme)
    ref = _null(make_backend("serial"), job, m, batch=m)
    assert not np.isnan(ref[0]).any()
    for workers, batch in [(1, 16), (2, 7), (2, 33)]:
        backend = FACTORIES.get(name, make_backend)(name, workers)
        got = _null(backend, job, m, batch)
        for a, b in zip(got, ref):
            np.testing.assert_array_equal(a, b, err_msg=f"{name}, {workers} workers, "
                                                         f"batch {batch}")
