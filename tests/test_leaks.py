"""Nothing is left behind: worker processes die with their parent, temporary files of
killed runs are removed on the next start, and the loading cache keeps to a size limit.

The promises are the project's own (README, "Inputs": the loading cache; "Speed, scale
and long runs"); the processes are real (SIGKILL, as the kernel's OOM killer or
``kill -9`` sends it) and their fate is read from the system (psutil).
"""

import json
import os
import signal
import subprocess
import sys
import tempfile
import time

import psutil
import pytest

from conftest import make_cohort
from groupsrc.cli import main
from groupsrc.inputs import cache_upkeep
from groupsrc.processes import host_tag, owner_token
from groupsrc.stats.engine import memory


def _gone(pid):
    try:
        return psutil.Process(pid).status() == psutil.STATUS_ZOMBIE
    except psutil.NoSuchProcess:
        return True


def _wait(pred, timeout=30.0):
    t = time.monotonic()
    while time.monotonic() - t < timeout:
        if pred():
            return True
        time.sleep(0.02)
    return False


def _dead_pid():
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


# ----------------------------------------------------------------------------
# worker processes
# ----------------------------------------------------------------------------

POOL = """
import multiprocessing, os, sys, time
from concurrent.futures import ProcessPoolExecutor
from groupsrc.processes import die_with_parent
options = {"initializer": die_with_parent, "initargs": (os.getpid(),)} if sys.argv[1] == "1" else {}
pool = ProcessPoolExecutor(2, mp_context=multiprocessing.get_context("fork"), **options)
futures = [pool.submit(time.sleep, 120) for _ in range(2)]
while len(pool._processes) < 2:
    time.sleep(0.01)
print(" ".join(str(p) for p in pool._processes), flush=True)
time.sleep(120)
"""


@pytest.mark.parametrize("armed", [True, False])
def test_pool_workers_die_with_their_parent(armed):
    parent = subprocess.Popen([sys.executable, "-c", POOL, "1" if armed else "0"],
                              stdout=subprocess.PIPE, text=True)
    workers = [int(p) for p in parent.stdout.readline().split()]
    assert len(workers) == 2
    parent.send_signal(signal.SIGKILL)
    parent.wait()
    try:
        if armed:
            assert _wait(lambda: all(_gone(w) for w in workers)), "workers outlived the parent"
        else:
            # the control: without the helper a forked worker outlives its parent (the
            # leak the helper closes), so the check above can fail
            time.sleep(1.0)
            assert not any(_gone(w) for w in workers)
    finally:
        for w in workers:
            try:
                os.kill(w, signal.SIGKILL)
            except ProcessLookupError:
                pass


@pytest.mark.skipif((os.cpu_count() or 1) < 2, reason="figures are drawn in one process "
                    "on a single core")
