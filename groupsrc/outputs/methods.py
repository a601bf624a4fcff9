"""The methods paragraph, filled from one run's numbers, with its references.

Only the references of methods this run used are listed.
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
}

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
    "fixed keeps the test valid (it only decides how efficiently each participant's maps are "
    "combined); estimates that had seen the tested effect would not, and would inflate the "
    "maximum statistic. {moved}No model is refitted per rearrangement. Estimates, standard "
    "errors, t, df and uncorrected p of the maps are those of the full model's own fit.")

#: what the mixed model's rearrangements move, with nuisance terms (leverage-adjusted)
MIXED_ADJUSTED = (
    "Where the model has terms besides the tested effect, sign flips move "
    "leverage-adjusted residuals: each participant's residual vector, in the metric of the "
    "model's covariance, multiplied by (I - H_ii)^(-1/2), where H_ii is that participant's "
    "block of the hat matrix of the model without the tested effect {leverage}; this undoes "
    "the shrinkage of the residuals by the nuisance fit, which otherwise makes tests with few "
    "participants liberal. The observed statistic is computed from the data as they are and "
    "counts as the identity rearrangement. ")


CORRECTION_TEXT = {
    "cluster-mass": "cluster-mass inference over space and time (the sum of the statistic over "
                    "each connected supra-threshold component)",
    "cluster-extent": "cluster-extent inference over space and time (the number of source x time "
                      "points in each connected supra-threshold component)",
    "tfce": "threshold-free cluster enhancement (TFCE) over space and time",
    "max-stat": "the maximum statistic over all sources and samples",
    "fdr": "the false discovery rate procedure over all sources and samples",
    "none": "no correction for multiple comparisons",
}

TAILS_TEXT = {"two": "two-sided", "greater": "one-sided (positive effects)",
              "less": "one-sided (negative effects)"}
NEIGHBOUR_TEXT = {"face": "face (6-connected)", "edge": "face and edge (18-connected)",
                  "vertex": "face, edge and corner (26-connected)"}
#: neighbour kinds on a surface (mesh edges; hemispheres never joined)
SURFACE_NEIGHBOUR_TEXT = {"edge": "mesh-edge (vertices joined by a triangle edge, the two "
                                  "hemispheres never joined)"}


def _neighbour_text(summary, inf):
    if summary.get("space", {}).get("kind") == "surface":
        text = SURFACE_NEIGHBOUR_TEXT.get(inf.get("neighbors") or "edge", inf.get("neighbors"))
        if summary["space"].get("volume_parts") and text.endswith(")"):
            text = text[:-1] + ("; voxels of the volume parts joined by a shared face "
                                "(6-connected) within one structure, never to another "
                                "structure or to the surfaces)")
        return text
    return NEIGHBOUR_TEXT.get(inf.get("neighbors") or "face", inf.get("neighbors"))


def _space_text(summary, coh):
    """'a common template grid of N sources' (volume) or the surface's equivalent."""
    space = summary.get("space", {})
    if space.get("kind") == "surface":
        hemis = [h["name"] for h in space.get("hemispheres", [])]
        vox = space.get("volume_parts")
        parts = ("" if not vox else
                 f", and the voxels of {len(vox['structures'])} volume part"
                 f"{'s' if len(vox['structures']) > 1 else ''} of the CIFTI-2 files: "
                 + _join(f"{s['name']} ({s['n_voxels']} voxels)" for s in vox["structures"]))
        return (f"a common template surface of {coh.get('sources', '?')} sources (the "
                f"vertices of the {_join(hemis)} hemisphere{'s' if len(hemis) > 1 else ''} "
                f"within the source mask{parts})")
    return f"a common template grid of {coh.get('sources', '?')} sources"


def _join(items):
    items = list(items)
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + " and " + items[-1]


