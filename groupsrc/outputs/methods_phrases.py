"""The sentences of the methods text, as tables keyed by what a run recorded.

Every sentence about a contrast's statistic, degrees of freedom, variance
groups, undefined features or effect size comes from one of the tables below,
keyed by a field of the contrast's record (its ``summary.json``, the same
fields as its entry in ``run.json``).  A statistic the stats stage adds later
(a new ``statistic``, ``df_rule`` or ``effect_size`` value, a new count) is one
more entry here; :mod:`.methods` only assembles.

A contrast's record carries ``statistic`` (``t``, ``F``, ``welch_v``, ``G``, or
absent in older folders: then the record's ``kind``), ``df_rule``,
``variance_groups`` (None, or ``{"column", "sizes", "reason"}``),
``effect_size`` and counts such as ``degenerate_features`` and
``boundary_features``.  What a contrast *means* is read from its specification
in the settings (``within``, ``compare``, ``slope``, ``weights``):
:func:`contrast_kind` names it.
"""

from __future__ import annotations

REFERENCES = {
    "cluster": "Maris E, Oostenveld R (2007). Nonparametric statistical testing of EEG- and "
               "MEG-data. J Neurosci Methods 164:177-190.",
    "tfce": "Smith SM, Nichols TE (2009). Threshold-free cluster enhancement: addressing problems "
            "of smoothing, threshold dependence and localisation in cluster inference. "
            "NeuroImage 44:83-98.",
    "permutation": "Winkler AM, Ridgway GR, Webster MA, Smith SM, Nichols TE (2014). Permutation "
                   "inference for the general linear model. NeuroImage 92:381-397.",
    "pvalues": "Phipson B, Smyth GK (2010). Permutation p-values should never be zero: "
               "calculating exact p-values when permutations are randomly drawn. "
               "Stat Appl Genet Mol Biol 9:39.",
    "fdr": "Benjamini Y, Hochberg Y (1995). Controlling the false discovery rate: a practical and "
           "powerful approach to multiple testing. J R Stat Soc B 57:289-300.",
    "hedges": "Hedges LV (1981). Distribution theory for Glass's estimator of effect size and "
              "related estimators. J Educ Stat 6:107-128.",
    "lme4": "Bates D, Maechler M, Bolker B, Walker S (2015). Fitting linear mixed-effects models "
            "using lme4. J Stat Softw 67(1):1-48.",
    "satterthwaite": "Satterthwaite FE (1946). An approximate distribution of estimates of "
                     "variance components. Biometrics Bulletin 2:110-114.",
    "lmertest": "Kuznetsova A, Brockhoff PB, Christensen RHB (2017). lmerTest package: tests in "
                "linear mixed effects models. J Stat Softw 82(13):1-26.",
    "fai": "Fai AHT, Cornelius PL (1996). Approximate F-tests of multiple degree of freedom "
           "hypotheses in generalized least squares analyses of unbalanced split-plot "
           "experiments. J Stat Comput Simul 54:363-378.",
    "multilevel": "Winkler AM, Webster MA, Vidaurre D, Nichols TE, Smith SM (2015). Multi-level "
                  "block permutation. NeuroImage 123:253-268.",
    "freedman": "Freedman D, Lane D (1983). A nonstochastic interpretation of reported "
                "significance levels. J Bus Econ Stat 1:292-298.",
    "leverage": "Davidson R, Flachaire E (2008). The wild bootstrap, tamed at last. "
                "J Econometrics 146:162-169.",
    "westfall": "Westfall J, Kenny DA, Judd CM (2014). Statistical power and optimal design in "
                "experiments in which samples of participants respond to samples of stimuli. "
                "J Exp Psychol Gen 143:2020-2045.",
    "welch": "Welch BL (1947). The generalization of 'Student's' problem when several "
             "different population variances are involved. Biometrika 34:28-35.",
    "circularity": "Kriegeskorte N, Simmons WK, Bellgowan PSF, Baker CI (2009). Circular "
                   "analysis in systems neuroscience: the dangers of double dipping. "
                   "Nat Neurosci 12:535-540.",
}


