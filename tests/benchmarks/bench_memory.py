"""Peak memory of a run with and without --memory, against the data size.

Run:  python tests/benchmarks/bench_memory.py [--samples T] [--resamples N]

Workload: 40 participants x 2 conditions (80 maps) x 8,736 sources x T samples,
written once as a memory-mapped float32 array on disk (the loading cache's
layout); a two-group contrast of the within-participant difference with
cluster-mass correction.  Each configuration runs in a fresh process (so the
peak resident set, VmHWM, is its own): the reduction, the model and the
resampling exactly as the pipeline runs them (groupsrc.stats.engine.memory.plan,
reduce_maps, OLSKernel, infer).  "data" is the per-participant array
(40 x sources x samples x 4 bytes), the size the targets are stated in.
Printed: peak, data, the interpreter's own footprint after imports, and the
ratios to the targets (no --memory: < 1.5 x data + 300 MB; --memory M: below
M + the stated fixed overhead).  With few participants and many samples the
smallest setting that runs (the per-feature results and one batch) can exceed half
the data; the setting is then that minimum.  Not collected by pytest.
"""

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

CHILD = r"""
import json, sys, time
import numpy as np
def hwm():
    for line in open("/proc/self/status"):
        if line.startswith(("VmHWM", "VmRSS")):
            yield line.split()[0][:-1], int(line.split()[1]) * 1024
path, shape, memory, resamples = sys.argv[1], tuple(json.loads(sys.argv[2])), json.loads(sys.argv[3]), int(sys.argv[4])
from groupsrc.sources import VolumeGrid
from groupsrc.stats.inference import Execution, InferenceSpec, infer
from groupsrc.stats.models.ols import OLSKernel
from groupsrc.stats.engine.memory import plan
from groupsrc.stats.models.reduction import reduce_maps
import groupsrc.stats.corrections.unionfind  # compiled code loaded, as in a run
base = dict(hwm())["VmRSS"]
Y = np.memmap(path, dtype=np.float32, mode="r", shape=shape)
n = shape[0] // 2
box = 26
c = np.indices((box,) * 3) - (box - 1) / 2.0
mask = (c ** 2).sum(0) <= 12.8 ** 2
grid = VolumeGrid.from_mask(mask, np.eye(4))
assert grid.n_sources == shape[1], grid.n_sources
W = np.zeros((n, 2 * n)); W[np.arange(n), 2 * np.arange(n)] = 1; W[np.arange(n), 2 * np.arange(n) + 1] = -1
X = np.zeros((n, 2)); X[: n // 2, 0] = 1; X[n // 2:, 1] = 1
F = shape[1] * shape[2]
from groupsrc.stats.corrections.scorers import CORRECTIONS
p = plan(memory, n, F, workers=2, scratch_per_thread=CORRECTIONS["cluster-mass"].scratch_bytes)
t0 = time.perf_counter()
data = reduce_maps(Y, W, slice(0, shape[2]), chunk_bytes=p.chunk_bytes, out=p.array((n,) + shape[1:]))
kernel = OLSKernel(data.reshape(n, -1), X, [1.0, -1.0], scheme="permutation")
kernel.allocate = p.array
res = infer(kernel, grid.adjacency("face"), InferenceSpec(correction="cluster-mass", n_resamples=resamples, seed=1, forming_p=0.01),
            Execution(n_jobs=2, map_budget=p.map_budget))
print(json.dumps({"peak": dict(hwm())["VmHWM"], "base": base, "seconds": time.perf_counter() - t0,
                  "on_disk": p.on_disk, "batch": res.resampling.batch_size, "max0": float(res.null.max_stat[1])}))
"""


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--samples", type=int, default=250)
    ap.add_argument("--resamples", type=int, default=64)
    a = ap.parse_args()
    box = 26
    c = np.indices((box,) * 3) - (box - 1) / 2.0
    S = int(((c ** 2).sum(0) <= 12.8 ** 2).sum())
    n, T = 40, a.samples
    shape = (2 * n, S, T)
    tmp = Path(tempfile.mkdtemp(prefix="groupsrc-bench-"))
    path = tmp / "Y.f32"
    Y = np.memmap(path, dtype=np.float32, mode="w+", shape=shape)
    rng = np.random.default_rng(0)
    for i in range(shape[0]):
        Y[i] = rng.standard_normal((S, T), dtype=np.float32)
    Y.flush()
    del Y
    data = n * S * T * 4
    MiB = 2 ** 20
    print(f"{shape[0]} maps x {S} sources x {T} samples; data (per participant) "
          f"{data / MiB:.0f} MiB, maps on disk {2 * data / MiB:.0f} MiB; "
          f"load average {os.getloadavg()[0]:.2f}")
    out = {}
    from groupsrc.stats.engine.memory import minimum
    from groupsrc.stats.corrections.scorers import CORRECTIONS
    low = minimum(S * T, scratch=2 * CORRECTIONS["cluster-mass"].scratch_bytes)
    for label, memory in (("in memory", None), ("--memory data/2", max(data // 2, low)),
                          ("--memory minimum", low)):
        r = subprocess.run([sys.executable, "-c", CHILD, str(path), json.dumps(shape),
                            json.dumps(memory), str(a.resamples)],
                           capture_output=True, text=True)
        if r.returncode:
            print(label, "failed:", r.stderr[-2000:])
            continue
        res = json.loads(r.stdout.strip().splitlines()[-1])
        out[label] = res
        extra = res["peak"] - res["base"]
        line = (f"  {label:16s}: peak {res['peak'] / MiB:6.0f} MiB (interpreter after imports "
                f"{res['base'] / MiB:.0f} MiB, above it {extra / MiB:6.0f} MiB), batch "
                f"{res['batch']}, arrays on disk: {res['on_disk']}, {res['seconds']:.1f} s")
        if memory is None:
            line += (f"; peak / (1.5 x data + 300 MB) = "
                     f"{res['peak'] / (1.5 * data + 300e6):.2f} (target < 1)")
        else:
            line += (f"; setting {memory / MiB:.0f} MiB, above-import part / setting = "
                     f"{extra / memory:.2f} (target <= 1)")
        print(line, flush=True)
    vals = {k: v["max0"] for k, v in out.items()}
    print("  same null maximum in every configuration:", len(set(vals.values())) == 1)
    import shutil
    shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