def methods_text(summary: dict, contrasts: list) -> str:
    """Markdown: one methods paragraph and the references it cites.

    ``summary`` is the folder's analysis summary, ``contrasts`` the
    per-contrast summaries (see :mod:`groupsrc.outputs.report`).
    """
    coh = summary.get("cohort", {})
    inf = summary.get("settings", {}).get("inference", {})
    version = summary.get("groupsrc_version", "0.1.0")
    used = []

    def cite(key):
        if key not in used:
            used.append(key)
        return f"[{used.index(key) + 1}]"

    n = coh.get("participants")
    groups = coh.get("per_group") or {}
    who = f"{n} participants" if n is not None else "the participants"
    if groups:
        who += " (" + _join(f"{v} {k}" for k, v in groups.items()) + ")"
    conds = coh.get("conditions") or []
    win = summary.get("window", {})
    parts = [f"Source maps of {who}"
             + (f" in {len(conds)} conditions ({_join(conds)})" if conds else "")
             + f" were analysed on {_space_text(summary, coh)}, "
             f"from {win.get('start_ms', '?'):g} to {win.get('end_ms', '?'):g} ms "
             f"({win.get('n', '?')} samples every {win.get('dt_ms', '?'):g} ms), with groupsrc "
             f"{version}."]
    glm = [c for c in contrasts if c.get("model", "glm") == "glm"]
    mixed = [c for c in contrasts if c.get("model") == "mixed"]
    if glm:
        within = any(c.get("within") for c in glm)
        parts.append(("Within each participant the conditions were combined by each contrast's "
                      "within-participant weights into one map per contrast"
                      if within else "Each participant's maps were averaged into one map")
                     + " (summary-statistic approach), and a general linear model over "
                     "participants gave, at every source and sample, a t or F statistic for "
                     + ("each contrast." if not mixed else
                        f"the contrast(s) {_join(c['name'] for c in glm)}.")
                     + _excluded_text(coh, glm, mixed))
    if mixed:
        parts.append(_mixed_text(summary, mixed, cite))
    correction = inf.get("correction", contrasts[0]["correction"] if contrasts else "none")
    tails = TAILS_TEXT.get(inf.get("tails", "two"), inf.get("tails", ""))
    ctext = CORRECTION_TEXT.get(correction, correction)
    resampled = [c for c in contrasts if c.get("n_resamples", 0) > 0]
    if correction in ("cluster-mass", "cluster-extent"):
        ctext += " " + cite("cluster")
    elif correction == "tfce":
        ctext += " " + cite("tfce")
    elif correction == "fdr":
        ctext += " " + cite("fdr")
    if resampled:
        desc = []
        for c in resampled:
            how = "all distinct rearrangements (exact test)" if c.get("exact") else \
                f"{c['n_resamples']} random rearrangements including the observed one"
            desc.append(f"{c['name']}: {c['scheme']}, {how}")
        fl = any("Freedman-Lane" in c.get("scheme", "") for c in resampled)
        seed = inf.get("seed", summary.get("seed"))
        sent = (f"The family-wise error rate was controlled by {ctext}, with the null "
                f"distribution of its maximum built by resampling {cite('permutation')} "
                f"({'; '.join(desc)}"
                + ("; nuisance covariates handled by the Freedman-Lane procedure" if fl else "")
                + (f"; random seed {seed}" if seed is not None else "") + "). "
                "Corrected p-values were computed as (b + 1) / (m + 1), where b of the m "
                "rearrangements other than the observed one reached the observed value "
                f"(exact tests: the share of all rearrangements) {cite('pvalues')}.")
        if any(c.get("model") == "mixed" for c in resampled):
            adjusted = any("leverage-adjusted" in c.get("scheme", "") for c in resampled)
            moved = (MIXED_ADJUSTED.format(leverage=cite("leverage")) if adjusted
                     else "The observed data are one of the rearrangements. ")
            sent += " " + MIXED_RESAMPLING.format(multilevel=cite("multilevel"),
                                                  freedman=cite("freedman"), moved=moved)
    else:
        sent = ("No correction for multiple comparisons was applied; p-values are parametric."
                if correction == "none" else
                f"Multiple comparisons were handled by {ctext}; p-values are parametric.")
    parts.append(sent)
    if correction in ("cluster-mass", "cluster-extent"):
        thr = [f"{c['name']} {'z' if c.get('scale') == 'z' else c['kind']} = "
               f"{c['threshold']:.3g}" for c in contrasts if c.get("threshold") is not None]
        parts.append(f"Clusters were formed from points exceeding a threshold equivalent to "
                     f"p = {inf.get('forming_p', '?')} ({(tails + ' for t') if tails else ''}"
                     + ("; upper tail for F" if any(c["kind"] == "F" for c in contrasts) else "")
                     + "; "
                     + "; ".join(thr) + "), connecting "
                     f"{_neighbour_text(summary, inf)} "
                     "neighbouring sources at the same sample and the same source at adjacent "
                     "samples.")
    elif correction == "tfce":
        tf = next((c["tfce"] for c in contrasts if c.get("tfce")), None) \
            or inf.get("tfce") or {}
        parts.append(f"TFCE used the extent exponent E = {tf.get('extent_power', 0.5)} and "
                     f"the height exponent H = {tf.get('height_power', 2.0)} of Smith & Nichols, "
                     + (f"{tf['steps']} height steps per map, and " if tf.get("steps")
                        else "the exact height integral at the data values, and ")
                     + f"{_neighbour_text(summary, inf)} neighbours.")
    has_f = any(c["kind"] == "F" for c in contrasts)
    has_t = any(c["kind"] == "t" for c in contrasts)
    if has_t:
        parts.append(f"t tests were {tails} at alpha = {inf.get('alpha', 0.05)}"
                     + ("; F tests use the upper tail." if has_f else "."))
    else:
        parts.append(f"F tests use the upper tail, at alpha = {inf.get('alpha', 0.05)}.")
    if any(c["kind"] == "t" for c in glm):
        parts.append("Effect sizes are reported as contrast estimates in the input units with "
                     "95% t-intervals and as standardized effects (Hedges' g, Cohen's d with "
                     f"Hedges' small-sample correction {cite('hedges')}; 95% intervals by "
                     "inverting the noncentral t distribution)"
                     + ("; for F contrasts, partial eta squared" if any(
                         c["kind"] == "F" for c in contrasts) else "") + ".")
    if any(c["kind"] == "t" for c in mixed):
        parts.append("For the mixed-model t contrasts, effect sizes are the contrast estimates "
                     "with 95% intervals from the t distribution at the Satterthwaite df, and "
                     "standardized effects: the estimate over the SD of a single map at the "
                     "average map, the square root of the residual variance plus the "
                     f"participant variance there {cite('westfall')}"
                     + ("; for F contrasts, F k / (F k + df)" if any(
                         c["kind"] == "F" for c in mixed) else "") + ".")
    elif glm:
        parts.append("Effect sizes are reported as partial eta squared with 95% intervals by "
                     "inverting the noncentral F distribution.")
    parts.append("Values at cluster peaks were selected for being large and overstate the "
                 "effect; a cluster's extent and timing describe where the data exceeded the "
                 "threshold, not the effect's exact location, onset or offset.")
    text = "# Methods\n\n" + " ".join(parts) + "\n\n## References\n\n"
    text += "\n".join(f"{i + 1}. {REFERENCES[k]}" for i, k in enumerate(used)) + "\n"
    return text


