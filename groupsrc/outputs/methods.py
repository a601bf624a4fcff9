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
}

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
    within = any(c.get("within") for c in contrasts)
    parts.append(("Within each participant the conditions were combined by each contrast's "
                  "within-participant weights into one map per contrast"
                  if within else "Each participant's maps were averaged into one map")
                 + " (summary-statistic approach), and a general linear model over "
                 "participants gave, at every source and sample, a t or F statistic for each "
                 "contrast.")
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
    else:
        sent = ("No correction for multiple comparisons was applied; p-values are parametric."
                if correction == "none" else
                f"Multiple comparisons were handled by {ctext}; p-values are parametric.")
    parts.append(sent)
    if correction in ("cluster-mass", "cluster-extent"):
        thr = [f"{c['name']} {c['kind']} = {c['threshold']:.3g}" for c in contrasts
               if c.get("threshold") is not None]
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
    if any(c["kind"] == "t" for c in contrasts):
        parts.append("Effect sizes are reported as contrast estimates in the input units with "
                     "95% t-intervals and as standardized effects (Hedges' g, Cohen's d with "
                     f"Hedges' small-sample correction {cite('hedges')}; 95% intervals by "
                     "inverting the noncentral t distribution)"
                     + ("; for F contrasts, partial eta squared" if any(
                         c["kind"] == "F" for c in contrasts) else "") + ".")
    elif contrasts:
        parts.append("Effect sizes are reported as partial eta squared with 95% intervals by "
                     "inverting the noncentral F distribution.")
    parts.append("Values at cluster peaks were selected for being large and overstate the "
                 "effect; a cluster's extent and timing describe where the data exceeded the "
                 "threshold, not the effect's exact location, onset or offset.")
    text = "# Methods\n\n" + " ".join(parts) + "\n\n## References\n\n"
    text += "\n".join(f"{i + 1}. {REFERENCES[k]}" for i, k in enumerate(used)) + "\n"
    return text
