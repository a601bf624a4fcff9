"""Per-resample speed of groupsrc cluster-mass inference vs a plain reference loop.

Run:  python tests/benchmarks/bench_cluster_mass.py [--resamples N] [--jobs J]

Workload: 40 participants (two groups of 20), ~10,000 in-mask sources (a
sphere-ish mask in a box), 125 samples, two-sample t, cluster-mass.  The
reference loop does, per resample: scipy.stats.ttest_ind on the permuted
groups, scipy.ndimage.label over the 4D (x, y, z, t) grid with
generate_binary_structure(4, 1), and a per-cluster sum of t.  Both run in
this process on the same data; medians of repeated timings are reported.
Not collected by pytest (the file name does not start with ``test_``).
"""

import argparse
import os
import resource
import time

import numpy as np
from scipy import ndimage, stats

from groupsrc.sources import VolumeGrid
from groupsrc.stats.inference import run_inference


def workload(seed=0):
    box = 30
    c = (np.indices((box, box, box)) - (box - 1) / 2.0)
    mask = (c ** 2).sum(0) <= 13.4 ** 2
    grid = VolumeGrid.from_mask(mask, np.eye(4))
    rng = np.random.default_rng(seed)
    n, T = 40, 125
    Y = rng.standard_normal((n, grid.n_sources, T), dtype=np.float32)
    # mild temporal smoothness (in place, one participant at a time, so no
    # data-sized temporary inflates the peak memory reading)
    for i in range(n):
        y = Y[i]
        y[:, 1:] += 0.6 * y[:, :-1]
    X = np.zeros((n, 2)); X[:20, 0] = 1; X[20:, 1] = 1
    return grid, Y, X


def reference_resample(grid, Y, perm, thr, struct):
    y = Y[perm]
    t = stats.ttest_ind(y[:20], y[20:], axis=0).statistic
    vol = grid.to_volume(t)
    best = 0.0
    for sign in (1, -1):
        lab, k = ndimage.label(sign * vol > thr, struct)
        if k:
            best = max(best, np.abs(ndimage.sum(vol, lab, np.arange(1, k + 1))).max())
    return best


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--resamples", type=int, default=300)
    ap.add_argument("--reference", type=int, default=6)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--forming-p", type=float, default=0.001,
                    help="two-sided cluster-forming p for both implementations "
                         "(default 0.001, groupsrc's default)")
    a = ap.parse_args()
    grid, Y, X = workload()
    adj = grid.adjacency("face")
    print(f"sources {grid.n_sources}, samples {Y.shape[2]}, participants {Y.shape[0]}, "
          f"data {Y.nbytes / 1e6:.0f} MB")
    thr = stats.t.isf(a.forming_p / 2, 38)
    print(f"cluster-forming threshold: two-sided p {a.forming_p} -> |t| > {thr:.3f}")
    struct = ndimage.generate_binary_structure(4, 1)
    ours = []
    res = None
    for rep in range(a.repeats):
        del res          # keep one result alive at a time for the memory reading
        t0 = time.perf_counter()
        res = run_inference(Y, X, [1.0, -1.0], adj, scheme="permutation",
                            correction="cluster-mass", n_resamples=a.resamples, seed=rep,
                            forming_p=a.forming_p,
                            n_jobs=a.jobs)
        ours.append((time.perf_counter() - t0) / a.resamples)
        batch = res.resampling.batch_size
    # fixed cost (observed fit, residual norms, observed clusters): one resample
    setup = []
    del res
    for rep in range(a.repeats):
        t0 = time.perf_counter()
        run_inference(Y, X, [1.0, -1.0], adj, scheme="permutation",
                            correction="cluster-mass", n_resamples=1, seed=rep,
                            forming_p=a.forming_p,
                            n_jobs=a.jobs)
        setup.append(time.perf_counter() - t0)
    setup_med = float(np.median(setup))
    # peak memory of the groupsrc part, read before the reference loop runs
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0   # KiB -> MiB (Linux)
    rng = np.random.default_rng(1)
    ref_times = []
    for _ in range(a.repeats):
        t0 = time.perf_counter()
        for _ in range(a.reference):
            reference_resample(grid, Y, rng.permutation(40), thr, struct)
        ref_times.append((time.perf_counter() - t0) / a.reference)
    ref_med, our_med = float(np.median(ref_times)), float(np.median(ours))
    print(f"reference loop : {ref_med * 1e3:8.1f} ms / resample (median of {a.repeats} x "
          f"{a.reference})")
    print(f"groupsrc       : {our_med * 1e3:8.2f} ms / resample (median of {a.repeats} x "
          f"{a.resamples}, n_jobs={a.jobs}, batch {batch}; includes setup)")
    marginal = (our_med * a.resamples - setup_med) / max(1, a.resamples - 1)
    print(f"  of which     : {setup_med:8.2f} s fixed setup, {marginal * 1e3:.2f} ms per extra "
          f"resample")
    print(f"speed-up       : {ref_med / our_med:8.1f} x incl. setup, "
          f"{ref_med / marginal:.1f} x per extra resample   (targets: >= 300 x at forming "
          f"p 0.01, >= 150 x at 0.05)")
    print(f"5000 resamples : {setup_med + 4999 * marginal:8.1f} s estimated "
          f"(target ~60 s on 2 cores)")
    print(f"load average   : {os.getloadavg()[0]:.2f} (other processes share these cores)")
    print(f"peak RSS (groupsrc part, whole process incl. data): {peak:.0f} MiB; data {Y.nbytes / 2**20:.0f} MiB; "
          f"target < 2 x data + 300 MB = {2 * Y.nbytes / 2**20 + 300:.0f} MiB")


if __name__ == "__main__":
    main()
