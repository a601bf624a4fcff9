"""What variance groups cost per resample, against the pooled t and a plain reference.

Run:  python tests/benchmarks/bench_groupvar.py [--features 40000] [--resamples 128]
                                               [--repeats 5]

Workload: 40 participants in two groups (15 and 25, the small group twice as
variable), an age covariate, ``--features`` features of noise; the group difference.
Three ways to get the maximum |statistic| of each of ``--resamples`` sign-flipped
resamples (every product on one thread, as in a run):

1. the plain reference: for each resample, flip the Freedman-Lane residuals, refit the
   full model by weighted least squares with each group's residual variance, Welch's v
   and its df, z by scipy -- numpy over all features at once, no product trick;
2. groupsrc's :class:`GroupVarianceKernel` (products per group, compiled statistic);
3. groupsrc's pooled :class:`OLSKernel` with sign flips on the same data (what the run
   used before variance groups).

Prints medians of ``--repeats`` timings per resample and the ratios (reference /
variance groups: the speed-up; variance groups / pooled: the cost of the statistic).
Machines are shared: compare ratios within one run, never single wall times.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy import special

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from groupsrc.stats.engine.blas import one_blas_thread                    # noqa: E402
from groupsrc.stats.models import glm                                     # noqa: E402
from groupsrc.stats.models.groupvar import GroupVarianceKernel, weighted_residuals  # noqa: E402
from groupsrc.stats.models.ols import OLSKernel                           # noqa: E402


def cohort(F, seed=0):
    rng = np.random.default_rng(seed)
    g = np.r_[np.zeros(15), np.ones(25)]
    Y = (rng.standard_normal((40, F)) * np.where(g == 0, 2.0, 1.0)[:, None]).astype(np.float32)
    X = np.c_[np.ones(40), g, rng.uniform(20, 70, 40)]
    return Y, X, g, np.array([0.0, 1.0, 0.0])


def reference(Y, X, g, c, flips):
    """The plain loop: per resample, WLS refit of every feature (float64 numpy)."""
    k = GroupVarianceKernel(Y, X, c, g)
    R = np.asarray(weighted_residuals(Y, k.design), np.float64)
    Hz = np.asarray(Y, np.float64) - R                    # the restricted fit, added back
    Qf = glm._orth(X)
    codes = g.astype(int)
    tr = np.array([(1 - (Qf[codes == j] ** 2).sum(axis=1)).sum() for j in (0, 1)])
    out = np.empty(len(flips))
    for b, s in enumerate(flips):
        y = Hz + s[:, None] * R
        e = y - Qf @ (Qf.T @ y)
        w = np.stack([tr[j] / (e[codes == j] ** 2).sum(axis=0) for j in (0, 1)])   # (2, F)
        wn = w[codes]
        A = np.einsum("nk,nf,nl->fkl", X, wn, X)
        rhs = np.einsum("nk,nf->fk", X, wn * y)
        beta = np.linalg.solve(A, rhs[..., None])[..., 0]
        cov_c = np.linalg.solve(A, np.broadcast_to(c, rhs.shape)[..., None])[..., 0]
        v = beta @ c / np.sqrt(cov_c @ c)
        n = np.array([(codes == j).sum() for j in (0, 1)])
        trw = (n[:, None] * w).sum(axis=0)
        ysum = (((1 - n[:, None] * w / trw) ** 2) / tr[:, None]).sum(axis=0)
        nu = 1.0 / ysum
        z = -special.ndtri(special.stdtr(nu, -np.abs(v)))
        out[b] = np.max(z)
    return out


def timed(fn, repeats):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--features", type=int, default=40000)
    ap.add_argument("--resamples", type=int, default=128)
    ap.add_argument("--repeats", type=int, default=5)
    a = ap.parse_args(argv)
    Y, X, g, c = cohort(a.features)
    B = a.resamples

    vg = GroupVarianceKernel(Y, X, c, g)
    vg.observed("two")
    vg.prepare(vg.rearrangements(B, seed=1))
    pooled = OLSKernel(Y, X, c, scheme="sign-flip")
    pooled.prepare(pooled.rearrangements(B, seed=1))
    vg.resampled(0, min(B, 16))            # compile
    pooled.resampled(0, min(B, 16))
    flips = vg.rearr.matrix[:max(2, B // 16)].astype(float)

    with one_blas_thread():
        ref_max = reference(Y, X, g, c, flips)
        t_ref = timed(lambda: reference(Y, X, g, c, flips), a.repeats) / len(flips)
    _, mx, mn = vg.resampled(0, len(flips))
    agree = float(np.max(np.abs(np.maximum(mx, -mn) - ref_max)))
    t_vg = timed(lambda: vg.resampled(0, B), a.repeats) / B
    t_pool = timed(lambda: pooled.resampled(0, B), a.repeats) / B
    print(f"{a.features} features, 40 participants (15 + 25), {B} resamples, medians of "
          f"{a.repeats}")
    print(f"  plain reference (numpy WLS refit) {1e3 * t_ref:9.3f} ms per resample")
    print(f"  groupsrc variance groups          {1e3 * t_vg:9.3f} ms per resample")
    print(f"  groupsrc pooled t (sign flips)    {1e3 * t_pool:9.3f} ms per resample")
    print(f"  largest difference of the resamples' max |z|, reference vs groupsrc: {agree:.2e}")
    print(f"  speed-up over the reference: {t_ref / t_vg:.1f}x;  cost against the pooled t: "
          f"{t_vg / t_pool:.1f}x")


if __name__ == "__main__":
    main()
