"""The mixed model's design: one row per map, contrasts with the GLM's meaning.

Used when ``[model] mixed = true``.  Arrays and tables in, arrays out; no file
I/O.  Problems (an empty cell, a random slope on a term that never varies
within a participant, more random-effect parameters than the maps identify,
no participant with more than one map) are ``check`` problems naming the
culprit.

Fixed effects: the between terms crossed with the within factor, X[k] =
[b_i (x) w_k, m_k] (Kronecker product, between column slowest), b_i the
participant's row of the between design, w_k = [1, treatment indicators of
the condition] (reference: the first condition in sorted order, like
formulaic), m_k the map covariates (main effects).  Contrasts keep the
meaning of the GLM's: a between weight vector r (prediction rows) and
within weights c become r (x) c_w with c_w = sum_c weight_c w(c) (or the
average of w(c) over conditions), 0 on the map covariates -- the GLM tests r
on sum_c weight_c (mean map of condition c) of every participant, which is
the same linear function of the coefficients.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from .design import ID, ContrastPlan, Design, plan_contrast, variance_groups, weights_over
from .problems import ProblemList


@dataclass
class MixedModelDesign:
    """The mixed model's arrays, rows in the maps table's order (= rows of Y)."""

    X: pd.DataFrame                  # maps x fixed-effect columns (index: participant ids)
    Z: np.ndarray                    # maps x random-effect columns
    z_names: list
    groups: np.ndarray               # participant index per map (into ``participants``)
    participants: list
    between: np.ndarray              # participants x between columns
    within: np.ndarray               # maps x within columns (1, indicators)
    within_names: list
    map_cols: np.ndarray | None      # maps x map covariates
    map_names: list
    conditions: list
    layout: np.ndarray               # a label per participant: equal covariance structures
    #: the random slopes used (``random_slopes = "auto"`` resolved) and, for auto, why
    slopes: list = None
    slopes_note: str = ""

    def stats_design(self):
        from ..stats.models.mixed.model import MixedDesign
        return MixedDesign(self.X.to_numpy(), self.Z, self.groups,
                           x_names=tuple(self.X.columns), z_names=tuple(self.z_names),
                           between=self.between, within=self.within, map_cols=self.map_cols,
                           layout=self.layout)


def _crossed_name(b, w):
    if b == "Intercept":
        return w
    return b if w == "Intercept" else f"{b}:{w}"


def within_coding(values, conditions, column):
    """(maps x [1, indicators]) treatment coding and its column names."""
    values = np.asarray(values).astype(str)
    W = [np.ones(values.size)] + [(values == str(c)).astype(float) for c in conditions[1:]]
    names = ["Intercept"] + [f"{column}[T.{c}]" for c in conditions[1:]]
    return np.column_stack(W), names


def map_layout(Z, groups, n):
    """A label per participant: participants with the same multiset of random-effect rows
    share a label -- their maps have the same covariance ``I + Z_i Psi Z_i'`` (up to the
    order of the maps), whatever their map covariates."""
    keys = []
    for i in range(n):
        r = np.round(np.asarray(Z, float)[groups == i], 10)
        keys.append(tuple(map(tuple, r[np.lexsort(r.T[::-1])])))
    labels = {k: j for j, k in enumerate(dict.fromkeys(keys))}
    return np.array([labels[k] for k in keys])


def auto_slope(W, groups, N, column) -> tuple:
    """``random_slopes = "auto"``: (use a random slope of the within column?, why).

    A participant's condition effect can vary by participant only where its variance
    can be told apart from the residual variance: some participants must have repeated
    maps of a condition (sessions).  Used when (1) the within column has at most
    ``MAX_RANDOM`` levels (one random-effect column each, the intercept included);
    (2) more participants have maps of every condition than the random-effect covariance
    has parameters; (3) the maps beyond one per participant and condition (the residual
    degrees of freedom once every participant's own condition means are fitted) are at
    least as many as those parameters (Barr et al. 2013, J Mem Lang 68:255-278: the
    maximal random-effects structure the design justifies)."""
    from ..stats.models.mixed.model import MAX_RANDOM
    q = W.shape[1]
    if q < 2:
        return False, ""
    npar = q * (q + 1) // 2
    if q > MAX_RANDOM:
        return False, (f"no random slope of '{column}': its {q} conditions would need {q} "
                       f"random effects per participant, at most {MAX_RANDOM} are supported "
                       "(the tests of the condition effect rest on the whole-participant "
                       "sign flips)")
    ranks = np.array([np.linalg.matrix_rank(W[groups == i]) for i in range(N)])
    full = int(np.sum(ranks == q))
    repeated = int(len(groups) - ranks.sum())
    if full > npar and repeated >= npar:
        return True, (f"random slope of '{column}' (auto): {repeated} maps repeat a "
                      f"participant's condition, so the condition effect's variance across "
                      "participants is told apart from the residual variance")
    why = ("no participant has two maps of one condition" if repeated == 0 else
           f"only {repeated} map(s) repeat a participant's condition" if repeated < npar else
           f"only {full} participant(s) have maps of every condition")
    return False, (f"no random slope of '{column}' (auto): {why}, so a participant's own "
                   f"condition effect cannot be told apart from the residual (needs at least "
                   f"{npar} repeated maps and {npar + 1} participants with every condition); "
                   "with one map per condition the random-intercept model gives the classical "
                   "repeated-measures tests; write random_slopes = [] to choose this "
                   "explicitly")


def build_mixed_design(settings, design: Design, maps: pd.DataFrame, problems: ProblemList,
                       where) -> MixedModelDesign | None:
    """The map-level design of ``mixed = true``; None with problems added."""
    within_col = settings.model.get("within")
    covs = list(settings.model.get("map_covariates") or [])
    chosen = settings.model.get("random_slopes", "auto")
    auto = chosen == "auto"
    slopes = [] if auto else [t for t in chosen or []          # unknown: reported
                              if t == within_col or t in covs]
    index = {p: i for i, p in enumerate(design.participants)}
    pids = maps[ID].astype(str).to_numpy()
    groups = np.array([index.get(p, -1) for p in pids])
    if np.any(groups < 0) or any(c not in maps.columns for c in covs):
        return None                                   # reported by the table checks
    n, N = len(maps), len(design.participants)
    conditions = sorted(map(str, maps[within_col].unique())) if within_col else []
    W, wnames = (within_coding(maps[within_col], conditions, within_col) if within_col
                 else (np.ones((n, 1)), ["Intercept"]))
    M = maps[covs].to_numpy(float) if covs else None
    B = design.X.to_numpy()
    X = np.stack([np.kron(B[g], W[k]) for k, g in enumerate(groups)])
    names = [_crossed_name(b, w) for b in design.X.columns for w in wnames]
    if covs:
        X, names = np.hstack([X, M]), names + covs
    note = ""
    if auto and within_col:
        use, note = auto_slope(W, groups, N, within_col)
        slopes = [within_col] if use else []
    Z, znames = [np.ones(n)], ["Intercept"]
    for term in slopes:
        if term == within_col:
            Z += list(W[:, 1:].T)
            znames += wnames[1:]
        elif term in covs:
            Z.append(M[:, covs.index(term)])
            znames.append(term)
    Z = np.column_stack(Z)
    n_before = len(problems)
    _check_mixed(settings, X, names, Z, znames, slopes, within_col, covs, W, M, groups, N,
                 problems, where)
    if len(problems) > n_before:
        return None
    return MixedModelDesign(
        X=pd.DataFrame(X, columns=names, index=[design.participants[g] for g in groups]),
        Z=Z, z_names=znames, groups=groups, participants=list(design.participants),
        between=B, within=W, within_names=wnames, map_cols=M, map_names=covs,
        conditions=conditions, layout=map_layout(Z, groups, N), slopes=list(slopes),
        slopes_note=note)


def _check_mixed(settings, X, names, Z, znames, slopes, within_col, covs, W, M, groups, N,
                 problems, where):
    """Every reason the mixed model cannot be fitted, each naming its culprit."""
    from ..stats.models.mixed.model import MAX_RANDOM
    n, p = X.shape
    q = Z.shape[1]
    sizes = np.bincount(groups, minlength=N)
    if sizes.max() < 2:
        problems.add(where, f"no participant has more than one map ({N} participants, "
                     f"{n} maps), so the participant variance cannot be told apart from the "
                     "residual variance", "add maps (conditions or sessions), or set mixed = "
                     "false")
        return
    for term in slopes:
        cols = W[:, 1:] if term == within_col else M[:, [covs.index(term)]]
        varies = [np.ptp(cols[groups == i], axis=0).max() > 0 for i in range(N)
                  if sizes[i] > 1]
        if not any(varies):
            problems.add(f"{where} random_slopes", f"'{term}' does not vary within any "
                         "participant, so its effect cannot vary by participant",
                         "remove it from random_slopes")
            return
    if q > MAX_RANDOM:
        problems.add(f"{where} random_slopes", f"{q} random-effect columns ({', '.join(znames)})"
                     f"; at most {MAX_RANDOM} are supported", "list fewer random slopes")
        return
    full = sum(np.linalg.matrix_rank(Z[groups == i]) == q for i in range(N))
    npar = q * (q + 1) // 2
    if n <= N * q or full <= npar:
        problems.add(f"{where} random_slopes" if slopes else where,
                     f"more random-effect parameters than the data can identify: {N} "
                     f"participants x {q} random effects for {n} maps, and {full} "
                     f"participant(s) whose maps inform all {npar} covariance parameters",
                     "drop a random slope, or add participants with maps in every condition")
    if n - p < 1:
        problems.add(where, f"{n} maps for {p} fixed-effect columns", "simplify the model")
        return
    rank = np.linalg.matrix_rank(X)
    if rank < p:
        dead = _dependent_columns(X, names)
        problems.add(where, f"the mixed model's fixed effects are rank deficient (rank {rank} "
                     f"< {p}); not estimable: {', '.join(dead)}",
                     "an empty cell (no maps of some group in some condition) or a map "
                     "covariate constant within groups: simplify between, within or "
                     "map_covariates")


def _dependent_columns(X, names):
    """Columns that are linear combinations of the ones before them."""
    out, basis = [], np.zeros((X.shape[0], 0))
    for j, name in enumerate(names):
        cand = np.hstack([basis, X[:, [j]]])
        if np.linalg.matrix_rank(cand) > basis.shape[1]:
            basis = cand
        else:
            out.append(name)
    return out


def within_vector(mdesign: MixedModelDesign, within: dict | None) -> np.ndarray:
    """c_w: the within weights over the within columns (average of conditions when None)."""
    rows = {c: np.r_[1.0, [float(c == d) for d in mdesign.conditions[1:]]]
            for c in mdesign.conditions} if mdesign.conditions else {"_": np.ones(1)}
    if within:
        return sum(float(v) * rows[str(k)] for k, v in within.items())
    return np.mean(list(rows.values()), axis=0)


def plan_mixed_contrast(spec, design: Design, mdesign: MixedModelDesign, problems, where,
                        variance_groups_setting="none"):
    """The contrast over the mixed model's columns (same meaning as the GLM's).  With
    variance groups (:func:`..inputs.design.variance_groups`, labels in the mixed
    model's participant order) the contrast is tested by the CR2 statistic with
    whole-participant sign flips (:mod:`..stats.models.mixed.robust`)."""
    cols = list(mdesign.X.columns)
    p_m = len(mdesign.map_names)
    if spec.weights:
        L = weights_over(spec, cols, problems, where, "a column of the mixed model")
        if L is None:
            return None
        pw = mdesign.within.shape[1]
        lw = L[:len(cols) - p_m].reshape(-1, pw)
        scheme = "sign-flip" if (np.any(lw[:, 1:]) or np.any(L[len(cols) - p_m:])) \
            else "permutation"
        plan = ContrastPlan(spec.name, spec.description or "raw weights " + ", ".join(
            f"{v:+g} {k}" for k, v in spec.weights.items()), spec.within, L, "t", scheme)
    elif spec.slope and spec.slope in mdesign.map_names:
        L = np.zeros(len(cols))
        L[len(cols) - p_m + mdesign.map_names.index(spec.slope)] = 1.0
        plan = ContrastPlan(spec.name, spec.description or f"change per unit of {spec.slope} "
                            "(map covariate)", None, L, "t", "sign-flip")
    else:
        base = plan_contrast(spec, design, problems, where)
        if base is None:
            return None
        cw = within_vector(mdesign, base.within)
        W = np.atleast_2d(base.weights)
        L = np.hstack([np.kron(W, cw[None, :]), np.zeros((W.shape[0], p_m))])
        plan = ContrastPlan(spec.name, base.description, base.within,
                            L[0] if base.kind == "t" else L, base.kind, base.scheme)
    L2 = np.atleast_2d(plan.weights)
    X = mdesign.X.to_numpy()
    if not np.allclose(L2 @ np.linalg.pinv(X) @ X, L2, atol=1e-8 * max(1.0, np.abs(L2).max())):
        problems.add(where, "cannot be tested by the mixed model: its weights are not a "
                     "combination of the design's rows (an empty cell?)",
                     "simplify the contrast or the model (groupsrc check prints the columns)")
        return None
    plan.model = "mixed"
    vg = variance_groups(variance_groups_setting, spec, design, problems, where)
    if vg is not None:
        by_id = dict(zip(design.participants, vg.labels))
        plan.groups = replace(vg, labels=np.array([by_id[p] for p in mdesign.participants]))
        plan.scheme = "sign-flip"
    return plan


def incomplete_participants(maps: pd.DataFrame, participants: list, within_col) -> list:
    """Participants lacking a map of some condition (the GLM cannot use them)."""
    if not within_col:
        return []
    levels = set(map(str, maps[within_col].unique()))
    have = maps.groupby(ID)[within_col].apply(lambda s: set(map(str, s)))
    return [p for p in participants if set(have.get(p, set())) != levels]


def reducible(maps, participants, within_col, within, conditions) -> np.ndarray:
    """Per participant: True when the within weights (or the average of conditions)
    can be applied, i.e. the participant has a map of every condition used."""
    if not within_col:
        return np.ones(len(participants), bool)
    need = {str(k) for k, v in within.items() if v} if within else set(map(str, conditions))
    have = maps.groupby(ID)[within_col].apply(lambda s: set(map(str, s)))
    return np.array([need <= set(have.get(p, set())) for p in participants])


def map_counts(maps: pd.DataFrame, participants: list, within_col) -> dict:
    """What ``groupsrc check`` says about an unbalanced cohort: maps per participant,
    participants with a single map, and the empty cells (participant, condition)."""
    counts = maps[ID].astype(str).value_counts()
    per = {str(p): int(counts.get(str(p), 0)) for p in participants}
    empty = []
    if within_col:
        levels = sorted(map(str, maps[within_col].unique()))
        have = maps.groupby(ID)[within_col].apply(lambda s: set(map(str, s)))
        empty = [[str(p), c] for p in participants for c in levels
                 if c not in have.get(p, set())]
    return {"maps_per_participant": per,
            "single_map": [p for p, k in per.items() if k == 1], "empty_cells": empty}


def rearrangement_checks(settings, mdesign: MixedModelDesign, plans, blocks, problems,
                         where_of) -> list:
    """What the mixed contrasts' rearrangements will be (:mod:`..stats.models.mixed.exchange`),
    decided from the design alone: a contrast whose distinct rearrangements cannot reach a
    corrected p of alpha is a problem; notes say where sign flips replace permutations."""
    from ..stats.models.mixed.exchange import plan as exchange_plan
    inf = settings.inference
    notes = []
    if inf.get("correction") in ("fdr", "none"):
        return notes
    alpha = float(inf.get("alpha", 0.05))
    design = mdesign.stats_design()
    for plan in plans:
        if plan.model != "mixed":
            continue
        ex = exchange_plan(design, plan.weights, plan.scheme, int(inf.get("resamples", 1000)),
                           blocks, variance_groups=plan.groups is not None,
                           tails=inf.get("tails", "two"))
        if ex.p_min > alpha:
            short = ("more resamples" if int(inf.get("resamples", 1000)) < ex.distinct
                     else "more participants")
            problems.add(where_of(plan), f"its {ex.distinct} distinct rearrangements "
                         f"({ex.scheme.replace('-', ' ')}s of whole participants) can give a "
                         f"corrected p of {ex.p_min:.3g} at the smallest, above alpha = {alpha:g}:"
                         " it could never reject",
                         f"it needs {short}, or correction = \"fdr\" for parametric p-values")
        elif ex.fallback:
            notes.append(f"contrast '{plan.name}': {ex.fallback}")
    return notes
