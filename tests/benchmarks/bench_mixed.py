"""Speed of the mixed model against plain references, in the same process.

Run:  python tests/benchmarks/bench_mixed.py [--features 20000] [--reference 20]
                                            [--resamples 64] [--repeats 3]

Workload (issue 9): 36 participants (two groups, an age covariate), 2 conditions,
1 to 3 sessions each (drawn with seed 0), 20,000 features of simulated data
(participant intercepts, condition slopes, Gaussian noise).  Medians of repeated
timings are printed, never a single wall time; compare the ratios printed in one
run (the machine may be shared).

1. Fit, per feature: groupsrc (``fit_features``: every feature at once) against a
   loop of statsmodels ``MixedLM(...).fit(reml=True)`` (default optimizer) over
   ``--reference`` features of the same data; for a random intercept and for a
   random intercept + condition slope.  Also groupsrc's fit plus one contrast's
   statistics (estimate, SE, Satterthwaite df, z) per feature.
3. The statistics of issue 21 against the ones they stand beside: the CR2 statistic with
   variance groups (sign flips, each resample studentized through its own df) against the
   model-based score, and whole-participant permutations through the map-rows path (a
   continuous map covariate) against the between-rows path.
2. One permutation-corrected resample: the mixed kernel against the GLM kernel on
   the same 20,000 features (2,000 sources of a box grid x 10 samples; the GLM on
   each participant's condition difference, or condition average, as the
   summary-statistic approach reduces them): a within effect (sign flips) and a
   between effect (whole-participant permutations), products only (max-stat) and
   with cluster-mass labelling (forming p 0.001).
"""

from __future__ import annotations

import argparse
import sys
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from groupsrc.inputs.mixed_design import map_layout                       # noqa: E402
from groupsrc.sources import VolumeGrid                                    # noqa: E402
from groupsrc.stats.engine.backends import NullJob  # noqa: E402
from groupsrc.stats.corrections.scorers import make_correction  # noqa: E402
from groupsrc.stats.models.ols import OLSKernel  # noqa: E402
from groupsrc.stats.models.mixed.model import MixedCore, MixedDesign  # noqa: E402
from groupsrc.stats.models.mixed.fit import fit_features  # noqa: E402
from groupsrc.stats.models.mixed.inference import contrast_statistics  # noqa: E402
from groupsrc.stats.models.mixed.kernel import MixedKernel  # noqa: E402


def cohort(seed=0):
    """36 participants, 2 conditions, 1-3 sessions; X = [b (x) w] with b = [1, group,
    age], w = [1, rare]."""
    rng = np.random.default_rng(seed)
    rows, B = [], []
    for i in range(36):
        B.append([1.0, float(i % 2), rng.uniform(-1, 1)])
        for s in range(int(rng.integers(1, 4))):
            for c in (0.0, 1.0):
                rows.append((i, c))
    rows = np.array(rows)
    g, cond = rows[:, 0].astype(int), rows[:, 1]
    B = np.array(B)
    W = np.c_[np.ones(len(g)), cond]
    X = np.stack([np.kron(B[gi], W[k]) for k, gi in enumerate(g)])
    sessions = np.bincount(g)
    return X, W, B, g, cond, sessions


def data(X, g, cond, F, seed=1):
    rng = np.random.default_rng(seed)
    N = g.max() + 1
    b0 = rng.standard_normal((N, F)) * 1.2
    b1 = rng.standard_normal((N, F)) * 0.6
    return (b0[g] + cond[:, None] * b1[g] + rng.standard_normal((len(g), F))).astype(np.float32)


def median_time(f, repeats):
    ts = []
    for _ in range(repeats):
        t = time.perf_counter()
        f()
        ts.append(time.perf_counter() - t)
    return float(np.median(ts))


