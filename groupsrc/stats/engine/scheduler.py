"""Dask clients: scheduler addresses probed, local clusters sized to the machine.

A :class:`~.backends.DaskBackend` gets its client here (:func:`dask_client`):
clients are kept per scheduler string for the life of the process and closed
by :func:`close_clients` (the pipeline calls it; so does the interpreter's exit).

* **An address** is probed first (:func:`probe_scheduler`): a Dask scheduler
  speaks first on a new connection, so a port where nothing does within
  ``CONNECT_TIMEOUT`` seconds (a silent listener, a web server such as the
  dashboard) or where another service answers is refused, naming the address
  and what answered, before distributed's client (which trusts the port) is
  made.
* **``local:N``** starts at most one single-threaded worker process per core
  this process may use, and as many as the memory available holds
  (:func:`local_worker_cap`); :func:`cap_threads` does the same for the
  threads of ``--workers``.
"""

from __future__ import annotations

import os


class BackendUnavailable(RuntimeError):
    """The backend cannot run here (e.g. no Dask scheduler answers); the message says why
    and what to do."""


#: seconds to wait for a Dask scheduler to answer
CONNECT_TIMEOUT = 10.0
_CLIENTS: dict = {}


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
                                     f"said nothing within {timeout:g} s (a Dask scheduler "
                                     f"speaks at once): it is not a scheduler"
                                     f"{_web_hint(sock, deadline)}{hint}")
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


import atexit  # noqa: E402  (registered once the clients exist)
atexit.register(close_clients)
