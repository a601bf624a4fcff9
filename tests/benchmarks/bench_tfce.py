"""TFCE per resample: groupsrc's one-pass component tree against a plain per-height loop.

Run:  python tests/benchmarks/bench_tfce.py [--resamples N] [--repeats R]

Workload: the cluster-mass benchmark's (40 participants in two groups, ~10,000
in-mask sources, 125 samples, two-sample t).  The plain reference loop does, per
resample: scipy.stats.ttest_ind on the permuted groups, then for each sign and
each of 100 heights h_k = k max|t| / 100 scipy.ndimage.label over the 4D
(x, y, z, t) grid and a cluster-size lookup (the definition, Smith & Nichols
2009).  groupsrc runs run_inference(correction="tfce") with the exact integral
(default) and with 100 steps, on 1 and 2 workers (threads), the processes
backend and a local Dask cluster, taking turns within each repeat.  The time
per extra resample is the steady rate inside a run, after the first round of
batches (fixed costs stay out).  Medians of repeated timings; ratios are against
the reference median measured in the same process.  Not collected by pytest.
"""

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np
from scipy import ndimage, stats

sys.path.insert(0, str(Path(__file__).parent))
from bench_cluster_mass import workload  # noqa: E402

from groupsrc.stats.corrections.scorers import TfceOptions  # noqa: E402
from groupsrc.stats.inference import run_inference  # noqa: E402


def reference_resample(grid, Y, perm, struct, steps=100):
    y = Y[perm]
    t = stats.ttest_ind(y[:20], y[20:], axis=0).statistic
    vol = grid.to_volume(t)
    dh = np.abs(vol).max() / steps
    best = 0.0
    for sign in (1, -1):
        v = np.maximum(sign * vol, 0)
        acc = np.zeros_like(v)
        for k in range(1, steps + 1):
            lab, n = ndimage.label(v >= k * dh, struct)
            if n == 0:
                break
            sizes = np.bincount(lab.ravel()).astype(float)
            sizes[0] = 0
            acc += sizes[lab] ** 0.5 * (k * dh) ** 2 * dh
        best = max(best, acc.max())
    return best


def time_groupsrc(Y, X, adj, resamples, repeats, configs):
    """Per configuration: (median time per resample incl. setup, per extra resample).

    The time per extra resample is the steady rate inside each run: the run reports
    its progress after each batch (batches of 16, at least 10 of them); the clock
    starts when the first round of batches is done (one batch per worker process,
    one batch for threads, which share each batch) and stops at the last one, so
    that fixed costs (the observed map, sending the data to the workers, starting
    them) stay out.  The configurations take turns within each repeat (a, b, c, a,
    b, c, ...), so that a change in the machine's load during the run weighs on all
    of them alike.
    """
    total = {name: [] for name, _ in configs}
    steady = {name: [] for name, _ in configs}
    for rep in range(repeats):
        for name, kw in configs:
            marks = []
            t0 = time.perf_counter()
            run_inference(Y, X, [1.0, -1.0], adj, scheme="permutation", correction="tfce",
                          n_resamples=resamples, seed=rep,
                          progress=lambda done, m: marks.append((time.perf_counter(), done)),
                          **kw)
            total[name].append((time.perf_counter() - t0) / resamples)
            slots = kw["n_jobs"] if kw["backend"] in ("processes", "dask") else 1
            done = [(t, d) for t, d in marks if d > 0]
            if len(done) <= slots:
                raise SystemExit(f"{name}: {resamples} resamples make too few batches for a "
                                 "steady rate; give --resamples 160 or more")
            (ta, da), (tb, db) = done[slots - 1], done[-1]
            steady[name].append((tb - ta) / (db - da))
    return {name: (float(np.median(total[name])), float(np.median(steady[name])))
            for name, _ in configs}


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--resamples", type=int, default=160)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--reference", type=int, default=2, help="reference resamples per repeat")
    ap.add_argument("--skip", default="", help="comma list of configurations to skip")
    a = ap.parse_args()
    grid, Y, X = workload()
    adj = grid.adjacency("face")
    print(f"sources {grid.n_sources}, samples {Y.shape[2]}, participants {Y.shape[0]}; "
          f"load average {os.getloadavg()[0]:.2f}")
    configs = [("exact, 1 thread", dict(n_jobs=1, backend="threads")),
               ("stepped 100, 1 thread", dict(n_jobs=1, backend="threads",
                                              tfce=TfceOptions(steps=100))),
               ("exact, 2 threads", dict(n_jobs=2, backend="threads")),
               ("exact, 2 processes", dict(n_jobs=2, backend="processes")),
               ("exact, Dask local:2", dict(n_jobs=2, backend="dask", scheduler="local:2"))]
    skip = set(filter(None, a.skip.lower().split(",")))
    configs = [(name, kw) for name, kw in configs if not any(s in name.lower() for s in skip)]
    results = time_groupsrc(Y, X, adj, a.resamples, a.repeats, configs)
    for name, (med, marginal) in results.items():
        print(f"  {name:24s}: {med * 1e3:8.1f} ms / resample incl. setup, "
              f"{marginal * 1e3:8.1f} ms per extra resample", flush=True)
    struct = ndimage.generate_binary_structure(4, 1)
    rng = np.random.default_rng(1)
    ref = []
    for _ in range(a.repeats):
        t0 = time.perf_counter()
        for _ in range(a.reference):
            reference_resample(grid, Y, rng.permutation(40), struct)
        ref.append((time.perf_counter() - t0) / a.reference)
    ref_med = float(np.median(ref))
    print(f"reference loop (ndimage.label at 100 heights, both signs): {ref_med:.2f} s / "
          f"resample (median of {a.repeats} x {a.reference})")
    for name, (med, marginal) in results.items():
        print(f"  {name:24s}: {ref_med / med:7.1f} x incl. setup, {ref_med / marginal:7.1f} x "
              "per extra resample")
    one = results.get("exact, 1 thread")
    for name in ("exact, 2 threads", "exact, 2 processes", "exact, Dask local:2"):
        if one and name in results:
            print(f"  1 -> 2 workers, {name}: {one[1] / results[name][1]:.2f} x")
    if "exact, 2 processes" in results and "exact, Dask local:2" in results:
        print(f"  Dask local:2 / processes: "
              f"{results['exact, Dask local:2'][1] / results['exact, 2 processes'][1]:.2f} "
              "(time ratio, 1.0 = same speed)")
    print(f"load average {os.getloadavg()[0]:.2f} (other processes share these cores)")


if __name__ == "__main__":
    main()
