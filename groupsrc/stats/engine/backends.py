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


class BackendUnavailable(RuntimeError):
    """The backend cannot run here (e.g. no Dask scheduler answers); the message says why
    and what to do."""


#: seconds to wait for a Dask scheduler to answer
CONNECT_TIMEOUT = 10.0
_CLIENTS: dict = {}


def _run_batch(job, lo, hi):
    return job.run_batch(lo, hi)


def parse_scheduler(text):
    """("local", N) for ``local:N`` / ``local``, else ("address", text); ValueError if bad."""
    text = str(text).strip()
    if text == "local" or text.startswith("local:"):
        n = text.partition(":")[2] or "1"
        if not n.isdigit() or int(n) < 1:
            raise ValueError(f"'{text}' is not local:N with N a positive whole number")
        return "local", int(n)
    if not text or any(c.isspace() for c in text):
        raise ValueError(f"'{text}' is not a scheduler address such as tcp://host:8786")
    return "address", text


#: what a Dask scheduler says first on a new connection holds these words (its
#: handshake: the comm settings of ``distributed.comm.core``, msgpack-encoded after a
#: little-endian 8-byte length); read as a plausibility check, not parsed
_GREETING_WORDS = (b"compression", b"python")
#: the greeting's length is at most this many bytes (another service's first bytes
#: read as a length are usually far larger: "HTTP/1.1" is about 3.6e18)
_GREETING_MAX = 1 << 20
#: the port the scheduler's dashboard (an HTTP server) listens on by default
_DASHBOARD_PORT = 8787


def probe_scheduler(address, timeout=CONNECT_TIMEOUT):
    """Check, within ``timeout`` seconds in all, that ``address`` is a Dask scheduler:
    it takes a TCP connection and greets first, as the scheduler does, with a message
    of plausible length holding the handshake's words.  BackendUnavailable saying what
    answered instead (nothing, a web server, another service) and how to go on.

    Only ``tcp://`` (the default) addresses are probed this far; for other transports
    (``tls://``, ``ws://``, ...) the probe checks that the port takes a connection,
    and the client's own time-out does the rest.
    """
    import socket
    import time
    from distributed.comm.addressing import parse_address, parse_host_port
    deadline = time.monotonic() + timeout
    try:
        scheme, location = parse_address(str(address))
        host, port = parse_host_port(location, 8786)
    except (ValueError, TypeError) as exc:
        raise BackendUnavailable(f"{address} is not a scheduler address ({exc})") from None
    if scheme == "inproc":
        return
    hint = (" (port 8787 is where a scheduler's dashboard, a web page, usually listens; "
            "the scheduler itself usually listens on 8786)" if port == _DASHBOARD_PORT else "")
    try:
        sock = socket.create_connection((host, port), timeout=max(0.1, deadline - time.monotonic()))
    except socket.timeout:
        raise BackendUnavailable(f"{address}: no answer to a connection within {timeout:g} s "
                                 "(a firewall, or no such host on the network)") from None
    except OSError as exc:
        raise BackendUnavailable(f"{address}: the connection was refused or failed "
                                 f"({exc.strerror or exc}): no scheduler listens there") from None
    with sock:
        if scheme != "tcp":
            return
        got = b""
        try:
            while len(got) < 8 + 4096:
                left = deadline - time.monotonic() - (1.0 if not got else 0.0)
                if left <= 0:
                    break
                sock.settimeout(left)
                chunk = sock.recv(65536)
                if not chunk:
                    break
                got += chunk
                if len(got) >= 8 and (all(w in got for w in _GREETING_WORDS)
                                      or not _plausible_length(got)
                                      or len(got) >= 8 + _length(got)):
                    break
        except socket.timeout:
            pass
        except OSError as exc:
            raise BackendUnavailable(f"{address}: the connection broke before the scheduler's "
                                     f"greeting ({exc.strerror or exc})") from None
        if not got:
            raise BackendUnavailable(f"{address}: something accepts connections there but "
                                     f"said nothing within {timeout:g} s, as a Dask scheduler "
                                     f"does at once; it is not one{_web_hint(sock, deadline)}"
                                     f"{hint}")
        if not _plausible_length(got) or not all(w in got for w in _GREETING_WORDS):
            shown = got[:24].decode("ascii", "replace")
            shown = "".join(c if c.isprintable() else "." for c in shown)
            raise BackendUnavailable(f"{address}: the service there is not a Dask scheduler "
                                     f"(its first bytes: '{shown}'){hint}")


def _length(got: bytes) -> int:
    """The length a greeting's first 8 bytes announce (little-endian)."""
    return int.from_bytes(got[:8].ljust(8, b"\0"), "little")


def _plausible_length(got: bytes) -> bool:
    return 16 <= _length(got) <= _GREETING_MAX


