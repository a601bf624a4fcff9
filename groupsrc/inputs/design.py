"""Within-participant reduction, design matrix and contrast weights.

Stage 2 and the model half of stage 3 of the pipeline: arrays and tables in,
arrays out; no file I/O.

Contrast meaning
----------------
Contrasts are defined on *marginal predictions*, not on coefficients, so
their meaning does not depend on how factors are coded:

* the reference grid holds every combination of the levels of the factors
  in the ``between`` formula, with every numeric covariate at its sample
  mean;
* the prediction row ``r(...)`` is the design-matrix row of a reference
  point, averaged over the grid with equal weight per combination;
* ``within`` alone tests ``r()`` on the within-contrast maps (the condition
  effect averaged over the between factors with equal weight, at the mean
  of every covariate);
* ``compare = {f = [a, b]}`` tests ``r(f=a) - r(f=b)``; with three or more
  levels an F test of ``r(f=l_i) - r(f=l_last)`` for every other level;
* ``slope = "x"`` tests ``r(x = mean + 1) - r(x = mean)``, the change per unit
  of ``x`` averaged over the grid;
* ``weights`` are taken as given over the design-matrix columns (treatment
  coding for text columns, formulaic's naming, e.g. ``group[T.patient]``),
  which ``groupsrc check`` prints.

The design matrix uses formulaic's default (treatment) coding; because
contrasts are built from predictions, sum coding would give the same
estimates, statistics and p-values.

Variance groups (``[inference] variance_groups``)
-------------------------------------------------
Which participants may have a residual variance of their own
(:func:`variance_groups`): ``"none"`` -- one pooled variance; a participants
column -- its levels, for every contrast; ``"auto"`` (default) -- the levels of
the compared factor (``compare``) or the cells of the between formula's factors
(other contrasts), *when those groups differ in size*: with equal groups the
pooled t keeps its level whatever the variances, with unequal groups it does
not (the Behrens-Fisher problem).  A contrast with variance groups is tested
with Welch's v (one row) or the G statistic (several rows) and sign flips
(:mod:`groupsrc.stats.models.groupvar`).
"""

from __future__ import annotations

import itertools
import re
from dataclasses import dataclass

import numpy as np
import pandas as pd
from formulaic import Formula, model_matrix

from ..stats.models.glm import check_design
from .problems import ProblemList, closest

ID = "participant_id"


def formula_variables(rhs: str) -> set:
    """Participants columns a right-hand-side formula uses."""
    try:
        return set(Formula(rhs).required_variables)
    except Exception:
        return set()


def factor_columns(settings, parts: pd.DataFrame, present) -> list:
    """Columns treated as factors: text columns, and numeric ones wrapped in C()."""
    rhs = settings.model.get("between") or "1"
    out = []
    for col in present:
        if col not in parts.columns:
            continue
        wrapped = re.search(r"C\(\s*" + re.escape(col) + r"\b", rhs) is not None
        if wrapped or not pd.api.types.is_numeric_dtype(parts[col]):
            out.append(col)
    # compare factors that are not in the formula are still factors
    for c in settings.contrasts:
        for f in (c.compare or {}):
            if f in parts.columns and f not in out:
                out.append(f)
    return out


@dataclass
class Design:
    X: pd.DataFrame            # participants x coefficients
    spec: object               # formulaic ModelSpec, to build prediction rows
    factors: dict              # factor column -> sorted levels
    covariates: dict           # numeric column -> mean
    participants: list
    table: pd.DataFrame | None = None   # the participants' rows, in the order of X


