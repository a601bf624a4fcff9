"""Execution backends: where the batches of resamples run.

A contrast's resampling is split into batches of consecutive resamples
``[lo, hi)``.  A :class:`NullJob` knows how to do one batch: the kernel's
products give the resampled statistic maps, the correction scores each map.
A backend runs the batches and hands each result to ``collect(lo, pos,
neg)`` -- in any order; the caller stores results by ``lo``.

Contract (``tests/test_backend_contract.py``): for one job every backend,
worker count and batch size gives the serial backend's null distribution
bit for bit.  That holds because a resample's arithmetic never depends on
its batch (see :mod:`..models.ols`) and each batch's result is stored at its
own place.  A backend that runs batches elsewhere (another process, another
machine, a checkpointed run) must keep both properties.

======== ====================================================================
serial   batches one after the other in the calling thread
threads  one batch at a time in one buffer: ``workers`` threads share its
         products (each a run of feature chunks), then its scoring (each a
         run of maps)
processes whole batches on ``workers`` joblib process workers (loky)
dask      whole batches as tasks on a Dask distributed cluster: a running
          scheduler (``scheduler="tcp://host:port"``) or a local cluster
          started here (``scheduler="local:N"``, N single-threaded worker
          processes on the loopback interface); the job (kernel with its
          data, correction) is scattered to every worker once per contrast
======== ====================================================================

BLAS threads: every product runs under :func:`.blas.one_blas_thread`, and
the process and Dask workers run one task per process, so ``workers``
processes never start ``workers x cores`` BLAS threads between them.
"""

from __future__ import annotations

import os
from abc import ABC, abstractmethod

import numpy as np

from ..corrections.exceedances import bytes_per_resample
from ..models.base import LIST_BLOCK, RES_BLOCK
from .perthread import PerThread
from .scheduler import CONNECT_TIMEOUT, dask_client, parse_scheduler

#: memory budget (bytes) for the resampled maps held at once (all workers together)
MEMORY_BUDGET = 128e6


