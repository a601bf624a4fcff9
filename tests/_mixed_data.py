"""Random unbalanced multilevel data for the mixed-model tests (arrays only).

Invented numbers: they are inputs the tests feed to groupsrc *and* to the
outside reference (statsmodels), never check values themselves.
"""

from __future__ import annotations

import warnings

import numpy as np

from groupsrc.inputs.mixed_design import map_layout
from groupsrc.stats.models.mixed.model import MixedDesign


def unbalanced_design(n_participants=16, seed=0, missing=(3,), max_sessions=3,
                      random_slope=False, map_covariate=False, groups=2):
    """``groups`` groups x two conditions, 1..max_sessions sessions per participant;
    the participants in ``missing`` lack condition 1 (an empty cell).
    X = [b (x) w, m] with b = [1, group indicators..., age], w = [1, condition]
    and, with ``map_covariate``, m = the session number (0, 1, ...)."""
    rng = np.random.default_rng(seed)
    rows, B = [], []
    for i in range(n_participants):
        B.append([1.0] + [float(i % groups == j) for j in range(1, groups)]
                 + [rng.uniform(-1, 1)])
        ns = int(rng.integers(1, max_sessions + 1))
        conds = (0,) if i in missing else (0, 1)
        for s in range(ns):
            for c in conds:
                rows.append((i, c, s))
    rows = np.array(rows)
    g, cond = rows[:, 0], rows[:, 1].astype(float)
    B = np.array(B)
    W = np.c_[np.ones(len(g)), cond]
    M = rows[:, 2:3].astype(float) if map_covariate else None
    X = np.stack([np.kron(B[gi], W[k]) for k, gi in enumerate(g)])
    if map_covariate:
        X = np.hstack([X, M])
    Z = np.c_[np.ones(len(g)), cond] if random_slope else np.ones((len(g), 1))
    layout = map_layout(Z, g, n_participants)
    return MixedDesign(X, Z, g, between=B, within=W, map_cols=M, layout=layout)


def simulate(design, n_features, seed=1, sd_random=(1.5, 0.8), sd_noise=1.0, effect=None):
    """Features of the model: random effects with the given SDs, Gaussian noise."""
    rng = np.random.default_rng(seed)
    Z, g = np.asarray(design.Z), np.asarray(design.groups)
    q = Z.shape[1]
    N = int(g.max()) + 1
    b = rng.standard_normal((N, q, n_features)) * np.asarray(sd_random[:q])[None, :, None]
    Y = np.einsum("nq,nqf->nf", Z, b[g]) + sd_noise * rng.standard_normal((len(g), n_features))
    if effect is not None:
        Y += (design.X @ np.asarray(effect))[:, None]
    return Y.astype(np.float32)


def statsmodels_reml(y, design, reml=True):
    """statsmodels MixedLM fitted tightly (several optimizers, the best kept, then
    polished with BFGS), and the refit with the variance parameters held at their
    estimates (``free``), whose fixed-effect covariance is sigma^2 (X'V^-1 X)^-1."""
    from statsmodels.regression.mixed_linear_model import MixedLM, MixedLMParams
    X, Z, g = np.asarray(design.X), np.asarray(design.Z), np.asarray(design.groups)
    best = None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for method in (["lbfgs"], ["bfgs"], ["powell"]):
            try:
                r = MixedLM(y, X, g, exog_re=Z).fit(reml=reml, method=method)
            except Exception:      # an optimizer that fails is just not the best one
                continue
            if np.isfinite(r.llf) and (best is None or r.llf > best.llf):
                best = r
        for _ in range(2):
            try:
                r = MixedLM(y, X, g, exog_re=Z).fit(reml=reml, start_params=best.params_object,
                                                    method=["bfgs"], gtol=1e-12, maxiter=5000)
            except Exception:      # polishing is optional
                break
            if np.isfinite(r.llf) and r.llf >= best.llf:
                best = r
        q = Z.shape[1]
        free = MixedLMParams.from_components(np.ones(X.shape[1]), np.zeros((q, q)))
        start = MixedLMParams.from_components(np.asarray(best.fe_params),
                                              np.asarray(best.cov_re) / best.scale)
        fixed = MixedLM(y, X, g, exog_re=Z).fit(reml=reml, free=free, start_params=start,
                                                method=["bfgs"])
    return best, fixed