def _web_hint(sock, deadline) -> str:
    """'; it answers HTTP (a web server)' when a request in the time left gets an HTTP
    reply (a dashboard, a web service), else ''."""
    import socket
    import time
    try:
        sock.settimeout(max(0.05, deadline - time.monotonic()))
        sock.sendall(b"HEAD / HTTP/1.0\r\n\r\n")
        return ("; it answers HTTP (a web server)" if sock.recv(16).startswith(b"HTTP/")
                else "")
    except (OSError, socket.timeout):
        return ""


def available_cores() -> int:
    """Cores this process may run on (its CPU affinity; all cores where unknown)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def available_memory() -> int | None:
    """Bytes of memory available to new processes now (None where unknown)."""
    try:
        import psutil
        return int(psutil.virtual_memory().available)
    except Exception:  # pragma: no cover - psutil comes with Dask distributed
        return None


#: a local Dask worker process before any data: the interpreter, numpy, scipy, numba,
#: Dask (measured: about 240 MiB resident with the kernels imported, Python 3.11; rounded up)
WORKER_OVERHEAD = 300 * 2 ** 20


def local_worker_cap(n, per_worker_bytes=0, cores=None, memory=None):
    """(workers to start, why fewer) for ``local:n``: at most one per core, and as many
    as the memory available holds at ``WORKER_OVERHEAD + per_worker_bytes`` each (at
    least one); ``why`` is '' when all ``n`` fit."""
    cores = available_cores() if cores is None else cores
    memory = available_memory() if memory is None else memory
    use, why = n, []
    if use > cores:
        use = cores
        why.append(f"this machine has {cores} core{'s' if cores != 1 else ''}")
    if memory is not None:
        each = WORKER_OVERHEAD + max(0, int(per_worker_bytes))
        fit = max(1, int(0.8 * memory // each))
        if use > fit:
            use = fit
            why.append(f"{fit} worker{'s' if fit != 1 else ''} of about "
                       f"{each / 2 ** 30:.2g} GiB each fit the memory available "
                       f"({memory / 2 ** 30:.3g} GiB)")
    return use, " and ".join(why)


def cap_threads(n):
    """(threads to use, why fewer) for ``--workers n``: at most one per core (the
    result never depends on the count, and each thread holds its scoring arrays)."""
    cores = available_cores()
    if n > cores:
        return cores, f"this machine has {cores} core{'s' if cores != 1 else ''}"
    return n, ""


def dask_client(scheduler, timeout=CONNECT_TIMEOUT, per_worker_bytes=0, notes=None):
    """A Dask client for ``scheduler`` (kept for the life of the process, see
    :func:`close_clients`); BackendUnavailable when none can be had in ``timeout`` s.

    A scheduler address is probed first (:func:`probe_scheduler`), so a port that is
    not a scheduler's is refused within ``timeout`` seconds, naming what answered.
    ``local:N`` starts at most one worker per core and as many as the memory holds
    (:func:`local_worker_cap`, ``per_worker_bytes`` the job each worker will hold);
    when that is fewer than N, ``notes`` (a list) receives a line saying so.
    """
    client = _CLIENTS.get(scheduler)
    if client is not None:
        return client
    kind, value = parse_scheduler(scheduler)
    try:
        import logging
        from distributed import Client, LocalCluster
    except ImportError as exc:  # pragma: no cover - a dependency
        raise BackendUnavailable(f"Dask distributed is not installed ({exc})") from None
    try:
        if kind == "local":
            n, why = local_worker_cap(value, per_worker_bytes)
            if why and notes is not None:
                notes.append(f"--scheduler {scheduler}: starting {n} worker"
                             f"{'s' if n != 1 else ''}, not {value}: {why}")
            cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                   host="127.0.0.1", dashboard_address=":0",
                                   silence_logs=logging.ERROR)
            client = Client(cluster, timeout=timeout)
            client._groupsrc_cluster = cluster
        else:
            probe_scheduler(value, timeout)
            client = Client(value, timeout=timeout)
    except (OSError, TimeoutError, ValueError) as exc:
        what = (f"no Dask scheduler answered at {value} within {timeout:g} s"
                if kind == "address" else f"a local Dask cluster could not start ({exc})")
        raise BackendUnavailable(what) from None
    _CLIENTS[scheduler] = client
    return client


def close_clients():
    """Close every Dask client (and local cluster) this process opened."""
    while _CLIENTS:
        _, client = _CLIENTS.popitem()
        cluster = getattr(client, "_groupsrc_cluster", None)
        try:
            client.close()
            if cluster is not None:
                cluster.close()
        except Exception:  # pragma: no cover - closing must never fail a run
            pass


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


import atexit  # noqa: E402  (registered once the clients exist)
atexit.register(close_clients)

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