def test_report_figure_workers_die_when_the_report_is_killed(tmp_path):
    analysis = make_cohort(tmp_path / "cohort")
    out = tmp_path / "res"
    assert main(["run", str(analysis), "--out", str(out), "--resamples", "20",
                 "--quiet"]) == 0
    report = subprocess.Popen([sys.executable, "-m", "groupsrc.cli", "report", str(out)],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    me = psutil.Process(report.pid)
    children = []

    def drawing():
        try:
            children[:] = me.children()
        except psutil.NoSuchProcess:
            return True
        return bool(children)
    assert _wait(drawing, timeout=300), "no figure worker seen"
    assert children, "the report ended before its figure workers could be seen"
    report.send_signal(signal.SIGKILL)
    report.wait()
    pids = [c.pid for c in children]
    try:
        assert _wait(lambda: all(_gone(p) for p in pids)), "figure workers outlived the report"
    finally:
        for p in pids:
            try:
                os.kill(p, signal.SIGKILL)
            except ProcessLookupError:
                pass


# ----------------------------------------------------------------------------
# temporary files
# ----------------------------------------------------------------------------

#: `groupsrc check` that SIGKILLs itself right after decoding the maps into the cache's
#: temporary file, before storing it (a kill while the loading cache is built)
KILLED_WHILE_CACHING = """
import os, signal, sys
import groupsrc.inputs.cache as cache
cache.store = lambda *a, **k: os.kill(os.getpid(), signal.SIGKILL)
from groupsrc.cli import main
sys.exit(main(sys.argv[1:]))
"""


def test_cache_temporaries_of_a_killed_run_go_on_the_next_start(tmp_path, capsys):
    analysis = make_cohort(tmp_path / "cohort")
    folder = tmp_path / "cache"
    env = dict(os.environ, GROUPSRC_CACHE_DIR=str(folder))
    killed = subprocess.run([sys.executable, "-c", KILLED_WHILE_CACHING, "check",
                             str(analysis)], env=env, capture_output=True, text=True,
                            timeout=300)
    assert killed.returncode == -signal.SIGKILL, killed.stderr
    left = [p.name for p in folder.iterdir() if ".tmp-" in p.name]
    assert left and all(f".f32.tmp-{host_tag()}-" in n for n in left), left
    # files of a live process (this one) and of another host are left alone; an earlier
    # style file of a gone process untouched for two hours goes, a fresh one stays
    live = folder / f"{'0' * 32}.f32.tmp-{owner_token()}"
    other_host = folder / f"{'1' * 32}.f32.tmp-{'0' * 8 if host_tag() != '0' * 8 else '1' * 8}" \
                          f"-{_dead_pid()}-5"
    old_style = folder / f"{'2' * 32}.f32.tmp{_dead_pid()}"
    fresh_old_style = folder / f"{'3' * 32}.f32.tmp{_dead_pid()}"
    mine = folder / "notes.tmp-x"             # not a name of the cache's
    for p in (live, other_host, old_style, fresh_old_style, mine):
        p.write_bytes(b"x")
    two_hours_ago = time.time() - 7200
    os.utime(old_style, (two_hours_ago, two_hours_ago))
    os.environ["GROUPSRC_CACHE_DIR"] = str(folder)     # undone by conftest's monkeypatch
    assert main(["check", str(analysis)]) == 0
    text = capsys.readouterr().err
    for name in left:
        assert not (folder / name).exists() and name in text, text
    assert not old_style.exists()
    assert live.exists() and other_host.exists() and fresh_old_style.exists() and mine.exists()


def test_work_folders_of_killed_runs_are_removed(tmp_path):
    dead = tmp_path / f"{memory.WORK_PREFIX}{host_tag()}-{_dead_pid()}-7-abcd"
    live = tmp_path / f"{memory.WORK_PREFIX}{owner_token()}-efgh"
    unnamed = tmp_path / f"{memory.WORK_PREFIX}x1y2z3"         # an earlier version's
    for d in (dead, live, unnamed):
        d.mkdir()
        (d / "a.f32").write_bytes(b"1234")
    assert memory.remove_dead_work_dirs(tmp_path) == [dead.name]
    assert not dead.exists() and live.exists() and unnamed.exists()


def test_the_next_run_removes_a_killed_runs_work_folder(tmp_path, monkeypatch, capsys):
    """The wiring of the above into ``groupsrc run`` (README, "After a kill")."""
    analysis = make_cohort(tmp_path / "cohort")
    temp = tmp_path / "temp"
    temp.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(temp))
    dead = temp / f"{memory.WORK_PREFIX}{host_tag()}-{_dead_pid()}-7-abcd"
    dead.mkdir()
    (dead / "a.f32").write_bytes(b"1234")
    assert main(["run", str(analysis), "--out", str(tmp_path / "res"), "--resamples", "20",
                 "--quiet"]) == 0
    assert not dead.exists()
    assert dead.name in capsys.readouterr().err


#: a process holding groupsrc's own `local:2` cluster; prints its worker processes
LOCAL_CLUSTER = """
import os, time
from groupsrc.stats.engine.scheduler import dask_client
client = dask_client("local:2")
pids = list(client.run(os.getpid).values())
print(" ".join(map(str, pids)), flush=True)
time.sleep(300)
"""


