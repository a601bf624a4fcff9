"""--scheduler at a port that is not a Dask scheduler, local worker caps, option checks.

The promises are the project's own (README, "Speed, scale and long runs"): an address
that is not a scheduler is refused within the connection time-out (10 s) naming the
address and what answered; ``local:N`` starts at most one worker per core and as many as
the memory holds, and says so; absurd ``--memory``, ``--workers`` and ``--resamples``
values are refused or named.  The listeners are real sockets on the loopback interface:
a web server (Python's ``http.server``, as a scheduler's dashboard is one), a listener
that never speaks, and one that greets like another service.  The time bounds below are
hang guards on the documented time-out, not speed measurements.
"""

import http.server
import math
import os
import socket
import subprocess
import sys
import threading
import time

import pytest

from conftest import make_cohort
from groupsrc.cli import main
from groupsrc.stats.engine import scheduler
from groupsrc.stats.engine.scheduler import (CONNECT_TIMEOUT, BackendUnavailable, dask_client,
                                             local_worker_cap, probe_scheduler)


@pytest.fixture
def web_server():
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0),
                                             http.server.SimpleHTTPRequestHandler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    yield f"tcp://127.0.0.1:{server.server_address[1]}"
    server.shutdown()
    server.server_close()


@pytest.fixture
def silent_socket():
    """Accepts connections (the kernel's backlog does) and never says a word."""
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    sock.listen(8)
    yield f"tcp://127.0.0.1:{sock.getsockname()[1]}"
    sock.close()


@pytest.fixture
def other_service():
    """Greets every connection with a banner of another protocol, then waits."""
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    sock.listen(8)
    stop = threading.Event()

    def serve():
        sock.settimeout(0.2)
        held = []
        while not stop.is_set():
            try:
                conn, _ = sock.accept()
            except OSError:
                continue
            conn.sendall(b"SSH-2.0-ExampleServer_1.0\r\n")
            held.append(conn)
        for c in held:
            c.close()
    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    yield f"tcp://127.0.0.1:{sock.getsockname()[1]}"
    stop.set()
    thread.join()
    sock.close()


def _refused(address):
    t = time.monotonic()
    with pytest.raises(BackendUnavailable) as err:
        dask_client(address)
    return str(err.value), time.monotonic() - t


def test_a_web_server_is_refused_naming_it(web_server):
    text, spent = _refused(web_server)
    assert web_server in text and "not a scheduler" in text and "answers HTTP" in text, text
    assert spent < CONNECT_TIMEOUT + 2, spent       # hang guard (it used to run > 10 min)


def test_a_silent_listener_is_refused_after_the_time_out(silent_socket):
    text, spent = _refused(silent_socket)
    assert silent_socket in text and f"said nothing within {CONNECT_TIMEOUT:g} s" in text, text
    assert spent < CONNECT_TIMEOUT + 2, spent       # hang guard (it used to take 60 s)


def test_another_service_is_refused_at_once(other_service):
    text, spent = _refused(other_service)
    assert other_service in text and "not a Dask scheduler" in text, text
    assert "SSH-2.0-ExampleServer" in text, text     # what answered, shown
    assert spent < CONNECT_TIMEOUT, spent


def test_nothing_listening_is_refused():
    free = socket.socket()
    free.bind(("127.0.0.1", 0))
    address = f"tcp://127.0.0.1:{free.getsockname()[1]}"
    free.close()                                     # nobody listens there now
    text, _ = _refused(address)
    assert address in text and "refused" in text, text


def test_a_real_scheduler_passes_the_probe():
    """A real Dask scheduler (distributed's own LocalCluster) greets as the probe expects."""
    from distributed import LocalCluster
    with LocalCluster(n_workers=0, processes=False, protocol="tcp", host="127.0.0.1",
                      dashboard_address=":0") as cluster:
        assert cluster.scheduler_address.startswith("tcp://")
        probe_scheduler(cluster.scheduler_address)