def _excluded_text(coh, glm, mixed) -> str:
    left = coh.get("glm_excluded") or []
    if not left or not mixed:
        return ""
    return (f" The summary-statistic contrasts used the participants with a map of every "
            f"condition; they left out {_join(left)}, whose maps the mixed model used.")


def _mixed_text(summary, mixed, cite) -> str:
    """The mixed model: its terms, estimation, df, and the count of boundary fits."""
    coh = summary.get("cohort", {})
    mm = summary.get("mixed_model") or {}
    model = summary.get("settings", {}).get("model", {})
    covs = model.get("map_covariates") or []
    slopes = model.get("random_slopes") or []
    n = mm.get("n_features") or 0
    counts = mm.get("counts", {})

    def share(key):
        return f"{100.0 * counts.get(key, 0) / max(1, n):.2g}%"

    method = mm.get("method", "REML")
    text = (f"A linear mixed model was fitted by {method} at every source and sample to all "
            f"{mm.get('n_maps', coh.get('maps', '?'))} maps of "
            f"{mm.get('n_participants', coh.get('participants', '?'))} participants "
            f"{cite('lme4')}, for the contrast(s) {_join(c['name'] for c in mixed)}: fixed "
            f"effects the between-participant terms crossed with the conditions"
            + (f" and the map covariate(s) {_join(covs)}" if covs else "")
            + "; random effects a participant intercept"
            + (f" and participant slope(s) of {_join(slopes)} with an unstructured "
               "covariance" if slopes else "")
            + ". Every map was used, whatever the number of maps or conditions a participant "
            "had. The standard errors are those of the fixed effects given the variance "
            "estimates; t tests used Satterthwaite degrees of freedom "
            f"{cite('satterthwaite')} computed as lmerTest does {cite('lmertest')}")
    if any(c["kind"] == "F" for c in mixed):
        text += f", F tests the method of Fai and Cornelius {cite('fai')}"
    text += (". Because the df differ by source and sample, maps, clusters and maxima use "
             "the z of equal p (each t or F converted through its own df). Of the "
             f"{n} fits, {share('converged')} converged inside the parameter space, "
             f"{share('boundary (singular covariance)')} on its boundary (a variance "
             "estimated as zero or a correlation of +-1; kept, as lme4 keeps them, with the "
             f"estimates of that fit), {share('iteration limit')} stopped at the iteration "
             f"limit and {share('no residual variance')} had no residual variance.")
    return text