def build_design(settings, parts: pd.DataFrame, problems: ProblemList, where) -> Design | None:
    rhs = settings.model.get("between") or "1"
    variables = sorted(formula_variables(rhs))
    missing = [v for v in variables if v not in parts.columns]
    if missing or len(parts) == 0 or parts[variables].isna().any().any():
        return None  # reported by the table checks (missing columns, rows or values)
    try:
        Xm = model_matrix(rhs, parts, na_action="raise")
        X = pd.DataFrame(np.asarray(Xm, dtype=float), columns=list(Xm.columns),
                         index=parts[ID].tolist())
    except Exception as exc:  # formulaic reports user formula errors with several types
        problems.add(f"{settings.path} [model] between",
                     f"formula '{rhs}' cannot be built: {_plain(exc)}",
                     "write a Wilkinson right-hand side such as \"group + age\"")
        return None
    nonfinite = [c for c in X.columns if not np.all(np.isfinite(X[c].to_numpy()))]
    if nonfinite:
        problems.add(f"{settings.path} [model] between",
                     f"formula '{rhs}' gives NaN or infinite values in {', '.join(nonfinite)}",
                     "check the transformation (e.g. a log of a non-positive value)")
        return None
    factors = {}
    for col in factor_columns(settings, parts, variables):
        if col in variables:
            factors[col] = sorted(parts[col].astype(str).unique()) if parts[col].dtype == object \
                else sorted(parts[col].unique())
    covariates = {v: float(parts[v].mean()) for v in variables if v not in factors}
    n, p = X.shape
    if n <= p:
        problems.add(where, f"{n} participants for {p} design columns ({', '.join(X.columns)})",
                     "the model needs more participants than coefficients; simplify 'between'")
    else:
        rank = np.linalg.matrix_rank(X.to_numpy())
        if rank < p:
            problems.add(where, f"design matrix is rank-deficient (rank {rank} < {p} columns: "
                         f"{', '.join(X.columns)}); some columns are linear combinations of others",
                         "remove redundant terms from 'between' (e.g. a covariate constant within "
                         "a group, or two columns that carry the same information)")
        for col in covariates:
            if parts[col].std() == 0:
                problems.add(where, f"covariate '{col}' is constant", "remove it from 'between'")
    return Design(X=X, spec=Xm.model_spec, factors=factors, covariates=covariates,
                  participants=parts[ID].tolist(), table=parts.reset_index(drop=True))


def _prediction_row(design: Design, fixed: dict) -> np.ndarray:
    levels = {f: ([fixed[f]] if f in fixed else lv) for f, lv in design.factors.items()}
    names = list(levels)
    rows = []
    for combo in itertools.product(*[levels[n] for n in names]) if names else [()]:
        point = dict(zip(names, combo))
        for c, m in design.covariates.items():
            point[c] = fixed.get(c, m)
        rows.append(point)
    grid = pd.DataFrame(rows) if rows and rows[0] else pd.DataFrame(index=[0])
    M = design.spec.get_model_matrix(grid)
    M = pd.DataFrame(np.asarray(M, dtype=float), columns=list(M.columns))
    M = M.reindex(columns=design.X.columns, fill_value=0.0)
    return M.to_numpy().mean(axis=0)


@dataclass
class ContrastPlan:
    name: str
    description: str
    within: dict | None      # condition -> weight, or None (average of conditions)
    weights: np.ndarray      # (p,) or (k, p): over the between design (GLM) or the
                             # mixed model's columns (model = "mixed")
    kind: str                # "t" or "F"
    scheme: str              # "sign-flip" or "permutation"
    model: str = "glm"       # "glm" or "mixed"
    #: variance groups of the contrast (:func:`variance_groups`), or None: pooled
    groups: "VarianceGroups | None" = None

    @property
    def statistic_name(self) -> str:
        """What ``check`` calls the statistic: t, F, Welch v or G (variance groups)."""
        if self.groups is None:
            return self.kind
        if self.model == "mixed":
            return f"CR2 {self.kind}"            # cluster-robust (stats/models/mixed/robust)
        return "Welch v" if self.kind == "t" else "G"


def _plain(exc) -> str:
    """An exception message without terminal colour codes or position marks."""
    text = re.sub(r"\x1b\[[0-9;]*m|[\u29da\u29db]", "", str(exc))
    return re.sub(r"\s+", " ", text).strip()


@dataclass(frozen=True)
class VarianceGroups:
    """Participants' variance groups for one contrast."""

    column: str              # the participants column (or "a x b" for cells of factors)
    labels: np.ndarray       # (n,) one label per participant, in the design's order
    sizes: dict              # label -> participants
    reason: str              # why (for check, the report and the methods text)

    def record(self) -> dict:
        """JSON-ready: what run.json says."""
        return {"column": self.column, "sizes": {str(k): int(v) for k, v in self.sizes.items()},
                "reason": self.reason}


def _cells(design: Design, columns) -> np.ndarray:
    t = design.table
    labels = t[columns[0]].astype(str)
    for c in columns[1:]:
        labels = labels + " x " + t[c].astype(str)
    return labels.to_numpy()


