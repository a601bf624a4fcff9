"""Bounded memory (groupsrc.stats.engine.memory): a run whose per-participant data are twice
the --memory setting gives the in-memory run's result bit for bit (the project's own
promise, DESIGN.md: the result never depends on how the work is split); sizes and the
refusal below the minimum."""

import numpy as np
import pytest

from groupsrc.sources import VolumeGrid
from groupsrc.stats.corrections import unionfind
from groupsrc.stats.corrections.scorers import CORRECTIONS, TfceOptions
from groupsrc.stats.inference import Execution, InferenceSpec, infer
from groupsrc.stats.models.ols import OLSKernel
from groupsrc.stats.engine.memory import MemoryTooSmall, minimum, parse_size, plan
from groupsrc.stats.models.reduction import _SourceReader, reduce_maps


def _problem(n=216, seed=0):
    rng = np.random.default_rng(seed)
    grid = VolumeGrid.from_mask(np.ones((10, 10, 10), bool), np.eye(4))
    T = 20
    Y = rng.standard_normal((2 * n, grid.n_sources, T)).astype(np.float32)   # two conditions
    Y[::2] += 0.15
    W = np.zeros((n, 2 * n))
    W[np.arange(n), 2 * np.arange(n)] = 1
    W[np.arange(n), 2 * np.arange(n) + 1] = -1
    X = np.c_[np.ones(n), rng.standard_normal(n)]
    return grid, Y, W, X


#: resamples per run: cluster mass holds its batches as supra-threshold lists, in whole
#: product blocks of 64 (stats/exceedances.py), so it needs more resamples for several
#: batches
RESAMPLES = {"cluster-mass": 448, "tfce": 64}


def _run(grid, Y, W, X, memory, correction):
    n_features = grid.n_sources * Y.shape[2]
    p = plan(memory, W.shape[0], n_features, workers=2,
             scratch_per_thread=CORRECTIONS[correction].scratch_bytes)
    data = reduce_maps(Y, W, slice(0, Y.shape[2]), chunk_bytes=p.chunk_bytes,
                       out=p.array((W.shape[0], grid.n_sources, Y.shape[2])))
    kernel = OLSKernel(data.reshape(W.shape[0], -1), X, [1.0, 0.0], scheme="sign-flip")
    kernel.allocate = p.array
    spec = InferenceSpec(correction=correction, n_resamples=RESAMPLES[correction], seed=4,
                         forming_p=0.01, tfce=TfceOptions())
    res = infer(kernel, grid.adjacency("face"), spec,
                Execution(n_jobs=2, map_budget=p.map_budget))
    return p, data, res


@pytest.mark.parametrize("correction", ["cluster-mass", "tfce"])
def test_bounded_run_equals_in_memory_run(correction):
    grid, Y, W, X = _problem()
    n_features = grid.n_sources * Y.shape[2]
    data_bytes = W.shape[0] * n_features * 4
    memory = data_bytes // 2                    # the data are twice the setting
    assert memory >= minimum(n_features, scratch=2 * CORRECTIONS[correction].scratch_bytes)
    p, data, bounded = _run(grid, Y, W, X, memory, correction)
    assert p.on_disk and isinstance(data, np.memmap)
    assert bounded.resampling.batch_size < RESAMPLES[correction]   # several batches
    _, _, free = _run(grid, Y, W, X, None, correction)
    assert free.resampling.batch_size == RESAMPLES[correction]
    for col in ("max_stat", "max_pos", "max_neg"):
        np.testing.assert_array_equal(bounded.null[col], free.null[col])
    np.testing.assert_array_equal(bounded.statistic, free.statistic)
    np.testing.assert_array_equal(bounded.p_corrected, free.p_corrected)
    np.testing.assert_array_equal(bounded.cluster_labels, free.cluster_labels)


def test_below_the_minimum_is_refused_naming_it():
    with pytest.raises(MemoryTooSmall) as info:
        plan(1_000_000, 40, 1_250_000)
    assert "below what one batch needs" in str(info.value)
    assert "--memory" in info.value.fix and "MiB or more" in info.value.fix
    plan(minimum(1_250_000, 1), 40, 1_250_000)          # the minimum itself works


@pytest.mark.parametrize("text,value", [("512M", 512 * 2 ** 20), ("4G", 4 * 2 ** 30),
                                        ("2.5GiB", int(2.5 * 2 ** 30)), ("8000000", 8000000),
                                        ("3GB", 3 * 10 ** 9)])
def test_sizes(text, value):
    assert parse_size(text) == value


@pytest.mark.parametrize("text", ["", "abc", "-1G", "4 parsecs", "0"])
def test_bad_sizes(text):
    with pytest.raises(ValueError):
        parse_size(text)


def test_scratch_bytes_are_the_workspaces():
    # the memory plan's per-feature scratch figures are the arrays the scorers allocate
    F = 1000
    # (cluster scoring also allocates, per map, one float64 sum per component: at most
    # one per point)
    for make, declared, per_map in ((unionfind.cluster_workspace, CORRECTIONS["cluster-mass"], 8),
                                    (unionfind.tfce_workspace, CORRECTIONS["tfce"], 0)):
        assert sum(a.nbytes for a in make(F)) + per_map * F == declared.scratch_bytes * F
    assert CORRECTIONS["max-stat"].scratch_bytes == 0


def test_scratch_raises_the_minimum_and_counts_every_thread():
    n = 1_250_000
    per = CORRECTIONS["tfce"].scratch_bytes
    base = minimum(n)
    assert minimum(n, scratch=per) - base == per * n
    with pytest.raises(MemoryTooSmall):
        plan(base, 40, n, workers=2, scratch_per_thread=per)
    plan(minimum(n, scratch=2 * per), 40, n, workers=2, scratch_per_thread=per)
    with pytest.raises(MemoryTooSmall):                 # three threads need more
        plan(minimum(n, scratch=2 * per), 40, n, workers=3, scratch_per_thread=per)
    plan(base, 40, n, workers=2, distributed=True, scratch_per_thread=per)  # scored elsewhere


@pytest.mark.parametrize("offset", [0, 128])
def test_reduction_reads_a_map_file_as_the_array_says(tmp_path, offset):
    # the positioned reads of a whole-file map (groupsrc.stats.models.reduction) give W @ Y
    # as numpy's own product over the same array (reference: numpy.tensordot in memory),
    # for a file with a header before the maps, a window of samples and uneven chunks
    rng = np.random.default_rng(3)
    Y = rng.standard_normal((6, 37, 9)).astype(np.float32)
    path = tmp_path / "maps.f32"
    with open(path, "wb") as f:
        f.write(b"\0" * offset)
        f.write(Y.tobytes())
    mm = np.memmap(path, dtype=np.float32, mode="r", offset=offset, shape=Y.shape)
    W = rng.standard_normal((3, 6))
    samples = slice(2, 8)
    expected = np.tensordot(W, Y[:, :, samples].astype(np.float64), axes=(1, 0)).astype(np.float32)
    with _SourceReader(mm) as whole, _SourceReader(mm[:, 1:]) as part:
        assert whole.direct and not part.direct      # the file read; a view sliced
    got = reduce_maps(mm, W, samples, chunk_bytes=8 * 6 * 6 * 5)   # chunks of 5 sources
    np.testing.assert_array_equal(got, expected)
    view = reduce_maps(mm[:, 1:], W, samples)
    np.testing.assert_array_equal(view, expected[:, 1:])