class NullJob:
    """One contrast's resampling work: a prepared kernel and a correction.

    A batch is held in one buffer (:meth:`buffer`): its resampled maps, or -- for a
    correction that scores supra-threshold points only (``correction.lists``) and a
    kernel that can list them (``kernel.lists``) -- the lists of
    :mod:`..corrections.exceedances`, with the kernel's product blocks set to ``LIST_BLOCK``
    rows (as they are for a correction that needs no maps at all, max-stat).  A
    resample whose list overflows is scored from its map, recomputed here
    (:meth:`scores`), so every resample gets the same score either way.  ``lists =
    False`` keeps map batches (:func:`..inference.infer` asks for it when the forming
    threshold is so liberal that lists would overflow often).
    """

    def __init__(self, kernel, correction, lists=True):
        self.kernel, self.correction = kernel, correction
        self.needs_maps = correction.needs_maps
        self.lists = bool(lists and getattr(correction, "lists", False)
                          and getattr(kernel, "lists", False))
        if getattr(kernel, "lists", False) and (self.lists or not self.needs_maps):
            kernel.block = LIST_BLOCK   # no map buffer: larger product blocks cost no memory
        self.block = int(getattr(kernel, "block", RES_BLOCK))
        self._own = PerThread()

    def bytes_per_resample(self) -> float:
        """Bytes one resample takes in a batch buffer (0: none is held)."""
        if self.lists:
            return float(bytes_per_resample(self.kernel.n_features))
        return 4.0 * self.kernel.n_features if self.needs_maps else 0.0

    def buffer(self, B, parts=1):
        """A new buffer for a batch of up to ``B`` resamples whose products are shared
        by ``parts`` threads (None when the correction needs no maps)."""
        if self.lists:
            return self.correction.exceedances(B, self.kernel.n_features, parts)
        if self.needs_maps:
            return np.empty((B, self.kernel.n_features), np.float32)
        return None

    @staticmethod
    def view(buf, B):
        """The part of a batch buffer that a batch of ``B`` resamples writes."""
        return buf[:B] if isinstance(buf, np.ndarray) else buf

    def products(self, lo, hi, out=None, part=None):
        """Resampled statistic maps or lists (into ``out``) or, without maps, their
        extremes; ``part = (j, J)``: the j-th of J runs of feature chunks only (``out``
        given)."""
        if self.needs_maps and out is None:
            if self.lists:              # the calling thread's own list buffer
                B = hi - lo
                out = self._own.get(lambda: self.buffer(max(B, self.block)),
                                    fits=lambda b: b.rows >= B)
            else:
                out = self.kernel.buffer(hi - lo)
        return self.kernel.resampled(lo, hi, out if self.needs_maps else None, part)

    def scores(self, maps, u, v):
        """(max_pos, max_neg) of the batch's resamples u..v-1 (in ``maps``, a buffer)."""
        pos, neg = self.correction.null_extremes(maps, u, v)
        if self.lists:
            self._from_maps(maps, u, pos, neg)
        return pos, neg

    def _from_maps(self, lists, u, pos, neg):
        """Score the resamples whose lists overflowed (NaN) from their maps, in runs of at
        most ``RES_BLOCK`` consecutive resamples."""
        todo = np.flatnonzero(np.isnan(pos))
        while todo.size:
            run = todo[:RES_BLOCK]
            run = run[run - run[0] == np.arange(run.size)]          # consecutive only
            a, b = int(run[0]), int(run[-1]) + 1
            first = lists.lo + u + a
            maps = self.kernel.buffer(b - a)
            self.kernel.resampled(first, first + b - a, maps)
            pos[a:b], neg[a:b] = self.correction.null_extremes(maps, 0, b - a)
            todo = todo[run.size:]

    def run_batch(self, lo, hi):
        """(lo, max_pos, max_neg) of resamples lo..hi-1."""
        maps, mx, mn = self.products(lo, hi)
        if maps is None:
            return lo, mx, mn
        pos, neg = self.scores(maps, 0, hi - lo)
        return lo, pos, neg

    def pieces(self, B, workers):
        """Split B maps into one work item per worker."""
        step = max(1, -(-B // workers))
        return [(a, min(B, a + step)) for a in range(0, B, step)]


def worker_count(workers: int) -> int:
    """The workers a setting means: itself, or every core for -1."""
    return workers if workers > 0 else max(1, os.cpu_count() or 1)


def auto_batch(n_resamples, resample_bytes, buffers, block=16, budget=None, tasks=1):
    """Default batch size: a whole number of product blocks (at least one) whose
    buffers (``resample_bytes`` per resample, :meth:`NullJob.bytes_per_resample`;
    0: none, 256 resamples) fit ``budget`` bytes (default ``MEMORY_BUDGET``)
    across ``buffers`` buffers alive at once, and small enough to give at least
    ``tasks`` batches when there are enough blocks (so that workers taking whole
    batches share the work evenly, and progress is shown at least every
    ``1 / tasks`` of the work)."""
    budget = MEMORY_BUDGET if budget is None else budget
    fit = budget / max(1, buffers) // resample_bytes if resample_bytes else 256
    B = max(block, int(fit) // block * block)
    if tasks > 1:
        share = -(-n_resamples // tasks)
        B = min(B, max(block, share // block * block))
    return int(max(1, min(n_resamples, B)))


class Backend(ABC):
    """Runs batches; see the module docstring for the contract."""

    name = ""

    def __init__(self, workers: int = 1):
        workers = int(workers)
        if workers == 0 or workers < -1:
            raise ValueError(f"workers must be a positive integer or -1, got {workers}")
        self.workers = worker_count(workers)

    @property
    def buffers(self) -> int:
        """Map buffers alive at once (for the batch-size budget)."""
        return 1

    @property
    def tasks(self) -> int:
        """Batches wanted at least, for an even share between workers."""
        return 1

    @abstractmethod
    def run(self, job: NullJob, batches, collect) -> None: ...


class SerialBackend(Backend):
    name = "serial"

    def run(self, job, batches, collect):
        for a, b in batches:
            collect(*job.run_batch(a, b))


class ThreadBackend(Backend):
    """One batch at a time, in one buffer: its products split over the threads by
    runs of feature chunks, then its maps' scoring split over them by maps.

    One buffer instead of one per worker (or two alternating) keeps the resampled
    maps held at once to one batch, and both stages use every thread.  BLAS stays on
    one thread for the whole run (:func:`.blas.one_blas_thread`), so every
    product has the serial backend's shape and thread count.
    """

    name = "threads"

    def run(self, job, batches, collect):
        if self.workers == 1 or not batches:
            return SerialBackend().run(job, batches, collect)
        from concurrent.futures import ThreadPoolExecutor

        from .blas import one_blas_thread
        J = self.workers
        B = max(b - a for a, b in batches)
        buf = job.buffer(B, parts=J)
        with one_blas_thread(), ThreadPoolExecutor(max_workers=J) as pool:
            for a, b in batches:
                out = job.view(buf, b - a)
                parts = [f.result() for f in [pool.submit(job.products, a, b, out, (j, J))
                                              for j in range(J)]]
                if not job.needs_maps:      # extremes of the parts: max of maxima
                    collect(a, np.max([p[1] for p in parts], axis=0),
                            np.min([p[2] for p in parts], axis=0))
                    continue
                outs = [f.result() for f in [pool.submit(job.scores, out, u, v)
                                             for u, v in job.pieces(b - a, J)]]
                collect(a, np.concatenate([o[0] for o in outs]),
                        np.concatenate([o[1] for o in outs]))


class ProcessBackend(Backend):
    """Whole batches on joblib's process workers (loky); data memory-mapped to them."""

    name = "processes"

    @property
    def buffers(self):
        return self.workers

    @property
    def tasks(self):
        return 4 * self.workers

    def run(self, job, batches, collect):
        if self.workers == 1:
            return SerialBackend().run(job, batches, collect)
        from joblib import Parallel, delayed
        par = Parallel(n_jobs=self.workers, backend="loky", return_as="generator")
        for out in par(delayed(job.run_batch)(a, b) for a, b in batches):
            collect(*out)


def _run_batch(job, lo, hi):
    return job.run_batch(lo, hi)


class DaskBackend(Backend):
    """Batches as tasks on a Dask distributed cluster; the job is scattered once."""

    name = "dask"

    def __init__(self, workers: int = 1, scheduler=None, timeout=CONNECT_TIMEOUT):
        super().__init__(workers)
        self.scheduler = scheduler or f"local:{self.workers}"
        parse_scheduler(self.scheduler)
        self.timeout = timeout

    @property
    def buffers(self):
        return 1                 # one batch per worker process, each with its own memory

    @property
    def tasks(self):
        return 4 * self.workers

    def run(self, job, batches, collect):
        if not batches:
            return
        from distributed import as_completed
        client = dask_client(self.scheduler, self.timeout)
        shared = client.scatter(job, broadcast=True, hash=False)
        futures = [client.submit(_run_batch, shared, a, b, pure=False) for a, b in batches]
        try:
            for fut in as_completed(futures):
                collect(*fut.result())
                fut.release()
        finally:
            client.cancel(futures)
            del shared



#: the backends, by name
BACKENDS = {b.name: b for b in (SerialBackend, ThreadBackend, ProcessBackend, DaskBackend)}


def make_backend(name: str, workers: int = 1, **options) -> Backend:
    """The backend ``name`` with ``workers``; ``options`` go to its constructor
    (``scheduler`` for dask)."""
    try:
        cls = BACKENDS[name]
    except KeyError:
        raise ValueError(f"backend must be one of {tuple(BACKENDS)}, got {name!r}") from None
    return cls(workers, **options)