def variance_groups(setting, spec, design: Design, problems: ProblemList,
                    where) -> VarianceGroups | None:
    """The variance groups of contrast ``spec`` under ``[inference] variance_groups =
    setting`` (module docstring), or None (pooled).  An explicit column whose groups
    cannot each give a variance is a problem; ``auto`` stays pooled then, and when a
    group holds fewer than 3 participants (a variance from two is no estimate)."""
    setting = setting or "auto"
    if setting == "none" or design.table is None:
        return None
    if setting != "auto":
        if setting not in design.table.columns:
            return None                          # reported by the table checks
        labels = design.table[setting].astype(str).to_numpy()
        column, reason = setting, f"set by [inference] variance_groups = \"{setting}\""
    else:
        if spec.compare:
            cols = [next(iter(spec.compare))]
        else:
            cols = [f for f in design.factors]
        cols = [c for c in cols if c in design.table.columns]
        if not cols:
            return None
        labels = _cells(design, cols)
        column = " x ".join(cols)
        reason = ""
    names, counts = np.unique(labels, return_counts=True)
    sizes = dict(zip(names.tolist(), counts.tolist()))
    if setting == "auto":
        if len(sizes) < 2 or counts.min() == counts.max():
            return None
        if counts.min() < 3:
            return None   # a variance from 2 participants is no estimate; stay pooled
        reason = ("automatic: the groups of " + column + " differ in size ("
                  + ", ".join(f"{k} {v}" for k, v in sizes.items()) + ")")
    vg = VarianceGroups(column, labels, sizes, reason)
    from ..stats.models.groupvar import groups_without_variance
    empty = groups_without_variance(design.X.to_numpy(), labels)
    if empty:
        if setting == "auto":
            return None
        problems.add(f"{where} [inference] variance_groups",
                     f"the variance of group(s) {', '.join(empty)} of '{column}' cannot be "
                     "estimated (too few participants for the design)",
                     "use a column whose groups each hold several participants, or "
                     "variance_groups = \"none\"")
        return None
    return vg


def plan_contrast(spec, design: Design, problems: ProblemList, where,
                  variance_groups_setting="none") -> ContrastPlan | None:
    """The contrast's weights and resampling scheme, or None with problems added."""
    try:
        plan = _plan_contrast(spec, design, problems, where)
    except Exception as exc:  # formulaic evaluating the user's formula on the reference grid
        problems.add(where, f"cannot be computed with the formula in [model] between "
                     f"({_plain(exc)})",
                     "use plain columns, C(...) and interactions in between; scale() or "
                     "center() are not needed, contrasts are taken at the covariates' means")
        return None
    if plan is None:
        return None
    vg = variance_groups(variance_groups_setting, spec, design, problems, where)
    if vg is not None:
        plan.groups = vg
        plan.scheme = "sign-flip"
    return plan


def weights_over(spec, cols, problems: ProblemList, where, what="a design-matrix column"):
    """The raw ``weights`` of a contrast as a vector over ``cols``, or None after naming
    every key that is not one of them."""
    unknown = [k for k in spec.weights if k not in cols]
    for k in unknown:
        problems.add(f"{where} weights", f"'{k}' is not {what}",
                     closest(k, cols) or f"columns are: {', '.join(cols)}")
    if unknown:
        return None
    return np.array([float(spec.weights.get(c, 0.0)) for c in cols])