def bench_fit(X, W, g, cond, Y, reference, repeats):
    from statsmodels.regression.mixed_linear_model import MixedLM
    print("\n1. fit per feature (median of repeats; statsmodels: median over features)")
    for name, Z in (("random intercept", np.ones((len(g), 1))),
                    ("intercept + condition slope", np.c_[np.ones(len(g)), cond])):
        design = MixedDesign(X, Z, g, between=None)
        core = MixedCore(design)
        F = Y.shape[1]
        ours = median_time(lambda: fit_features(core, Y), repeats) / F
        fit = fit_features(core, Y)
        both = ours + median_time(lambda: contrast_statistics(fit, Y, [0, 1.0, 0, 0.5, 0, 0]),
                                  repeats) / F
        per = []
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for j in range(reference):
                y = Y[:, j].astype(float)
                t = time.perf_counter()
                MixedLM(y, X, g, exog_re=Z).fit(reml=True)
                per.append(time.perf_counter() - t)
        ref = float(np.median(per))
        print(f"  {name:28s} statsmodels {ref * 1e3:8.2f} ms | groupsrc fit {ours * 1e6:7.2f} us"
              f" -> {ref / ours:7.0f}x | fit + contrast {both * 1e6:7.2f} us -> "
              f"{ref / both:7.0f}x   (floor 1000x, aim 5000x)")
        print(f"  {'':28s} fit codes: {fit.counts()}")


