"""One run per results folder at a time (outputs/runlock.results_lock), with real processes.

The promises checked are the project's own (README, "When a results folder is
replaced"; DESIGN.md, "Reliability principles"): a second run on the same --out --
with --overwrite, with --resume, or starting afresh -- is refused while the first
works, naming the process that holds the folder, and changes nothing of the first's
(its earlier results, its live checkpoint); a lock left by a run killed outright
(SIGKILL) is taken over by the next run, which says so once; a damaged checkpoint is
named as such and a fresh start offered.  No outside value is involved.
"""

import hashlib
import os
import signal
import subprocess
import sys
import time

import pytest

from conftest import make_cohort
from groupsrc.cli import main
from groupsrc.outputs.runlock import lock_path, results_lock
from groupsrc.pipeline import checkpoint_folder

#: a real `groupsrc run` that, once its first batch of resamples is saved in the
#: checkpoint, writes READY and then sleeps in the middle of its resampling (so the
#: run is alive, holds its lock and has a live checkpoint while the test works)
HOLDING = """
import os, sys, time
import groupsrc.stats.inference as inference
import groupsrc.stats.engine.checkpoint as checkpoint
inference.auto_batch = lambda *a, **k: 16
checkpoint.FLUSH_SECONDS = 0.0
add = checkpoint.ContrastProgress.add
def add_then_wait(self, lo, pos, neg):
    add(self, lo, pos, neg)
    open(os.environ["READY"], "w").close()
    time.sleep(600)
checkpoint.ContrastProgress.add = add_then_wait
from groupsrc.cli import main
sys.exit(main(sys.argv[1:]))
"""


def _tree(folder):
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _groupsrc(args, cache):
    env = dict(os.environ, GROUPSRC_CACHE_DIR=str(cache))
    return subprocess.run([sys.executable, "-m", "groupsrc.cli"] + [str(a) for a in args],
                          capture_output=True, text=True, env=env, timeout=600)


def _wait_for(path, proc, timeout=300.0):
    t = time.monotonic()
    while time.monotonic() - t < timeout:
        if path.exists():
            return
        if proc.poll() is not None:
            raise AssertionError(f"the holding run ended early:\n{proc.stderr.read()}")
        time.sleep(0.05)
    raise AssertionError("the holding run never reached its resampling")


@pytest.fixture
def cohort(tmp_path):
    return make_cohort(tmp_path / "cohort")


def test_a_second_run_is_refused_while_the_first_works(cohort, tmp_path):
    cache = tmp_path / "cache"
    out = tmp_path / "res"
    # earlier finished results in OUT, which the first run will replace (--overwrite)
    first = _groupsrc(["run", cohort, "--out", out, "--resamples", 20, "--quiet"], cache)
    assert first.returncode == 0, first.stderr
    earlier = _tree(out)
    ready = tmp_path / "ready"
    holder = subprocess.Popen(
        [sys.executable, "-c", HOLDING, "run", str(cohort), "--out", str(out), "--overwrite",
         "--resamples", "200", "--quiet"],
        env=dict(os.environ, GROUPSRC_CACHE_DIR=str(cache), READY=str(ready)),
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        _wait_for(ready, holder)
        cp = checkpoint_folder(out)
        live = _tree(cp)
        assert live, "the holding run has no checkpoint"
        for extra in (["--overwrite"], ["--overwrite", "--resume"], ["--resume"], []):
            got = _groupsrc(["run", cohort, "--out", out, "--resamples", 200] + extra, cache)
            text = got.stdout + got.stderr
            assert got.returncode == 1, (extra, text)
            assert "in use by another run" in text and f"process {holder.pid}" in text, text
            assert "Traceback" not in text, text
            assert "results written" not in text, text
            # nothing of the first run's was touched: earlier results, live checkpoint
            assert _tree(out) == earlier, extra
            assert _tree(cp) == live, extra
        # the report of the folder is refused too while the run holds it
        got = _groupsrc(["report", out], cache)
        assert got.returncode == 1 and f"process {holder.pid}" in got.stderr, got.stderr
        assert _tree(out) == earlier
    finally:
        holder.send_signal(signal.SIGKILL)
        holder.wait()
    assert holder.returncode == -signal.SIGKILL
    # a lock left by a killed run: taken over by the next run, said once
    assert lock_path(out).exists()
    # ... whose checkpoint is cut short: named as damaged, a fresh start offered
    npz = sorted(checkpoint_folder(out).glob("*.npz"))
    assert npz, "the killed run saved no progress"
    npz[0].write_bytes(npz[0].read_bytes()[:40])
    got = _groupsrc(["run", cohort, "--out", out, "--resamples", 200, "--overwrite",
                     "--resume"], cache)
    text = got.stdout + got.stderr
    assert got.returncode == 1, text
    assert "Traceback" not in text and "BadZipFile" not in text.replace("(BadZipFile)", "")
    assert "is damaged" in text and npz[0].name in text, text
    assert "without --resume to start afresh" in text, text
    assert text.count("took over the lock") == 1, text
    assert f"process {holder.pid}" in text, text
    assert _tree(out) == earlier
    assert not lock_path(out).exists()
    # the fresh start: no second notice (the lock was released cleanly), results written
    got = _groupsrc(["run", cohort, "--out", out, "--resamples", 200, "--overwrite",
                     "--quiet"], cache)
    assert got.returncode == 0, got.stderr
    assert "took over" not in got.stdout + got.stderr
    assert not lock_path(out).exists() and not checkpoint_folder(out).exists()
    assert _tree(out) != earlier


def test_the_lock_is_reentrant_and_removed(tmp_path):
    out = tmp_path / "new" / "deeper" / "res"
    with results_lock(out) as path:
        assert path == lock_path(out) and path.exists()
        with results_lock(out):
            assert path.exists()
        assert path.exists()
    assert not path.exists()
    # the folders made to hold the lock are removed again when left empty
    assert not (tmp_path / "new").exists()


def test_a_lock_of_a_dead_process_is_taken_over_once(cohort, tmp_path, capsys):
    """A lock record naming a process that no longer exists (its flock is gone with it)."""
    import json

    from groupsrc.processes import host_tag
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    out = tmp_path / "res"
    lock_path(out).write_text(json.dumps({"owner": f"{host_tag()}-{dead.pid}-1",
                                          "pid": dead.pid, "host": host_tag()}))
    assert main(["run", str(cohort), "--out", str(out), "--resamples", "20", "--quiet"]) == 0
    text = capsys.readouterr().err
    assert text.count("took over the lock") == 1 and f"process {dead.pid}" in text, text
    assert not lock_path(out).exists()
    assert main(["run", str(cohort), "--out", str(out), "--resamples", "20", "--quiet",
                 "--overwrite"]) == 0
    assert "took over" not in capsys.readouterr().err


def test_a_lock_held_by_another_process_refuses_this_one(tmp_path):
    """The holder is a second process taking the lock as any run does; the refusal names
    it and its command, and the lock is free once that process is gone."""
    out = tmp_path / "res"
    code = ("import sys, time\nfrom groupsrc.outputs.runlock import results_lock\n"
            f"with results_lock({str(out)!r}, command=['holder']):\n"
            "    print('held', flush=True)\n    time.sleep(600)\n")
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "held"
        from groupsrc.inputs.problems import InputError
        with pytest.raises(InputError) as err:
            with results_lock(out):
                pass
        text = err.value.problems.format()
        assert f"process {proc.pid}" in text and "holder" in text, text
    finally:
        proc.kill()
        proc.wait()
    with results_lock(out):         # its process is gone: the lock is free again
        pass
