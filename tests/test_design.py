"""Contrast meaning (DESIGN.md) checked against statsmodels OLS fits.

The reference is statsmodels' formula OLS with sum-coded factors and centred
covariates, whose coefficients *are* the quantities DESIGN.md promises: the
intercept is the mean over factor levels with equal weight at the covariates'
mean, and the covariate coefficient is the slope averaged over levels.
"""

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from groupsrc.inputs.design import build_design, plan_contrast, reduction_matrix
from groupsrc.inputs.problems import ProblemList
from groupsrc.inputs.settings import ContrastSpec


class _S:  # the two attributes design.py reads from Settings
    def __init__(self, between, contrasts):
        self.model = {"between": between}
        self.contrasts = contrasts
        self.path = "analysis.toml"


def _table(seed=0, n=(7, 9, 5)):
    rng = np.random.default_rng(seed)
    groups = sum(([g] * k for g, k in zip(["control", "patient", "sibling"], n)), [])
    df = pd.DataFrame({"participant_id": [f"sub-{i:02d}" for i in range(len(groups))],
                       "group": groups, "age": rng.uniform(20, 70, len(groups))})
    df["y"] = (rng.standard_normal(len(df)) + (df.group == "patient") * 1.5
               + 0.03 * df.age * (1 + (df.group == "sibling")))
    return df


def _estimate(df, between, spec):
    s = _S(between, [spec])
    probs = ProblemList()
    design = build_design(s, df.drop(columns="y"), probs, "x")
    plan = plan_contrast(spec, design, probs, "x")
    assert not probs, probs.format()
    X = design.X.to_numpy()
    beta, *_ = np.linalg.lstsq(X, df.y.to_numpy(), rcond=None)
    return plan, plan.weights @ beta


def test_within_main_effect_is_equal_weight_mean_at_covariate_mean():
    df = _table()
    # reference: statsmodels OLS, sum coding + centred age -> Intercept
    ref = smf.ols("y ~ C(group, Sum) * I(age - age.mean())", df).fit()
    plan, est = _estimate(df, "group * age", ContrastSpec("m", within={"a": 1, "b": -1}))
    assert plan.kind == "t" and plan.scheme == "sign-flip"
    assert est == pytest.approx(ref.params["Intercept"], rel=1e-9)


def test_slope_is_average_slope_over_groups():
    df = _table(1)
    ref = smf.ols("y ~ C(group, Sum) * I(age - age.mean())", df).fit()
    plan, est = _estimate(df, "group * age", ContrastSpec("s", slope="age"))
    assert plan.scheme == "permutation"
    assert est == pytest.approx(ref.params["I(age - age.mean())"], rel=1e-9)


def test_two_level_compare_equals_difference_of_marginal_means():
    df = _table(2)
    ref = smf.ols("y ~ C(group, Treatment('control')) + age", df).fit()
    plan, est = _estimate(df, "group + age",
                          ContrastSpec("c", compare={"group": ["patient", "control"]}))
    assert plan.kind == "t"
    assert est == pytest.approx(ref.params["C(group, Treatment('control'))[T.patient]"], rel=1e-9)


def test_three_level_compare_is_F_equal_to_statsmodels_f_test():
    df = _table(3)
    spec = ContrastSpec("c3", compare={"group": ["control", "patient", "sibling"]})
    s = _S("group + age", [spec])
    probs = ProblemList()
    design = build_design(s, df.drop(columns="y"), probs, "x")
    plan = plan_contrast(spec, design, probs, "x")
    assert plan.kind == "F" and plan.weights.shape == (2, design.X.shape[1])
    # F for the contrast rows computed plainly from OLS formulas
    X, y = design.X.to_numpy(), df.y.to_numpy()
    beta, *_ = np.linalg.lstsq(X, y, rcond=None)
    res = y - X @ beta
    df2 = len(y) - X.shape[1]
    s2 = res @ res / df2
    L = plan.weights
    cov = np.linalg.inv(X.T @ X)
    Lb = L @ beta
    F = Lb @ np.linalg.solve(L @ cov @ L.T, Lb) / L.shape[0] / s2
    # reference: statsmodels f_test of every group coefficient = 0
    ref = smf.ols("y ~ group + age", df).fit()
    fr = ref.f_test("group[T.patient] = 0, group[T.sibling] = 0")
    assert F == pytest.approx(float(np.squeeze(fr.fvalue)), rel=1e-9)


def test_raw_weights_and_unknown_coefficient():
    df = _table(4)
    spec = ContrastSpec("w", weights={"group[T.patient]": 1.0})
    plan, est = _estimate(df, "group + age", spec)
    ref = smf.ols("y ~ group + age", df).fit()
    assert est == pytest.approx(ref.params["group[T.patient]"], rel=1e-9)
    s = _S("group + age", [])
    probs = ProblemList()
    design = build_design(s, df.drop(columns="y"), probs, "x")
    plan_contrast(ContrastSpec("w", weights={"group[T.patient ]": 1.0}), design, probs, "x")
    assert "did you mean 'group[T.patient]'?" in probs.format()


def test_reduction_averages_sessions_then_weights_conditions():
    maps = pd.DataFrame({
        "participant_id": ["a", "a", "a", "b", "b"],
        "condition": ["rare", "rare", "frequent", "rare", "frequent"],
        "session": ["1", "2", "1", "1", "1"]})
    W = reduction_matrix(maps, ["a", "b"], "condition", {"rare": 1, "frequent": -1},
                         ["frequent", "rare"])
    np.testing.assert_allclose(W, [[0.5, 0.5, -1, 0, 0], [0, 0, 0, 1, -1]])
    W = reduction_matrix(maps, ["a", "b"], "condition", None, ["frequent", "rare"])
    np.testing.assert_allclose(W, [[0.25, 0.25, 0.5, 0, 0], [0, 0, 0, 0.5, 0.5]])
