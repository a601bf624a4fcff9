"""The results folder never costs the user a file.

Each case builds its situation in a temporary folder, runs the command line
and asserts: the exit code, no traceback, the culprit named, and every user
file byte-identical afterwards.  The rules are those stated in
groupsrc/outputs/folder.py and the README's "Outputs" section.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import stat
import subprocess
import sys
import time
from pathlib import Path

import pytest

from conftest import copy_cohort
from groupsrc.cli import main
from groupsrc.outputs import folder as fo


def tree_hashes(root):
    root = Path(root)
    return {p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


def run_cli(args, capsys):
    rc = main([str(a) for a in args])
    out = capsys.readouterr()
    text = out.out + out.err
    assert "Traceback" not in text, text
    return rc, text


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    """One finished run of the tiny cohort: (analysis file, results folder)."""
    from conftest import make_cohort
    root = tmp_path_factory.mktemp("safety")
    analysis = make_cohort(root / "cohort")
    out = root / "res"
    assert main(["run", str(analysis), "--out", str(out)]) == 0
    return analysis, out


# ----------------------------------------------------------------------------
# --overwrite replaces only a folder groupsrc wrote
# ----------------------------------------------------------------------------

def test_overwrite_refuses_the_maps_folder(results, tmp_path, capsys):
    a = copy_cohort(results[0], tmp_path / "c")
    before = tree_hashes(a.parent)
    rc, text = run_cli(["run", a, "--out", a.parent / "maps", "--overwrite"], capsys)
    assert rc == 1
    assert str((a.parent / "maps").resolve()) in text
    assert "input file(s) of this analysis" in text
    assert tree_hashes(a.parent) == before


def test_overwrite_refuses_a_folder_of_documents(results, tmp_path, capsys):
    docs = tmp_path / "thesis"
    (docs / "chapters").mkdir(parents=True)
    (docs / "draft.txt").write_text("my draft\n")
    (docs / "chapters" / "one.md").write_text("# one\n")
    before = tree_hashes(docs)
    rc, text = run_cli(["run", results[0], "--out", docs, "--overwrite"], capsys)
    assert rc == 1
    assert str(docs.resolve()) in text and "not written by groupsrc" in text
    assert tree_hashes(docs) == before


def test_overwrite_refuses_dot_inside_the_data_folder(results, tmp_path, capsys, monkeypatch):
    a = copy_cohort(results[0], tmp_path / "c")
    before = tree_hashes(a.parent)
    monkeypatch.chdir(a.parent)
    rc, text = run_cli(["run", "analysis.toml", "--out", ".", "--overwrite"], capsys)
    assert rc == 1 and "input file(s) of this analysis" in text
    assert tree_hashes(a.parent) == before


def test_out_may_not_sit_inside_an_input(results, tmp_path, capsys):
    # an input given as a folder path in the maps table: results may not go inside it
    from groupsrc.inputs.problems import InputError
    inside = tmp_path / "data" / "sub"
    with pytest.raises(InputError, match="sit inside the input"):
        fo.check_target(inside, overwrite=False, inputs=[tmp_path / "data"])


def test_overwrite_refuses_results_with_a_user_file_added(results, tmp_path, capsys):
    import shutil
    out = tmp_path / "res"
    shutil.copytree(results[1], out)
    (out / "my_notes.txt").write_text("reviewer 2 wants more subjects\n")
    before = tree_hashes(out)
    rc, text = run_cli(["run", results[0], "--out", out, "--overwrite"], capsys)
    assert rc == 1
    assert "my_notes.txt" in text and "did not write" in text
    assert tree_hashes(out) == before


def test_overwrite_replaces_our_own_results(results, tmp_path, capsys):
    import shutil
    out = tmp_path / "res"
    shutil.copytree(results[1], out)
    (out / ".DS_Store").write_bytes(b"\0")          # operating-system clutter is not the user's
    rc, text = run_cli(["run", results[0], "--out", out, "--overwrite", "--seed", "9"], capsys)
    assert rc == 0, text
    assert json.loads((out / "run.json").read_text())["seed"] == 9
    assert not any(p.name.startswith(".res.") for p in tmp_path.iterdir())


def test_empty_existing_folder_is_used_without_overwrite(results, tmp_path, capsys):
    out = tmp_path / "empty"
    out.mkdir()
    rc, text = run_cli(["run", results[0], "--out", out], capsys)
    assert rc == 0, text
    assert (out / "run.json").is_file()


def test_existing_file_as_out_is_refused(results, tmp_path, capsys):
    f = tmp_path / "out.txt"
    f.write_text("keep me\n")
    rc, text = run_cli(["run", results[0], "--out", f, "--overwrite"], capsys)
    assert rc == 1 and "exists and is not a folder" in text
    assert f.read_text() == "keep me\n"


# ----------------------------------------------------------------------------
# permissions follow the umask
# ----------------------------------------------------------------------------

def test_results_follow_the_umask(results, tmp_path, capsys):
    old = os.umask(0o022)
    try:
        out = tmp_path / "res"
        rc, text = run_cli(["run", results[0], "--out", out], capsys)
    finally:
        os.umask(old)
    assert rc == 0, text
    # POSIX: a new folder gets 0777 & ~umask, a new file 0666 & ~umask (common practice)
    assert stat.S_IMODE(out.stat().st_mode) == 0o755
    files = [p for p in out.rglob("*") if p.is_file()]
    dirs = [p for p in out.rglob("*") if p.is_dir()]
    assert files and dirs
    assert {stat.S_IMODE(p.stat().st_mode) for p in files} == {0o644}
    assert {stat.S_IMODE(p.stat().st_mode) for p in dirs} == {0o755}


# ----------------------------------------------------------------------------
# hidden folders of killed runs
# ----------------------------------------------------------------------------

def _dead_pid():
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid                   # reaped: no process has this id now (barring reuse)


def test_stale_staging_of_a_dead_run_is_removed(results, tmp_path, capsys):
    out = tmp_path / "res"
    host = fo.owner_token().split("-")[0]
    dead = tmp_path / f".res.{fo.STAGING}-{host}-{_dead_pid()}-123-abc"
    alive = tmp_path / f".res.{fo.STAGING}-{fo.owner_token()}-xyz"
    other_host = tmp_path / f".res.{fo.STAGING}-00000000-{_dead_pid()}-0-def"
    for d in (dead, alive, other_host):
        (d / "c").mkdir(parents=True)
        (d / "c" / "statistic.nii.gz").write_bytes(b"partial")
    rc, text = run_cli(["run", results[0], "--out", out], capsys)
    assert rc == 0, text
    assert not dead.exists()
    assert "removed the partial results" in text
    assert alive.exists() and other_host.exists()     # not provably dead: left alone


def test_unfinished_swap_restores_the_previous_results(results, tmp_path, capsys):
    import shutil
    out = tmp_path / "res"
    host = fo.owner_token().split("-")[0]
    prev = tmp_path / f".res.{fo.PREVIOUS}-{host}-{_dead_pid()}-123-0a1b"
    shutil.copytree(results[1], prev)
    before = tree_hashes(prev)
    rc, text = run_cli(["run", results[0], "--out", out], capsys)
    assert rc == 1 and "a results folder already exists" in text
    assert "restored the previous results" in text
    assert tree_hashes(out) == before and not prev.exists()


def _wait_for(pred, timeout=120.0):
    t = time.monotonic()
    while time.monotonic() - t < timeout:
        if pred():
            return True
        time.sleep(0.005)
    return False


@pytest.mark.parametrize("sig", [signal.SIGKILL, signal.SIGTERM])
def test_run_killed_while_writing_leaves_nothing_behind(results, tmp_path, sig):
    """A real process killed while it writes: the earlier results stay intact, and
    the next run leaves no hidden folder behind."""
    import shutil
    analysis, _ = results
    out = tmp_path / "res"
    shutil.copytree(results[1], out)
    before = tree_hashes(out)
    env = dict(os.environ)
    proc = subprocess.Popen([sys.executable, "-m", "groupsrc.cli", "run", str(analysis),
                             "--out", str(out), "--overwrite", "--seed", "5"], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)

    def staging_has_files():
        return any(p.name.startswith(f".res.{fo.STAGING}") and any(p.rglob("*.nii.gz"))
                   for p in tmp_path.iterdir())
    assert _wait_for(staging_has_files), proc.communicate()
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=60)
    assert b"Traceback" not in err, err.decode()
    assert tree_hashes(out) == before                  # earlier results untouched
    hidden = [p for p in tmp_path.iterdir() if p.name.startswith(".res.")
              and p.name != ".res.groupsrc-checkpoint"]   # kept for --resume (issue 10)
    if sig == signal.SIGTERM:
        assert proc.returncode == 128 + signal.SIGTERM
        assert not hidden                              # cleaned up on the way out
    else:
        assert hidden                                  # SIGKILL cannot clean up ...
    assert main(["run", str(analysis), "--out", str(out), "--overwrite"]) == 0
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".res.")]   # ... the next run does


# ----------------------------------------------------------------------------
# report on a damaged folder, demo into a user's folder, bad options
# ----------------------------------------------------------------------------

def test_report_names_a_missing_map(results, tmp_path, capsys):
    import shutil
    out = tmp_path / "res"
    shutil.copytree(results[1], out)
    (out / "age_slope" / "statistic.nii.gz").unlink()
    (out / "group_by_tone" / "clusters.tsv").unlink()
    rc, text = run_cli(["report", out], capsys)
    assert rc == 1
    assert "age_slope/statistic.nii.gz" in text and "group_by_tone/clusters.tsv" in text
    assert "2 problems found" in text


def test_report_names_a_damaged_map(results, tmp_path, capsys):
    import shutil
    out = tmp_path / "res"
    shutil.copytree(results[1], out)
    p = out / "age_slope" / "clusters.nii.gz"
    p.write_bytes(p.read_bytes()[:200])                # truncated gzip stream
    rc, text = run_cli(["report", out], capsys)
    assert rc == 1 and "age_slope/clusters.nii.gz" in text and "cannot be read" in text


def test_report_rebuild_reproduces_the_report(results, tmp_path):
    """Rebuilding from the saved folder gives the report the run wrote, byte for byte
    (figures are embedded; the run drew them from the same saved files)."""
    import shutil
    out = tmp_path / "res"
    shutil.copytree(results[1], out)
    first = (out / "report.html").read_bytes()
    for f in out.rglob("figures/*"):
        f.unlink()
    (out / "report.html").unlink()
    assert main(["report", str(out)]) == 0
    assert (out / "report.html").read_bytes() == first


def test_demo_refuses_a_users_cohort_folder(tmp_path, capsys):
    mine = tmp_path / "my_data"
    mine.mkdir()
    (mine / "subjects.xlsx").write_bytes(b"PK\x03\x04 spreadsheet")
    before = tree_hashes(mine)
    rc, text = run_cli(["demo", "--small", "--out", tmp_path / "res", "--cohort-dir", mine],
                       capsys)
    assert rc == 1 and str(mine.resolve()) in text and "not built by 'groupsrc demo'" in text
    assert tree_hashes(mine) == before
    assert not (tmp_path / "res").exists()


def test_demo_refuses_results_inside_its_cohort(tmp_path, capsys):
    rc, text = run_cli(["demo", "--small", "--out", tmp_path / "c" / "maps",
                        "--cohort-dir", tmp_path / "c"], capsys)
    assert rc == 1 and "sit inside the input" in text


@pytest.mark.parametrize("seed", ["-1", str(2 ** 63)])
def test_bad_seed_option_is_a_usage_error(results, seed, capsys):
    with pytest.raises(SystemExit) as exc:
        main(["run", str(results[0]), "--seed", seed])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert "--seed must be a whole number" in err and "Traceback" not in err


def test_a_level_beyond_single_precision_is_a_problem_for_averaging_contrasts():
    """The stored maps are centred and scaled (inputs/units.py), so only a level far above
    the maps' spread that averaged maps cannot carry in single precision (float32 range
    about 3.4e38: IEEE 754) is a problem -- for check, not a crash in run -- and only for
    contrasts whose within weights do not sum to zero.  (Float64 inputs cannot carry a
    spread 1e18 times below their level, so this guards the arithmetic, not real data;
    the pipeline's check is called directly.)"""
    from types import SimpleNamespace
    import numpy as np
    from groupsrc.inputs.problems import ProblemList
    from groupsrc.inputs.units import Units
    from groupsrc.pipeline import _check_reduced_range
    cohort = SimpleNamespace(n_maps=4, units=Units(1.0, np.full((2, 3, 5), 1e30, np.float32)))
    plans = [SimpleNamespace(name="age_slope", within=None),
             SimpleNamespace(name="rare_minus_frequent", within={"rare": 1, "frequent": -1})]
    problems = ProblemList()
    _check_reduced_range(cohort, plans, SimpleNamespace(path="analysis.toml"), problems)
    text = problems.format()
    assert len(problems) == 1 and "'age_slope'" in text and "subtract the constant" in text


def test_one_map_a_billion_billion_times_larger_passes_check(results, tmp_path, capsys):
    """No overflow whatever the magnitude (the stored maps are of order one)."""
    import nibabel as nib
    import numpy as np
    import pandas as pd
    a = copy_cohort(results[0], tmp_path / "c")
    rel = pd.read_csv(a.parent / "maps.tsv", sep="\t")["path"][0]
    img = nib.load(str(a.parent / rel))
    data = np.asarray(img.dataobj) * np.float32(1e30)
    nib.save(nib.Nifti1Image(data.astype(np.float32), img.affine, img.header), str(a.parent / rel))
    rc, text = run_cli(["check", a], capsys)
    assert rc == 0, text


def test_resamples_option_has_the_settings_bound(results, capsys):
    from groupsrc.inputs.settings import MAX_RESAMPLES
    with pytest.raises(SystemExit) as exc:
        main(["run", str(results[0]), "--resamples", str(MAX_RESAMPLES + 1)])
    assert exc.value.code == 2 and "--resamples must be at most" in capsys.readouterr().err