def fmt_df(d) -> str:
    """Degrees of freedom as written: whole numbers without decimals."""
    d = float(d)
    return f"{d:.0f}" if abs(d - round(d)) < 1e-9 else f"{d:.3g}"


def join(items) -> str:
    items = [str(i) for i in items]
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + " and " + items[-1]


def weights_text(within: dict) -> str:
    return ", ".join(f"{k} {v:+g}" for k, v in within.items())


# ----------------------------------------------------------------------------
# what a contrast means (from its specification)
# ----------------------------------------------------------------------------

def contrast_kind(spec: dict, kind: str) -> str:
    """within | between | between_f | interaction | interaction_f | slope | weights."""
    if spec.get("weights") is not None:
        return "weights"
    if spec.get("slope"):
        return "slope"
    if spec.get("compare"):
        suffix = "_f" if kind == "F" else ""
        return ("interaction" if spec.get("within") else "between") + suffix
    return "within"


def _compare(spec):
    factor, levels = next(iter(spec["compare"].items()))
    return factor, [str(v) for v in levels]


def _between_text(spec, _):
    f, lv = _compare(spec)
    return f"the difference between {f} {lv[0]} and {f} {lv[1]} ({lv[0]} minus {lv[1]})"


def _between_f_text(spec, _):
    f, lv = _compare(spec)
    return f"any difference among the {f} levels {join(lv)}"


#: what each kind of contrast tests: (how a participant's maps are reduced, what is tested)
MEANING = {
    "within": lambda spec, c: (
        f"the maps combined by the within-participant weights ({weights_text(spec['within'])})",
        "the mean of these maps over participants, every level of the between factors "
        "weighted equally and every covariate at its mean (a main effect of condition)"),
    "between": lambda spec, c: (None, _between_text(spec, c) + ", averaged over conditions "
                                "and at the covariates' mean"),
    "between_f": lambda spec, c: (None, _between_f_text(spec, c) + ", averaged over "
                                  "conditions and at the covariates' mean"),
    "interaction": lambda spec, c: (
        f"the maps combined by the within-participant weights ({weights_text(spec['within'])})",
        _between_text(spec, c) + " in this within-participant contrast (an interaction)"),
    "interaction_f": lambda spec, c: (
        f"the maps combined by the within-participant weights ({weights_text(spec['within'])})",
        _between_f_text(spec, c) + " in this within-participant contrast (an interaction)"),
    "slope": lambda spec, c: (
        (f"the maps combined by the within-participant weights "
         f"({weights_text(spec['within'])})" if spec.get("within") else None),
        f"the change per unit of {spec['slope']}, the other terms held at their means"),
    "weights": lambda spec, c: (
        (f"the maps combined by the within-participant weights "
         f"({weights_text(spec['within'])})" if spec.get("within") else None),
        "the weights " + ", ".join(f"{n} {w:+g}" for n, w in zip(
            c.get("coefficients", []), _flat(c.get("weights", []))) if w) + " over the design's "
        "columns"),
}


def _flat(w):
    return [x for row in w for x in (row if isinstance(row, list) else [row])]


# ----------------------------------------------------------------------------
# the statistic actually used (keyed by the record's fields)
# ----------------------------------------------------------------------------

def _df_list(c):
    return [fmt_df(d) for d in c.get("df", [])]


#: the statistic of a GLM contrast, keyed by the record's ``statistic``
STATISTIC_TEXT = {
    "t": lambda c: f"a t statistic with {_df_list(c)[-1]} residual degrees of freedom",
    "F": lambda c: (f"an F statistic with {_df_list(c)[0]} and {_df_list(c)[-1]} degrees of "
                    "freedom"),
    "welch_v": lambda c: ("Welch's v statistic (the estimate over a standard error built from "
                          "each variance group's own residual variance) {welch}"),
    "G": lambda c: ("the G statistic of Winkler et al. (2014), the F statistic's extension to "
                    "variance groups {permutation}"),
    "z": lambda c: "the z of equal p of its t or F",
}