def _plan_contrast(spec, design: Design, problems: ProblemList, where) -> ContrastPlan | None:
    cols = list(design.X.columns)
    within = spec.within
    if spec.weights:
        w = weights_over(spec, cols, problems, where)
        if w is None:
            return None
        # a contrast that weighs the constant (the mean level, e.g. Intercept = 1) is not
        # changed by permuting participants: it is tested by sign flips, like a mean
        from .units import tests_level
        kind = "t"
        scheme = "sign-flip" if within or tests_level(design.X.to_numpy(), w, 1.0) \
            else "permutation"
        desc = "raw weights " + ", ".join(f"{v:+g} {k}" for k, v in spec.weights.items())
    elif spec.compare:
        (fac, levels), = spec.compare.items()
        if fac not in design.factors:
            problems.add(f"{where} compare", f"'{fac}' is not a factor of the between formula",
                         f"add {fac} to [model] between")
            return None
        known = design.factors[fac]
        conv = []
        for lv in levels:
            match = [k for k in known if str(k) == str(lv)]
            if not match:
                return None  # reported by the table checks
            conv.append(match[0])
        rows = [_prediction_row(design, {fac: lv}) for lv in conv]
        if len(rows) == 2:
            w, kind = rows[0] - rows[1], "t"
            desc = f"{fac}: {conv[0]} minus {conv[1]}"
        else:
            w, kind = np.vstack([r - rows[-1] for r in rows[:-1]]), "F"
            desc = f"{fac}: any difference among {', '.join(map(str, conv))}"
        scheme = "permutation"
        if within:
            desc = f"({_within_text(within)}) differs by {desc}"
    elif spec.slope:
        s = spec.slope
        if s not in design.covariates:
            problems.add(f"{where} slope", f"'{s}' is not a numeric covariate of the between formula",
                         f"add {s} to [model] between")
            return None
        m = design.covariates[s]
        w = _prediction_row(design, {s: m + 1.0}) - _prediction_row(design, {s: m})
        kind, scheme = "t", "permutation"
        desc = f"change per unit of {s}" + (f" in ({_within_text(within)})" if within else "")
    else:
        w, kind, scheme = _prediction_row(design, {}), "t", "sign-flip"
        desc = _within_text(within) + " (averaged over groups, at covariate means)"
    w = np.where(np.abs(w) < 1e-12, 0.0, w)
    if not np.any(w):
        problems.add(where, "the contrast has all-zero weights on this design",
                     "check that the tested factor or covariate is in [model] between")
        return None
    if not spec.weights and not within and scheme == "sign-flip":
        problems.add(where, "tests the grand mean of averaged maps", "give within weights")
        return None
    try:
        # the engine's own check (estimable, residual df); its refusal becomes a problem here
        check_design(design.X.to_numpy(), w)
    except ValueError as exc:
        problems.add(where, f"cannot be tested on this design: {exc}",
                     "simplify [model] between or the contrast (see the design columns "
                     "that groupsrc check prints)")
        return None
    return ContrastPlan(spec.name, spec.description or desc, within, w, kind, scheme)


def smallest_p(plan: ContrastPlan, design: Design, n_resamples: int, tails: str,
               blocks=None) -> tuple[float, int]:
    """(smallest corrected p the rearrangements can give, distinct rearrangements).

    Sign flips: ``2^n`` sign vectors, and two-sided the vector of all minus signs gives
    the observed statistic's mirror, so ``2 / 2^n``.  Permutations: the distinct
    relabellings of the *tested* columns (the design columns the contrast weighs, a
    continuous covariate in the nuisance does not multiply them), within blocks; a
    two-level tested column with equal groups has a mirror too.  With fewer
    rearrangements than requested all are used (exact), else ``n_resamples`` of them,
    the identity among them (Phipson & Smyth 2010)."""
    from ..stats.resampling import count_distinct_permutations
    n = len(design.participants)
    if plan.scheme == "sign-flip":
        count = 2 ** n if n < 63 else 2 ** 62
        mirror = tails == "two"
    else:
        W = np.atleast_2d(plan.weights)
        cols = np.flatnonzero(np.abs(W).sum(axis=0) > 0)
        tested = np.round(design.X.to_numpy()[:, cols], 12)
        count = count_distinct_permutations(labels=tested, blocks=blocks, n=n)
        values, sizes = np.unique(tested, axis=0, return_counts=True)
        mirror = tails == "two" and blocks is None and len(values) == 2 and sizes[0] == sizes[1]
    m = min(int(n_resamples), count)
    k = 2 if (mirror and m == count) else 1
    return k / m, count


def _within_text(within):
    if not within:
        return "average of conditions"
    return " ".join(f"{'+' if v > 0 else '-'}{abs(v):g}*{k}" for k, v in within.items()).lstrip("+")


def reduction_matrix(maps: pd.DataFrame, participants: list, within_col, within: dict | None,
                     conditions: list) -> np.ndarray:
    """(n_participants, n_maps) weights turning maps into one map per participant.

    Sessions of the same condition are averaged; conditions are weighted by
    ``within`` or, when None, averaged with equal weight.
    """
    W = np.zeros((len(participants), len(maps)))
    row_of = {p: i for i, p in enumerate(participants)}
    pid = maps[ID].to_numpy()
    if within_col is None:
        cond = np.array(["_all"] * len(maps))
        weights = {"_all": 1.0}
    else:
        cond = maps[within_col].astype(str).to_numpy()
        weights = {str(k): float(v) for k, v in within.items()} if within else \
            {str(c): 1.0 / len(conditions) for c in conditions}
    for p in participants:
        i = row_of[p]
        for c, wc in weights.items():
            sel = np.nonzero((pid == p) & (cond == c))[0]
            if sel.size:
                W[i, sel] = wc / sel.size
    return W