def test_run_with_a_web_server_as_scheduler_exits_1(web_server, tmp_path):
    analysis = make_cohort(tmp_path / "cohort")
    env = dict(os.environ, GROUPSRC_CACHE_DIR=str(tmp_path / "cache"))
    got = subprocess.run([sys.executable, "-m", "groupsrc.cli", "run", str(analysis),
                          "--scheduler", web_server, "--out", str(tmp_path / "res")],
                         capture_output=True, text=True, env=env, timeout=300)
    assert got.returncode == 1, got.stderr
    assert "Traceback" not in got.stderr and web_server in got.stderr, got.stderr
    assert "--scheduler local:N" in got.stderr          # the way on
    assert "loading maps" not in got.stderr             # refused before the maps are read
    assert not (tmp_path / "res").exists()


# ----------------------------------------------------------------------------
# local workers
# ----------------------------------------------------------------------------

def test_local_workers_are_capped_by_cores_and_memory():
    assert local_worker_cap(4, cores=8, memory=64 * 2 ** 30) == (4, "")
    n, why = local_worker_cap(999, cores=2, memory=64 * 2 ** 30)
    assert n == 2 and "2 cores" in why
    each = scheduler.WORKER_OVERHEAD + 2 ** 30
    n, why = local_worker_cap(16, per_worker_bytes=2 ** 30, cores=32, memory=5 * 2 ** 30)
    assert n == math.floor(0.8 * 5 * 2 ** 30 / each) and "memory available" in why
    assert local_worker_cap(8, per_worker_bytes=2 ** 40, cores=8, memory=2 ** 30)[0] == 1


def test_local_999_runs_with_one_worker_per_core(tmp_path, capsys):
    analysis = make_cohort(tmp_path / "cohort")
    cores = scheduler.available_cores()
    rc = main(["run", str(analysis), "--scheduler", "local:999", "--resamples", "20",
               "--out", str(tmp_path / "res"), "--quiet"])
    text = capsys.readouterr().err
    assert rc == 0, text
    assert f"local:999: starting {cores} worker" in text and "not 999" in text, text


# ----------------------------------------------------------------------------
# option values
# ----------------------------------------------------------------------------

def _usage(argv, capsys):
    with pytest.raises(SystemExit) as exit_:
        main(argv)
    return exit_.value.code, capsys.readouterr().err


@pytest.mark.parametrize("value,fragment", [("-5G", "'-5G' is not a positive size"),
                                            ("1T", "more than this machine's memory"),
                                            ("99999999999G", "more than this machine's memory"),
                                            ("lots", "'lots' is not a size")])
def test_memory_values_are_checked(tmp_path, capsys, value, fragment):
    from groupsrc.stats.engine.memory import physical_memory
    if value == "1T" and (physical_memory() or 0) >= 2 ** 40:
        pytest.skip("this machine has a terabyte")
    code, err = _usage(["run", str(tmp_path / "a.toml"), "--memory", value], capsys)
    assert code == 2 and fragment in err, err
    assert "expected one argument" not in err


def test_too_many_workers_are_capped_and_said(tmp_path, capsys):
    analysis = make_cohort(tmp_path / "cohort")
    cores = scheduler.available_cores()
    rc = main(["run", str(analysis), "--workers", "1000", "--resamples", "20", "--out",
               str(tmp_path / "res"), "--quiet"])
    text = capsys.readouterr().err
    assert rc == 0, text
    assert f"--workers 1000: using {cores}, one per core" in text, text


def test_too_few_resamples_are_named(tmp_path, capsys):
    analysis = make_cohort(tmp_path / "cohort")
    rc = main(["run", str(analysis), "--resamples", "1", "--out", str(tmp_path / "res"),
               "--quiet"])
    text = capsys.readouterr().err
    assert rc == 0, text
    # alpha 0.05 (the default): p = b / m over m resamples with the identity counted
    # (Phipson & Smyth 2010) is at least 1 / m, so m >= 1 / 0.05 = 20 are needed
    assert "1 resample (the observed data included)" in text and "at least 20" in text, text
    rc = main(["check", str(analysis)])
    assert rc == 0 and "note" not in capsys.readouterr().out    # 50 in the file: enough