#: how the degrees of freedom were set, keyed by the record's ``df_rule``
DF_RULE_TEXT = {
    "residual": None,                       # said with the statistic
    "welch_satterthwaite": ("its degrees of freedom at each source and sample by the "
                            "Welch-Satterthwaite rule {satterthwaite}, so thresholds and maps "
                            "use the z of equal p"),
    "satterthwaite": ("its degrees of freedom at each source and sample by Satterthwaite's "
                      "rule {satterthwaite}"),
    "satterthwaite_unconstrained": None,        # the mixed model's paragraph says it
    "bell_mccaffrey": ("a cluster-robust (CR2) standard error with participants as clusters "
                       "and its Bell-McCaffrey degrees of freedom, the working covariance "
                       "scaled per variance group; whole-participant sign flips of the "
                       "CR2-adjusted residuals, each rearrangement converted through its own "
                       "degrees of freedom"),
    "floored": ("its degrees of freedom floored where a fit lay on the boundary"),
}


def variance_groups_text(vg) -> str | None:
    if not vg:
        return None
    sizes = vg.get("sizes") or {}
    parts = join(f"{k} ({v})" for k, v in sizes.items())
    why = f"; {vg['reason']}" if vg.get("reason") else ""
    if vg.get("method") == "cr2":                  # the mixed model
        return (f"the variance groups of {vg.get('column', '?')} ({parts}) were allowed "
                f"their own variances through a cluster-robust statistic{why}")
    return (f"residual variances were estimated separately in the variance groups of "
            f"{vg.get('column', '?')}: {parts}{why}")


#: counts of features that were not ordinary, keyed by the record's field
COUNT_TEXT = {
    "degenerate_features": ("{n} source x sample points had no variance to test against "
                            "(every value equal); their statistic is undefined (NaN), they "
                            "join no cluster and have no p-value"),
    "boundary_features": ("{n} source x sample points had a boundary fit (a participant "
                          "variance estimated at or below zero, or with random slopes a "
                          "variance of zero or a correlation of +-1)"),
}


# ----------------------------------------------------------------------------
# standardized effects (keyed by the record's ``effect_size``, else the contrast's kind)
# ----------------------------------------------------------------------------

def effect_size_key(c: dict, kind_of_contrast: str) -> str:
    if c.get("effect_size"):
        return c["effect_size"]
    if c.get("model") == "mixed":
        return "d_total_sd" if c["kind"] == "t" else "partial_eta2_mixed"
    if c["kind"] == "F":
        return "partial_eta2"
    return {"within": "g_z", "between": "g", "interaction": "g_difference",
            "slope": "slope_std", "weights": "d_residual"}.get(kind_of_contrast, "d_residual")


EFFECT_SIZE_TEXT = {
    "g_z": ("a standardized within-participant effect, d_z: the estimate over the residual SD "
            "of the participants' within-contrast values, times Hedges' small-sample factor "
            "J = 1 - 3 / (4 df - 1) {hedges} (so g_z); 95% intervals by inverting the "
            "noncentral t distribution"),
    "g": ("Hedges' g: the group difference over the pooled residual SD, times Hedges' "
          "small-sample factor {hedges}; 95% intervals by inverting the noncentral t "
          "distribution"),
    "g_difference": ("Hedges' g of the within-participant contrast: the groups' difference "
                     "in that contrast over its pooled residual SD, times Hedges' small-sample "
                     "factor {hedges}; 95% intervals by inverting the noncentral t "
                     "distribution"),
    "slope_std": ("a standardized slope: the change per unit of the covariate over the "
                  "residual SD, times Hedges' small-sample factor {hedges} (its size depends "
                  "on the covariate's unit); 95% intervals by inverting the noncentral t "
                  "distribution"),
    "d_residual": ("the estimate over the residual SD times Hedges' small-sample factor "
                   "{hedges}; 95% intervals by inverting the noncentral t distribution"),
    "partial_eta2": ("partial eta squared, F df1 / (F df1 + df2), with 95% intervals by "
                     "inverting the noncentral F distribution"),
    "d_mean_group_variance": ("the estimate over the square root of the mean of the "
                              "variance groups' residual variances"),
    "d_total_sd": ("the estimate over the SD of a single map at the average map (the square "
                   "root of the residual plus the participant variance there) {westfall}; "
                   "no interval is given for it"),
    "partial_eta2_mixed": "F k / (F k + df), with the Satterthwaite df of each feature",
}

