"""Degenerate features: no variance to test against, no statistic.

A source whose within-participant difference is the same in every participant has a
residual of rounding errors only; no finite t exists for it (``scipy.stats.ttest_1samp``,
the reference library, returns inf or NaN for a sample without variance), and a t of
rounding errors (once 2e16) would beat every resample.  groupsrc gives NaN there,
scores it as no evidence in every resample (never part of a cluster, never a maximum)
and counts it.
"""

import warnings

import numpy as np
import pytest
from scipy import sparse, stats

from groupsrc.stats.inference import run_inference
from groupsrc.stats.models import glm


def _chain(S):
    return sparse.csr_matrix(np.eye(S, k=1) + np.eye(S, k=-1))


def _cohort(n=10, S=12, T=6, seed=3):
    rng = np.random.default_rng(seed)
    Y = rng.standard_normal((n, S, T)).astype(np.float32)
    Y[:, 4:7, 2:5] += 1.2                   # a real effect, with variance
    return Y


@pytest.mark.parametrize("value", [0.5, 0.0, 1e-3])
def test_scipy_has_no_finite_t_for_a_constant_sample(value):
    """The reference: scipy's one-sample t of a sample without variance is not finite."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert not np.isfinite(stats.ttest_1samp(np.full(8, value), 0.0).statistic)


@pytest.mark.parametrize("value", [0.5, 0.0, 1e-3])
def test_a_constant_difference_has_no_statistic(value):
    Y = _cohort()
    Y[:, 0, :] = np.float32(value)              # the same difference in everybody
    X = np.ones((Y.shape[0], 1))
    r = glm.t_contrast(Y.reshape(len(Y), -1), X, [1.0])
    t = r.t.reshape(Y.shape[1:])
    assert np.isnan(t[0]).all() and r.degenerate.reshape(Y.shape[1:])[0].all()
    assert np.isfinite(t[1:]).all() and not r.degenerate.reshape(Y.shape[1:])[1:].any()
    # elsewhere the textbook t (Student 1908; common practice) is unchanged
    ref = stats.ttest_1samp(Y[:, 1:].astype(np.float64), 0.0).statistic
    np.testing.assert_allclose(t[1:], ref, rtol=1e-6)
    assert np.allclose(r.estimate.reshape(Y.shape[1:])[0], value, rtol=1e-6)


def test_float32_rounding_noise_is_not_variance():
    """Per-participant values that differ only in the last float32 bit (the same
    difference computed from different maps) are degenerate too; a small but real
    spread (1e-4 of the value) is not."""
    Y = _cohort()
    base = np.float32(0.37)
    ulp = np.spacing(base)
    rng = np.random.default_rng(0)
    Y[:, 0, :] = base + ulp * rng.integers(-1, 2, size=(Y.shape[0], Y.shape[2]))
    Y[:, 1, :] = base * (1 + 1e-4 * rng.standard_normal((Y.shape[0], Y.shape[2])))
    r = glm.t_contrast(Y.reshape(len(Y), -1), np.ones((len(Y), 1)), [1.0])
    deg = r.degenerate.reshape(Y.shape[1:])
    assert deg[0].all() and not deg[1].any()


@pytest.mark.parametrize("correction", ["cluster-mass", "tfce", "max-stat", "fdr"])
def test_degenerate_features_are_never_significant_and_leave_the_rest(correction):
    Y = _cohort()
    clean = run_inference(Y, np.ones((len(Y), 1)), [1.0], _chain(Y.shape[1]),
                          correction=correction, n_resamples=200, seed=5, forming_p=0.05)
    Yd = Y.copy()
    Yd[:, 0, :] = 0.5                           # was noise; now a constant difference
    res = run_inference(Yd, np.ones((len(Y), 1)), [1.0], _chain(Y.shape[1]),
                        correction=correction, n_resamples=200, seed=5, forming_p=0.05)
    assert np.isnan(res.statistic[0]).all()
    assert res.statistic_info["degenerate_features"] == Y.shape[2]
    if res.p_corrected is not None:
        assert np.isnan(res.p_corrected[0]).all()
    assert (res.cluster_labels[0] == 0).all()
    # the null distribution did not pick up a spurious 1e16 maximum: it is the clean
    # run's null with source 0 removed, so at most as large
    if correction != "fdr":
        assert res.null["max_stat"].max() <= clean.null["max_stat"].max() + 1e-6
        assert np.isfinite(res.null["max_stat"]).all()
    # every other source keeps a finite statistic
    assert np.isfinite(res.statistic[1:]).all()


def test_a_degenerate_source_in_a_two_group_comparison():
    """Freedman-Lane permutations: the group difference at a source where every
    participant has the same value is undefined, the effect elsewhere still found."""
    rng = np.random.default_rng(1)
    n, S, T = 12, 10, 5
    Y = rng.standard_normal((n, S, T)).astype(np.float32)
    g = np.r_[np.zeros(6), np.ones(6)]
    Y[g == 1, 5:8, 1:4] += 2.5
    Y[:, 0, :] = 3.25
    X = np.c_[np.ones(n), g, rng.standard_normal(n)]
    res = run_inference(Y, X, [0, 1, 0], _chain(S), scheme="permutation",
                        correction="cluster-mass", n_resamples=300, seed=2, forming_p=0.01)
    assert np.isnan(res.statistic[0]).all()
    assert np.isfinite(res.null["max_stat"]).all() and res.null["max_stat"].max() < 1e3
    assert (res.p_corrected[5:8, 1:4] <= 0.05).any()


@pytest.mark.parametrize("groups", [False, True], ids=["model-based", "variance-groups"])
@pytest.mark.parametrize("correction", ["cluster-mass", "max-stat"])
def test_a_constant_condition_difference_in_the_mixed_model(groups, correction):
    """The mixed model: at source 0 every participant's two conditions differ by the
    same amount while participants differ (a random intercept, no residual within
    participants).  Its residual variance is zero and the t of the condition effect is
    not finite (scipy's reference above); the source is undefined (fit code 3), counted,
    and never part of a cluster or a maximum."""
    import sys
    from pathlib import Path
    sys.path.insert(0, str(Path(__file__).parent))
    import _mixed_cohorts as mc
    from groupsrc.stats.inference import InferenceSpec, infer
    from groupsrc.stats.models.mixed.fit import fit_features
    from groupsrc.stats.models.mixed.kernel import MixedKernel
    from groupsrc.stats.models.mixed.model import MixedCore
    d, Y, small = mc.cohort(4, max_sessions=1)
    clean_Y = Y.copy()
    g, cond = np.asarray(d.groups), np.asarray(d.within)[:, 1]
    level = np.random.default_rng(0).standard_normal(g.max() + 1)[g]
    S, T = mc.grid().n_sources, mc.T
    Y = Y.reshape(len(g), S, T)
    Y[:, 0, :] = (level + 0.7 * cond)[:, None]
    Y = Y.reshape(len(g), -1)
    L, scheme = mc.CONTRASTS["within"]
    vg = {"column": "group", "labels": small.astype(int)} if groups else None
    spec = InferenceSpec(correction=correction, n_resamples=100, seed=3, forming_p=0.01)
    clean = infer(MixedKernel(fit_features(MixedCore(d), clean_Y), clean_Y, L, scheme=scheme,
                              variance_groups=vg), mc.grid().adjacency("face"), spec)
    fit = fit_features(MixedCore(d), Y)
    assert (fit.code.reshape(S, T)[0] == 3).all() and (fit.code.reshape(S, T)[1:] != 3).all()
    kernel = MixedKernel(fit, Y, L, scheme=scheme, variance_groups=vg)
    res = infer(kernel, mc.grid().adjacency("face"), spec)
    assert np.isnan(res.statistic[0]).all() and np.isfinite(res.statistic[1:]).all()
    assert res.statistic_info["degenerate_features"] == T
    assert np.isnan(res.p_corrected[0]).all() and np.isnan(res.p_uncorrected[0]).all()
    assert (res.cluster_labels[0] == 0).all()
    # every feature is fitted alone: the null is the clean data's with source 0 scored 0
    assert np.isfinite(res.null["max_stat"]).all()
    assert (res.null["max_stat"] <= clean.null["max_stat"] + 1e-5).all()
