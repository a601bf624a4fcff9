"""Checkpoint and resume (groupsrc.stats.engine.checkpoint, pipeline.checkpoint_folder).

The promise checked is the project's own (DESIGN.md: a long run can be interrupted and
resumed to the same result); no outside value is involved.  A run is killed with SIGKILL
part-way through its resampling, resumed with --resume, and every output file is
compared byte for byte with an uninterrupted run (apart from the run record and the
timings).  Resumes against changed settings or inputs, of another version, or with
nothing to resume are refused with exit 1 naming the reason.
"""

import json
import os
import signal
import subprocess
import sys

import pytest

from conftest import make_cohort
from groupsrc.cli import main
from groupsrc.outputs.folder import sweep_stale
from groupsrc.pipeline import checkpoint_folder

#: runs groupsrc with small batches and a save after every batch; with KILL_AT=k it
#: SIGKILLs itself while adding the k-th batch of contrast KILL_IN (the process dies
#: mid-resampling, with some batches saved and others not)
WRAPPER = """
import os, signal, sys
import groupsrc.stats.inference as inference
import groupsrc.stats.engine.checkpoint as checkpoint
inference.auto_batch = lambda *a, **k: 16
checkpoint.FLUSH_SECONDS = 0.0
kill_at, kill_in = int(os.environ.get("KILL_AT", "0")), os.environ.get("KILL_IN", "")
seen = [0]
add = checkpoint.ContrastProgress.add
def killing_add(self, lo, pos, neg):
    add(self, lo, pos, neg)
    if kill_at and self.npz.stem == kill_in:
        seen[0] += 1
        if seen[0] == kill_at:
            os.kill(os.getpid(), signal.SIGKILL)
checkpoint.ContrastProgress.add = killing_add
from groupsrc.cli import main
sys.exit(main(sys.argv[1:]))
"""

RESAMPLES = "320"


@pytest.fixture(scope="module")
def cohort(tmp_path_factory):
    root = tmp_path_factory.mktemp("resume")
    analysis = make_cohort(root / "cohort", n_per_group=8)
    text = analysis.read_text().replace('correction = "cluster-mass"', 'correction = "tfce"')
    analysis.write_text(text)
    return analysis


def _run(args, env_extra=None, wrapper=True, cache=None):
    env = dict(os.environ, **(env_extra or {}))
    if cache:
        env["GROUPSRC_CACHE_DIR"] = str(cache)
    cmd = [sys.executable, "-c", WRAPPER] if wrapper else [sys.executable, "-m", "groupsrc.cli"]
    return subprocess.run(cmd + args, capture_output=True, text=True, env=env, timeout=600)


def _files(folder):
    return {p.relative_to(folder).as_posix(): p for p in sorted(folder.rglob("*")) if p.is_file()}


def _svg_ids_renumbered(path):
    """The SVG text with matplotlib's clip-path ids (which follow object addresses)
    numbered by first appearance."""
    import re
    text, names = path.read_text(), {}
    return re.sub(r"\bp[0-9a-f]{10}\b", lambda m: names.setdefault(m.group(0), f"p{len(names)}"),
                  text)


def _without_timings(path):
    data = json.loads(path.read_text())
    data.pop("timings", None)
    return data


@pytest.fixture(scope="module")
def reference(cohort, tmp_path_factory):
    out = tmp_path_factory.mktemp("ref") / "results"
    cache = tmp_path_factory.mktemp("cache")
    r = _run(["run", str(cohort), "--out", str(out), "--resamples", RESAMPLES, "--quiet"],
             cache=cache)
    assert r.returncode == 0, r.stderr
    return out, cache


def test_sigkill_mid_resampling_then_resume_gives_the_uninterrupted_results(cohort, reference,
                                                                           tmp_path):
    ref, cache = reference
    out = tmp_path / "results"
    args = ["run", str(cohort), "--out", str(out), "--resamples", RESAMPLES, "--quiet"]
    killed = _run(args, {"KILL_AT": "6", "KILL_IN": "age_slope"}, cache=cache)
    assert killed.returncode == -signal.SIGKILL
    cp = checkpoint_folder(out)
    assert not out.exists() and cp.is_dir()
    # the stale-folder cleanup of the next run must leave the checkpoint alone
    sweep_stale(out)
    assert cp.is_dir()
    resumed = _run(args + ["--resume"], wrapper=False, cache=cache)
    assert resumed.returncode == 0, resumed.stderr
    assert "resuming the interrupted run" in resumed.stderr
    assert not cp.exists()                        # removed once the results are in place
    assert_same_results(ref, out, "age_slope/null_distribution.tsv")


def assert_same_results(ref, out, must_have):
    """Every file of two results folders equal byte for byte, apart from timings (run.json,
    the timings of analysis_summary.json) and SVG clip-path ids; ``must_have`` among them."""
    a, b = _files(ref), _files(out)
    assert a.keys() == b.keys()
    compared = 0
    for name in a:
        if name == "run.json":
            continue                              # command, timings
        if name == "analysis_summary.json":
            assert _without_timings(a[name]) == _without_timings(b[name])
            continue
        if name.endswith(".svg"):                 # clip-path ids follow object addresses
            assert _svg_ids_renumbered(a[name]) == _svg_ids_renumbered(b[name]), name
            continue
        assert a[name].read_bytes() == b[name].read_bytes(), name
        compared += 1
    assert compared > 20 and must_have in a


