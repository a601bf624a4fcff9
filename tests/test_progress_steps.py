"""Progress of the resampling comes in steps of about a tenth (issue: progress lines
"every ~10%" in batch-job logs), and asking for progress never changes the result (the
project's own promise: batch sizes never change a seed's null distribution)."""

from __future__ import annotations

import numpy as np
from scipy import sparse

from groupsrc.stats.inference import run_inference


def _data():
    rng = np.random.default_rng(5)
    Y = (rng.standard_normal((10, 6, 5)) + 0.2).astype(np.float32)
    adj = sparse.csr_matrix(np.eye(6, k=1) + np.eye(6, k=-1))
    return Y, np.ones((10, 1)), adj


def test_progress_steps_of_a_tenth_and_the_same_null():
    Y, X, adj = _data()
    seen = []
    with_progress = run_inference(Y, X, [1.0], adj, correction="max-stat", n_resamples=1000,
                                  seed=3, progress=lambda done, total: seen.append(done))
    quiet = run_inference(Y, X, [1.0], adj, correction="max-stat", n_resamples=1000, seed=3)
    steps = np.diff(sorted(set(seen)))
    assert seen[-1] == 1000 and len(steps) >= 9
    assert steps.max() <= 100                      # a tenth at most, in whole product blocks
    np.testing.assert_array_equal(with_progress.null["max_stat"],
                                  quiet.null["max_stat"])
    assert with_progress.resampling.batch_size < quiet.resampling.batch_size


def test_demo_quiet_prints_no_progress(tmp_path, capsys):
    # README: `--quiet` (run and demo) turns off the progress bars and per-stage lines;
    # the closing line that says where the results are stays on stdout
    from groupsrc.cli import main
    out = tmp_path / "res"
    assert main(["demo", "--small", "--quiet", "--resamples", "64", "--out", str(out)]) == 0
    cap = capsys.readouterr()
    for line in ("loaded and checked", "statistics done in", "results written in", "%"):
        assert line not in cap.err, line
    assert f"results written to {out}" in cap.out
    assert (out / "report.html").is_file()


def _lines(steps, total=1000):
    import io
    from groupsrc.progress import Progress
    out = io.StringIO()
    p = Progress("resampling c", total, "resample", "lines", stream=out)
    for done in steps:
        p.update(done)
    return [line.split(": ")[2].split(" (")[0].strip() for line in out.getvalue().splitlines()]


def test_progress_lines_every_tenth():
    # README ("Progress"): in a log, a line at about every 10%.  Fine steps print at
    # the tenths exactly; batches just short of a tenth (96 of 1000, whole product
    # blocks) print at every batch, the first at 10%, not first at 19%
    assert _lines(range(1, 1001)) == [f"{k}%" for k in range(10, 101, 10)]
    batches = _lines(list(range(96, 1000, 96)) + [1000])
    assert batches[0] == "10%" and len(batches) == 11
    assert _lines([500, 1000]) == ["50%", "100%"]


def test_time_left_is_timed_after_the_first_step(monkeypatch):
    """The first step pays one-off costs (compiled code loaded or compiled); the time left
    comes from the work after it.  Here the first 100 of 1000 take 20 s, every later 100
    one second: after 200 the honest estimate is 800 / (100 per s) = 8 s (arithmetic)."""
    import io

    import groupsrc.progress as progress
    clock = [0.0]
    monkeypatch.setattr(progress.time, "monotonic", lambda: clock[0])
    out = io.StringIO()
    bar = progress.reporter(stream=out)("resampling c", 1000, "resample")
    assert bar.mode == "lines"
    bar.update(0)
    for t, done in ((20.0, 100), (21.0, 200), (22.0, 300)):
        clock[0] = t
        bar.update(done)
    lines = out.getvalue().splitlines()
    assert lines[0].endswith("(100/1000 resamples)"), lines     # no estimate yet
    assert lines[1].endswith("(200/1000 resamples), 100 resamples/s, 8 s left"), lines
    assert lines[2].endswith("(300/1000 resamples), 100 resamples/s, 7 s left"), lines