@pytest.mark.skipif((os.cpu_count() or 1) < 2, reason="local:2 starts one worker per core")
def test_local_cluster_workers_die_with_their_parent():
    parent = subprocess.Popen([sys.executable, "-c", LOCAL_CLUSTER], stdout=subprocess.PIPE,
                              stderr=subprocess.DEVNULL, text=True)
    try:
        workers = [int(p) for p in parent.stdout.readline().split()]
    finally:
        parent.send_signal(signal.SIGKILL)
        parent.wait()
    assert len(workers) == 2 and parent.pid not in workers, workers
    try:
        assert _wait(lambda: all(_gone(w) for w in workers)), "Dask workers outlived the run"
    finally:
        for w in workers:
            try:
                os.kill(w, signal.SIGKILL)
            except ProcessLookupError:
                pass


# ----------------------------------------------------------------------------
# the cache's size limit and `groupsrc cache`
# ----------------------------------------------------------------------------

def _entry_size(folder):
    return {e.key: e.size for e in cache_upkeep.entries(folder)}


def test_the_cache_keeps_to_its_limit_least_recently_used_first(tmp_path, monkeypatch,
                                                                 capsys):
    folder = tmp_path / "cache"
    monkeypatch.setenv("GROUPSRC_CACHE_DIR", str(folder))
    cohorts = [make_cohort(tmp_path / f"c{i}", seed=i) for i in range(3)]
    keys = []
    for a in cohorts[:2]:
        assert main(["check", str(a)]) == 0
        keys.append(next(k for k in _entry_size(folder) if k not in keys))
    one = max(_entry_size(folder).values())
    monkeypatch.setenv("GROUPSRC_CACHE_LIMIT", str(2 * one + one // 2))   # room for two
    time.sleep(0.05)
    assert main(["check", str(cohorts[0])]) == 0          # a hit: c0 used last
    assert "reused" in capsys.readouterr().out
    time.sleep(0.05)
    assert main(["check", str(cohorts[2])]) == 0          # a third entry: c1 must go
    left = _entry_size(folder)
    assert keys[0] in left and keys[1] not in left and len(left) == 2, left
    assert sum(left.values()) <= 2 * one + one // 2


def test_groupsrc_cache_shows_clears_and_limits(tmp_path, monkeypatch, capsys):
    folder = tmp_path / "cache"
    monkeypatch.setenv("GROUPSRC_CACHE_DIR", str(folder))
    monkeypatch.delenv("GROUPSRC_CACHE_LIMIT", raising=False)
    for i in range(2):
        assert main(["check", str(make_cohort(tmp_path / f"c{i}", seed=i))]) == 0
    capsys.readouterr()
    assert main(["cache"]) == 0
    text = capsys.readouterr().out
    found = cache_upkeep.entries(folder)
    assert len(found) == 2 and "entries      : 2, " in text, text
    assert all(e.key[:12] in text for e in found) and "4 GiB (default" in text, text
    # --limit: stored in the folder, the least recently used entry removed
    one = max(e.size for e in found)
    assert main(["cache", "--limit", str(one + one // 2)]) == 0
    text = capsys.readouterr().out
    assert [e.key for e in cache_upkeep.entries(folder)] == [found[-1].key], text
    assert json.loads((folder / cache_upkeep.LIMIT_FILE).read_text())["bytes"] == one + one // 2
    # --clear: every entry and the hash memo go; a file of the user's in the folder stays
    (folder / "notes.json").write_text("{}")
    assert main(["cache", "--clear"]) == 0
    text = capsys.readouterr().out
    assert "1 entry removed" in text and cache_upkeep.entries(folder) == [], text
    assert not (folder / cache_upkeep.HASHES_FILE).exists() and (folder / "notes.json").exists()
    assert (folder / cache_upkeep.LIMIT_FILE).exists()          # the setting stays
    # a bad size is a usage error that says why, a negative one too
    for value, why in (("big", "'big' is not a size"), ("-5G", "'-5G' is not a positive size")):
        with pytest.raises(SystemExit) as exit_:
            main(["cache", "--limit", value])
        err = capsys.readouterr().err
        assert exit_.value.code == 2 and why in err and "expected one argument" not in err, err