def bench_resample(X, W, B, g, cond, Y, resamples, repeats):
    print("\n2. one resample (median per resample; products + statistic, then with "
          "cluster-mass labelling)")
    side = 14
    mask = np.zeros((side, side, side), bool)
    mask.reshape(-1)[:Y.shape[1] // 10] = True
    grid = VolumeGrid.from_mask(mask, np.eye(4))
    S, T = grid.n_sources, Y.shape[1] // grid.n_sources
    Yf = Y[:, :S * T]
    adj = grid.adjacency("face")
    Z = np.ones((len(g), 1))
    core = MixedCore(MixedDesign(X, Z, g, between=B, within=W,
                                 layout=map_layout(Z, g, B.shape[0])))
    fit = fit_features(core, Yf)
    N = B.shape[0]
    Wr = np.zeros((N, len(g)))
    Wa = np.zeros((N, len(g)))
    for i in range(N):
        sel = g == i
        Wr[i, sel] = np.where(cond[sel] == 1, 1 / (cond[sel] == 1).sum(),
                              -1 / (cond[sel] == 0).sum())
        Wa[i, sel] = np.where(cond[sel] == 1, 0.5 / (cond[sel] == 1).sum(),
                              0.5 / (cond[sel] == 0).sum())
    cases = [("within (sign flips)", [0, 1.0, 0, 0.5, 0, 0], "sign-flip", Wr, [1.0, 0.5, 0.0]),
             ("between (permutations)", [0, 0, 1.0, 0.5, 0, 0], "permutation", Wa,
              [0.0, 1.0, 0.0])]
    for name, L, scheme, Wred, c in cases:
        mk = MixedKernel(fit, Yf, L, scheme=scheme)
        mk.observed("two")
        mk.prepare(mk.rearrangements(resamples + 1, 3))
        gk = OLSKernel((Wred @ Yf).astype(np.float32), B, c, scheme=scheme)
        gk.observed("two")
        gk.prepare(gk.rearrangements(resamples + 1, 3))
        out = np.empty((resamples, S * T), np.float32)
        row = []
        for label, kern in (("mixed", mk), ("GLM", gk)):
            prod = median_time(lambda: kern.resampled(1, resamples + 1, out), repeats)
            corr = make_correction("cluster-mass", kern.kind, "two", (S, T), adj,
                                   threshold=kern.threshold(0.001, "two"))
            job = NullJob(kern, corr)
            full = median_time(lambda: job.run_batch(1, resamples + 1), repeats)
            row.append((prod / resamples, full / resamples, mk.scheme_name if label == "mixed"
                        else gk.scheme_name))
        (mp, mf, ms), (gp, gf, gs) = row
        print(f"  {name:24s} mixed [{ms}]: {mp * 1e3:6.2f} ms, with labelling {mf * 1e3:6.2f} ms")
        print(f"  {'':24s} GLM   [{gs}]: {gp * 1e3:6.2f} ms, with labelling {gf * 1e3:6.2f} ms")
        print(f"  {'':24s} ratio mixed / GLM: products {mp / gp:5.1f}x, with labelling "
              f"{mf / gf:5.1f}x   (aim 10x, floor 30x)")


def bench_new_statistics(X, W, B, g, cond, Y, resamples, repeats):
    """The statistics issue 21 added, per resample against the one they stand beside."""
    print("\n3. new statistics (median per resample, products + statistic)")
    F = Y.shape[1]
    Z = np.ones((len(g), 1))
    N = B.shape[0]
    core = MixedCore(MixedDesign(X, Z, g, between=B, within=W,
                                 layout=map_layout(Z, g, N)))
    fit = fit_features(core, Y)
    out = np.empty((resamples, F), np.float32)
    groups = {"column": "group", "labels": B[:, 1].astype(int)}
    for name, L, scheme in (("within", [0, 1.0, 0, 0.5, 0, 0], "sign-flip"),
                            ("between", [0, 0, 1.0, 0.5, 0, 0], "permutation")):
        times = {}
        for label, vg in (("model-based", None), ("CR2 (variance groups)", groups)):
            k = MixedKernel(fit, Y, L, scheme=scheme, variance_groups=vg)
            k.observed("two")
            k.prepare(k.rearrangements(resamples + 1, 3))
            times[label] = (median_time(lambda: k.resampled(1, resamples + 1, out), repeats)
                            / resamples, k.scheme_name)
        (a, an), (b, bn) = times.values()
        print(f"  {name:8s} model-based [{an}]: {a * 1e3:6.2f} ms | CR2 [{bn}]: "
              f"{b * 1e3:6.2f} ms -> {b / a:4.1f}x")
    # permutations: a continuous map covariate takes the map-rows path
    rng = np.random.default_rng(7)
    trials = rng.uniform(20, 60, len(g))[:, None]
    times = {}
    for label, XX, M, L in (("between rows", X, None, [0, 0, 1.0, 0.5, 0, 0]),
                            ("map rows", np.c_[X, trials], trials, [0, 0, 1.0, 0.5, 0, 0, 0])):
        d = MixedDesign(XX, Z, g, between=B, within=W, map_cols=M, layout=map_layout(Z, g, N))
        k = MixedKernel(fit_features(MixedCore(d), Y), Y, L, scheme="permutation")
        k.observed("two")
        k.prepare(k.rearrangements(resamples + 1, 3))
        times[label] = (median_time(lambda: k.resampled(1, resamples + 1, out), repeats)
                        / resamples, k.moves is not None)
    (a, used_a), (b, used_b) = times.values()
    print(f"  between, permutations: no map covariate (map-rows path: {used_a}) "
          f"{a * 1e3:6.2f} ms | a continuous map covariate (map-rows path: {used_b}) "
          f"{b * 1e3:6.2f} ms -> {b / a:4.1f}x")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--features", type=int, default=20000)
    ap.add_argument("--reference", type=int, default=20)
    ap.add_argument("--resamples", type=int, default=64)
    ap.add_argument("--repeats", type=int, default=3)
    a = ap.parse_args()
    X, W, B, g, cond, sessions = cohort()
    Y = data(X, g, cond, a.features)
    print(f"{B.shape[0]} participants, {len(g)} maps (sessions per participant: "
          f"{dict(zip(*np.unique(sessions // 2, return_counts=True)))}), {a.features} features")
    bench_fit(X, W, g, cond, Y, a.reference, a.repeats)
    bench_resample(X, W, B, g, cond, Y, a.resamples, a.repeats)
    bench_new_statistics(X, W, B, g, cond, Y, a.resamples, a.repeats)


if __name__ == "__main__":
    main()