#: the paragraph's short names of the effect sizes, for the short version
EFFECT_SIZE_SHORT = {"g_z": "d_z (Hedges-corrected)", "g": "Hedges' g",
                     "g_difference": "Hedges' g of the within contrast",
                     "slope_std": "standardized slope per unit",
                     "d_residual": "estimate over residual SD",
                     "partial_eta2": "partial eta squared",
                     "d_mean_group_variance": "estimate over the mean group SD",
                     "d_total_sd": "estimate over the total SD",
                     "partial_eta2_mixed": "partial eta squared"}


# ----------------------------------------------------------------------------
# inference
# ----------------------------------------------------------------------------

CORRECTION_TEXT = {
    "cluster-mass": "cluster-mass inference over space and time (the sum of the statistic over "
                    "each connected supra-threshold component) {cluster}",
    "cluster-extent": "cluster-extent inference over space and time (the number of source x time "
                      "points in each connected supra-threshold component) {cluster}",
    "tfce": "threshold-free cluster enhancement (TFCE) over space and time {tfce}",
    "max-stat": "the maximum statistic over all sources and samples",
    "fdr": "the false discovery rate procedure over all sources and samples {fdr}",
    "none": "no correction for multiple comparisons",
}
CORRECTION_SHORT = {"cluster-mass": "cluster mass", "cluster-extent": "cluster extent",
                    "tfce": "TFCE", "max-stat": "the maximum statistic",
                    "fdr": "the false discovery rate", "none": "no correction"}

TAILS_TEXT = {"two": "two-sided", "greater": "one-sided (positive effects)",
              "less": "one-sided (negative effects)"}
NEIGHBOUR_TEXT = {"face": "face (6-connected)", "edge": "face and edge (18-connected)",
                  "vertex": "face, edge and corner (26-connected)"}
#: neighbour kinds on a surface (mesh edges; hemispheres never joined)
SURFACE_NEIGHBOUR_TEXT = {"edge": "mesh-edge (vertices joined by a triangle edge, the two "
                                  "hemispheres never joined)"}

#: the mixed model's resampling, what is held fixed and why the test stays valid
MIXED_RESAMPLING = (
    "For the mixed-model contrasts the observed data and every rearrangement were scored "
    "alike: at each source and sample the variance components were held at the REML "
    "estimates of the model without the tested effect (fitted once), and each data set "
    "re-estimated the fixed effects (generalized least squares) and the residual variance at "
    "those variance components, giving the t or F and its z (through Satterthwaite df "
    "computed once from that fit). The rearrangements move whole participants only "
    "{multilevel}: participants' residual vectors under the model without the tested effect "
    "(Freedman-Lane {freedman}) are exchangeable or symmetric, and variance components "
    "estimated without the tested effect describe every rearrangement alike, so holding them "
    "fixed keeps the test valid; estimates that had seen the tested effect would not, and "
    "would inflate the maximum statistic. {moved}No model is refitted per rearrangement. "
    "Estimates, standard errors, t, df and uncorrected p of the maps are those of the full "
    "model's own fit.")

#: what the mixed model's rearrangements move, with nuisance terms (leverage-adjusted)
MIXED_ADJUSTED = (
    "Where the model has terms besides the tested effect, sign flips move "
    "leverage-adjusted residuals: each participant's residual vector, in the metric of the "
    "model's covariance, multiplied by (I - H_ii)^(-1/2), where H_ii is that participant's "
    "block of the hat matrix of the model without the tested effect {leverage}. The observed "
    "statistic is computed from the data as they are and counts as the identity "
    "rearrangement. These flips make the test approximate, in the manner of a restricted "
    "wild bootstrap, not exact. ")