def _interrupted(cohort, tmp_path, cache):
    out = tmp_path / "interrupted"
    r = _run(["run", str(cohort), "--out", str(out), "--resamples", RESAMPLES, "--quiet"],
             {"KILL_AT": "3", "KILL_IN": "rare_minus_frequent"}, cache=cache)
    assert r.returncode == -signal.SIGKILL
    return out


def test_resume_against_changed_settings_or_inputs_is_refused(cohort, reference, tmp_path,
                                                              capsys, monkeypatch):
    import shutil

    import numpy as np

    from conftest import N_T, SHAPE, write_map
    _, cache = reference
    monkeypatch.setenv("GROUPSRC_CACHE_DIR", str(cache))
    copy = tmp_path / "cohort"
    shutil.copytree(cohort.parent, copy)
    analysis = copy / cohort.name
    out = _interrupted(analysis, tmp_path, cache)
    base = ["run", str(analysis), "--out", str(out), "--quiet", "--resume"]
    assert main(base + ["--resamples", "400"]) == 1
    err = capsys.readouterr().err
    assert "--resume refused" in err and "inference.resamples: 320 -> 400" in err
    assert "Traceback" not in err
    # a map whose content changed is named
    changed = copy / "maps" / "sub-03_cond-rare.nii.gz"
    write_map(changed, np.random.default_rng(99).standard_normal(SHAPE + (N_T,)))
    assert main(base + ["--resamples", RESAMPLES]) == 1
    err = capsys.readouterr().err
    assert f"input {changed.resolve()} changed" in err or f"input {changed} changed" in err, err
    assert checkpoint_folder(out).is_dir()           # nothing was lost


def test_resume_of_another_version_or_of_nothing_is_refused(cohort, reference, tmp_path,
                                                           capsys, monkeypatch):
    _, cache = reference
    monkeypatch.setenv("GROUPSRC_CACHE_DIR", str(cache))
    out = tmp_path / "fresh"
    args = ["run", str(cohort), "--out", str(out), "--quiet", "--resume", "--resamples",
            RESAMPLES]
    assert main(args) == 1
    err = capsys.readouterr().err
    assert "nothing to resume" in err and "without --resume" in err
    out = _interrupted(cohort, tmp_path, cache)
    manifest = checkpoint_folder(out) / "manifest.json"
    data = json.loads(manifest.read_text())
    data["groupsrc_version"] = "0.0.1"
    manifest.write_text(json.dumps(data))
    assert main(["run", str(cohort), "--out", str(out), "--quiet", "--resume",
                 "--resamples", RESAMPLES]) == 1
    err = capsys.readouterr().err
    assert "another version of groupsrc (0.0.1" in err and "Traceback" not in err


def test_ctrl_c_then_resume_in_process(cohort, reference, tmp_path, capsys, monkeypatch):
    import groupsrc.stats.engine.checkpoint as checkpoint
    import groupsrc.stats.inference as inference
    ref, cache = reference
    monkeypatch.setenv("GROUPSRC_CACHE_DIR", str(cache))
    monkeypatch.setattr(inference, "auto_batch", lambda *a, **k: 16)
    monkeypatch.setattr(checkpoint, "FLUSH_SECONDS", 0.0)
    add = checkpoint.ContrastProgress.add
    calls = [0]

    def interrupting_add(self, lo, pos, neg):
        add(self, lo, pos, neg)
        calls[0] += 1
        if calls[0] == 25:
            raise KeyboardInterrupt
    monkeypatch.setattr(checkpoint.ContrastProgress, "add", interrupting_add)
    out = tmp_path / "results"
    args = ["run", str(cohort), "--out", str(out), "--resamples", RESAMPLES, "--quiet"]
    assert main(args) == 130
    assert "--resume" in capsys.readouterr().err
    monkeypatch.setattr(checkpoint.ContrastProgress, "add", add)
    assert main(args + ["--resume"]) == 0
    for name in ("rare_minus_frequent/null_distribution.tsv", "group_by_tone/p_corrected.nii.gz",
                 "age_slope/clusters.tsv"):
        assert (ref / name).read_bytes() == (out / name).read_bytes(), name


def test_quiet_keeps_notices_but_not_stage_lines(cohort, reference, tmp_path, capsys,
                                                 monkeypatch):
    # README: --quiet turns the progress bars and the per-stage lines off; notices that
    # need the user (here: the checkpoint is resumed) are still printed
    _, cache = reference
    monkeypatch.setenv("GROUPSRC_CACHE_DIR", str(cache))
    loud = tmp_path / "loud"
    assert main(["run", str(cohort), "--out", str(loud), "--resamples", "64"]) == 0
    assert "statistics done in" in capsys.readouterr().err
    out = _interrupted(cohort, tmp_path, cache)
    assert main(["run", str(cohort), "--out", str(out), "--resamples", RESAMPLES, "--quiet",
                 "--resume"]) == 0
    err = capsys.readouterr().err
    assert "resuming the interrupted run" in err
    for line in ("loaded and checked", "contrast ", "statistics done in", "results written in"):
        assert line not in err, line
