"""The methods text, filled from one run's records, with its references.

Four paragraphs -- data, model, inference, effect sizes -- then a short
version and the references, numbered in the order the text first cites them.
Every sentence is built from what the run recorded: the analysis summary
(cohort, window, settings, the mixed model's fit counts) and each contrast's
record (its ``summary.json``: statistic, df, scheme, resamples, thresholds,
reported clusters, and the fields the stats stage adds, such as
``variance_groups``).  The sentences themselves are tables in
:mod:`.methods_phrases`, keyed by those fields; this module only assembles.
Only the references of methods this run used are listed.
"""

from __future__ import annotations

import re

from .methods_phrases import (CORRECTION_SHORT, CORRECTION_TEXT, COUNT_TEXT, DF_RULE_TEXT,
                              EFFECT_SIZE_SHORT, EFFECT_SIZE_TEXT, MEANING, MIXED_ADJUSTED,
                              MIXED_RESAMPLING, NEIGHBOUR_TEXT, REFERENCES, STATISTIC_TEXT,
                              SURFACE_NEIGHBOUR_TEXT, TAILS_TEXT, contrast_kind,
                              effect_size_key, fmt_df, join, variance_groups_text)


class _Citations:
    """Numbers references in the order of first citation."""

    def __init__(self):
        self.used = []

    def __call__(self, key):
        if key not in self.used:
            self.used.append(key)
        return f"[{self.used.index(key) + 1}]"

    def fill(self, text: str) -> str:
        """Replace every ``{key}`` of a phrase by its citation number, in reading order."""
        return re.sub(r"\{(\w+)\}",
                      lambda m: self(m.group(1)) if m.group(1) in REFERENCES else m.group(0),
                      text)


def _spec(summary, c) -> dict:
    """The contrast's specification from the settings (what it means)."""
    for spec in summary.get("settings", {}).get("contrasts") or []:
        if spec.get("name") == c["name"]:
            return spec
    return {"within": c.get("within"), "weights": c.get("weights")}


def _unit(summary) -> str | None:
    return (summary.get("settings", {}).get("cohort") or {}).get("unit") or None


def _statistic(c) -> str:
    return c.get("statistic") or c["kind"]


# ----------------------------------------------------------------------------
# paragraphs
# ----------------------------------------------------------------------------

def _space_text(summary, coh):
    space = summary.get("space", {})
    if space.get("kind") == "surface":
        hemis = [h["name"] for h in space.get("hemispheres", [])]
        vox = space.get("volume_parts")
        parts = ("" if not vox else
                 f", and the voxels of {len(vox['structures'])} volume part"
                 f"{'s' if len(vox['structures']) > 1 else ''} of the CIFTI-2 files: "
                 + join(f"{s['name']} ({s['n_voxels']} voxels)" for s in vox["structures"]))
        return (f"a common template surface of {coh.get('sources', '?')} sources (the "
                f"vertices of the {join(hemis)} hemisphere{'s' if len(hemis) > 1 else ''} "
                f"within the source mask{parts})")
    vs = coh.get("voxel_size_mm")
    size = f" ({' x '.join(f'{v:g}' for v in vs)} mm voxels)" if vs else ""
    return f"a common template grid of {coh.get('sources', '?')} sources{size}"


def data_paragraph(summary, contrasts, cite) -> str:
    coh = summary.get("cohort", {})
    n = coh.get("participants")
    who = f"{n} participants" if n is not None else "the participants"
    groups = coh.get("per_group") or {}
    if groups:
        who += " (" + join(f"{v} {k}" for k, v in groups.items()) + ")"
    conds = coh.get("conditions") or []
    win = summary.get("window", {})
    maps = f", {coh['maps']} maps in all," if coh.get("maps") is not None else ""
    out = [f"Source maps of {who}"
           + (f" in {len(conds)} conditions ({join(conds)})" if conds else "")
           + f"{maps} were analysed on {_space_text(summary, coh)}, from "
           f"{win.get('start_ms', '?'):g} to {win.get('end_ms', '?'):g} ms "
           f"({win.get('n', '?')} samples every {win.get('dt_ms', '?'):g} ms), with groupsrc "
           f"{summary.get('groupsrc_version', '?')}."]
    unit = _unit(summary)
    out.append(f"Map values, and every estimate below, are in {unit}." if unit else
               "The unit of the map values was not given; estimates are in the maps' own "
               "units.")
    glm = [c for c in contrasts if c.get("model", "glm") == "glm"]
    sessions = coh.get("sessions") or []
    if glm and len(sessions) > 1:
        out.append(f"The maps came from {len(sessions)} sessions ({join(sessions)}); for the "
                   "general linear model, the maps of one participant and condition from "
                   "different sessions were averaged first.")
    left = coh.get("glm_excluded") or []
    if left and glm and len(glm) < len(contrasts):
        out.append(f"The general-linear-model contrasts used the participants with a map of "
                   f"every condition; they left out {join(left)}, whose maps the mixed model "
                   "used.")
    return " ".join(out)


def _glm_contrast_sentence(summary, c, cite) -> str:
    spec = _spec(summary, c)
    kind = contrast_kind(spec, c["kind"])
    reduce_, tested = MEANING[kind](spec, c)
    conds = summary.get("cohort", {}).get("conditions") or []
    if reduce_ is None:
        reduce_ = ("the maps averaged over conditions" if conds else "the participant's map")
    stat = STATISTIC_TEXT.get(_statistic(c), STATISTIC_TEXT.get(c["kind"]))(c)
    extra = [DF_RULE_TEXT.get(c.get("df_rule")), variance_groups_text(c.get("variance_groups"))]
    extra += [t.format(n=c[k]) for k, t in COUNT_TEXT.items() if c.get(k)]
    more = "".join(f"; {e}" for e in extra if e)
    return cite.fill(f"For {c['name']}, each participant contributed {reduce_}, and the test "
                     f"was of {tested}, by {stat}{more}.")


def model_paragraph(summary, contrasts, cite) -> str:
    glm = [c for c in contrasts if c.get("model", "glm") == "glm"]
    mixed = [c for c in contrasts if c.get("model") == "mixed"]
    out = []
    if glm:
        model = summary.get("settings", {}).get("model", {})
        cols = glm[0].get("coefficients") or []
        n = glm[0].get("n_participants")
        out.append("A general linear model over "
                   + (f"{n} participants" if n else "participants")
                   + f" with the terms {model.get('between', '1')}"
                   + (f" (design columns {join(cols)})" if cols else "")
                   + " was fitted by ordinary least squares at every source and sample to one "
                   "map per participant and contrast (the summary-statistic approach).")
        out += [_glm_contrast_sentence(summary, c, cite) for c in glm]
    if mixed:
        out.append(_mixed_text(summary, mixed, cite))
    return " ".join(out)


def _neighbour_text(summary, inf):
    if summary.get("space", {}).get("kind") == "surface":
        text = SURFACE_NEIGHBOUR_TEXT.get(inf.get("neighbors") or "edge", inf.get("neighbors"))
        if summary["space"].get("volume_parts") and text.endswith(")"):
            text = text[:-1] + ("; voxels of the volume parts joined by a shared face "
                                "(6-connected) within one structure, never to another "
                                "structure or to the surfaces)")
        return text
    return NEIGHBOUR_TEXT.get(inf.get("neighbors") or "face", inf.get("neighbors"))


def inference_paragraph(summary, contrasts, cite) -> str:
    inf = summary.get("settings", {}).get("inference", {})
    correction = inf.get("correction", contrasts[0]["correction"] if contrasts else "none")
    tails = TAILS_TEXT.get(inf.get("tails", "two"), inf.get("tails", ""))
    alpha = inf.get("alpha", 0.05)
    ctext = cite.fill(CORRECTION_TEXT.get(correction, correction))
    resampled = [c for c in contrasts if c.get("n_resamples", 0) > 0]
    out = []
    if correction == "none":
        out.append("No correction for multiple comparisons was applied; p-values are "
                   "parametric and hold for one source and sample at a time.")
    elif correction == "fdr":
        out.append(f"The false discovery rate was controlled at {alpha} separately within "
                   f"each contrast, over all its sources and samples, by {ctext}; p-values "
                   "are parametric.")
    else:
        out.append("Each contrast was tested on its own: the family-wise error rate was "
                   "controlled within each contrast over all its sources and samples, not "
                   f"across the {len(contrasts)} contrasts, by {ctext}.")
    if resampled and correction not in ("fdr", "none"):
        desc = []
        for c in resampled:
            how = ("all distinct rearrangements" + (
                " (an exact test)" if c.get("rearrangement_exact", c.get("model") != "mixed")
                else "") if c.get("exact") else
                   f"{c['n_resamples']} random rearrangements including the observed one")
            desc.append(f"{c['name']}: {c['scheme']}, {how}")
        seed = inf.get("seed", summary.get("seed"))
        fl = any("Freedman-Lane" in c.get("scheme", "") for c in resampled)
        out.append(f"The null distribution of the map-wide maximum was built by resampling "
                   f"{cite('permutation')} ({'; '.join(desc)})"
                   + (f", nuisance terms handled by the Freedman-Lane procedure "
                      f"{cite('freedman')}" if fl else "")
                   + (f", random seed {seed}" if seed is not None else "") + ".")
        out.append("Corrected p-values are (b + 1) / (m + 1), where b of the m rearrangements "
                   "other than the observed one reached the observed value (exact tests: the "
                   f"share of all rearrangements) {cite('pvalues')}.")
        mixed = [c for c in resampled if c.get("model") == "mixed"]
        if mixed:
            adjusted = any("leverage-adjusted" in c.get("scheme", "") for c in mixed)
            first = dict(multilevel=cite("multilevel"), freedman=cite("freedman"))  # reading order
            moved = (MIXED_ADJUSTED.format(leverage=cite("leverage")) if adjusted
                     else "The observed data are one of the rearrangements. ")
            if any("CR2" in c.get("scheme", "") for c in mixed):
                moved += ("With variance groups, the sign flips move each participant's "
                          "residual vector of the full model, multiplied by (I - H_ii)^(-1/2) "
                          "(the CR2 adjustment), on the fitted values of the model without the "
                          "tested effect; every rearrangement's CR2 statistic is converted "
                          "through its own Bell-McCaffrey df, and the observed statistic "
                          "counts as the identity: an approximate test (a wild bootstrap). ")
            out.append(MIXED_RESAMPLING.format(moved=moved, **first))
    if correction in ("cluster-mass", "cluster-extent"):
        thr = [f"{c['name']} {'z' if c.get('scale') == 'z' else c['kind']} = "
               f"{c['threshold']:.3g}" for c in contrasts if c.get("threshold") is not None]
        has_f = any(c["kind"] == "F" for c in contrasts)
        out.append(f"Clusters were formed from points beyond a threshold equivalent to p = "
                   f"{inf.get('forming_p', '?')} ({tails} for t"
                   + ("; upper tail for F" if has_f else "") + "; " + "; ".join(thr)
                   + f"), joining {_neighbour_text(summary, inf)} neighbouring sources at the "
                   "same sample and the same source at adjacent samples.")
    elif correction == "tfce":
        tf = next((c["tfce"] for c in contrasts if c.get("tfce")), None) \
            or inf.get("tfce") or {}
        out.append(f"TFCE used the extent exponent E = {tf.get('extent_power', 0.5)}, the "
                   f"height exponent H = {tf.get('height_power', 2.0)}, "
                   + (f"{tf['steps']} height steps per map" if tf.get("steps")
                      else "the exact height integral at the data values")
                   + f" and {_neighbour_text(summary, inf)} neighbours.")
    kinds = {c["kind"] for c in contrasts}
    if "t" in kinds:
        out.append(f"t tests were {tails} at alpha = {alpha}"
                   + ("; F tests use the upper tail." if "F" in kinds else "."))
    elif kinds:
        out.append(f"F tests use the upper tail, at alpha = {alpha}.")
    return " ".join(out)


def effect_paragraph(summary, contrasts, cite) -> str:
    unit = _unit(summary) or "the maps' units"
    tc = [c["name"] for c in contrasts if c["kind"] == "t"]
    out = []
    if tc:
        glm_t = [c for c in contrasts if c["kind"] == "t" and c.get("model", "glm") == "glm"]
        mixed_t = [c for c in contrasts if c["kind"] == "t" and c.get("model") == "mixed"]
        both = bool(glm_t and mixed_t)
        how = join((["the t distribution at the residual df"
                     + (f" ({join(c['name'] for c in glm_t)})" if both else "")]
                    if glm_t else [])
                   + (["the t distribution at each point's Satterthwaite df"
                       + (f" ({join(c['name'] for c in mixed_t)})" if both else "")]
                      if mixed_t else []))
        out.append(f"Contrast estimates of the t contrasts ({join(tc)}) are reported in {unit} "
                   f"with 95% intervals from {how}.")
    by_key = {}
    for c in contrasts:
        key = effect_size_key(c, contrast_kind(_spec(summary, c), c["kind"]))
        by_key.setdefault(key, []).append(c["name"])
    for key, names in by_key.items():
        text = EFFECT_SIZE_TEXT.get(key, key)
        out.append(cite.fill(f"The standardized effect of {join(names)} is {text}."))
    out.append(f"Values at cluster peaks were selected for being large and overstate the "
               f"effect {cite('circularity')}; a cluster's extent and timing describe where "
               "the data exceeded the threshold, not the effect's exact location, onset or "
               "offset.")
    return " ".join(out)


def short_version(summary, contrasts) -> str:
    coh = summary.get("cohort", {})
    inf = summary.get("settings", {}).get("inference", {})
    win = summary.get("window", {})
    models = []
    if any(c.get("model", "glm") == "glm" for c in contrasts):
        models.append("a general linear model on participants' summary maps")
    if any(c.get("model") == "mixed" for c in contrasts):
        models.append("a linear mixed model on all maps")
    correction = inf.get("correction", "none")
    n_res = sorted({c["n_resamples"] for c in contrasts if c.get("n_resamples")})
    control = ("without correction for multiple comparisons" if correction == "none" else
               f"with the false discovery rate at {inf.get('alpha', 0.05)} within each contrast"
               if correction == "fdr" else
               f"with the family-wise error rate controlled within each contrast by "
               f"{CORRECTION_SHORT.get(correction, correction)} over "
               + join(f"{m}" for m in n_res) + " rearrangements"
               + (f" (cluster-forming p = {inf.get('forming_p')})"
                  if correction in ("cluster-mass", "cluster-extent") else "")
               + f", alpha = {inf.get('alpha', 0.05)}")
    found = []
    for c in contrasts:
        k = len(c.get("reported_clusters") or [])
        if not c.get("has_p_corrected", True):
            found.append(f"{c['name']}: {c.get('n_clusters', 0)} clusters (uncorrected)")
        else:
            found.append(f"{c['name']}: {k if k else 'no'} significant cluster"
                         f"{'' if k == 1 else 's'}")
    effects = sorted({EFFECT_SIZE_SHORT.get(k, k) for k in
                      (effect_size_key(c, contrast_kind(_spec(summary, c), c["kind"]))
                       for c in contrasts)})
    return (f"Source maps of {coh.get('participants', '?')} participants were tested at "
            f"every source and sample from {win.get('start_ms', '?'):g} to "
            f"{win.get('end_ms', '?'):g} ms by {join(models)}, {control}. "
            f"Results: {'; '.join(found)}. Standardized effects: {join(effects)}; values at "
            "cluster peaks overstate the effect.")


def effect_name(summary: dict, c: dict) -> str:
    """The short name of a contrast's standardized effect (report tables)."""
    key = effect_size_key(c, contrast_kind(_spec(summary, c), c["kind"]))
    return EFFECT_SIZE_SHORT.get(key, key)


def methods_text(summary: dict, contrasts: list) -> str:
    """Markdown: the four paragraphs, the short version and the references.

    ``summary`` is the folder's analysis summary, ``contrasts`` the
    per-contrast records (see :mod:`groupsrc.outputs.report`).
    """
    cite = _Citations()
    sections = [("Data", data_paragraph(summary, contrasts, cite)),
                ("Model", model_paragraph(summary, contrasts, cite)),
                ("Inference", inference_paragraph(summary, contrasts, cite)),
                ("Effect sizes", effect_paragraph(summary, contrasts, cite)),
                ("Short version", short_version(summary, contrasts))]
    text = "# Methods\n\n" + "".join(f"## {h}\n\n{p}\n\n" for h, p in sections if p)
    text += "## References\n\n"
    text += "\n".join(f"{i + 1}. {REFERENCES[k]}" for i, k in enumerate(cite.used)) + "\n"
    return text


def _mixed_text(summary, mixed, cite) -> str:
    """The mixed model: its terms, estimation, df, and the count of boundary fits."""
    coh = summary.get("cohort", {})
    mm = summary.get("mixed_model") or {}
    model = summary.get("settings", {}).get("model", {})
    covs = model.get("map_covariates") or []
    slopes = mm.get("random_slopes")               # as used ("auto" resolved)
    if slopes is None:
        slopes = model.get("random_slopes") if isinstance(model.get("random_slopes"), list) \
            else []
    n = mm.get("n_features") or 0
    counts = mm.get("counts", {})

    def share(key):
        return f"{100.0 * counts.get(key, 0) / max(1, n):.2g}%"

    text = (f"A linear mixed model was fitted by {mm.get('method', 'REML')} at every source "
            f"and sample to all {mm.get('n_maps', coh.get('maps', '?'))} maps of "
            f"{mm.get('n_participants', coh.get('participants', '?'))} participants "
            f"{cite('lme4')}, for the contrast(s) {join(c['name'] for c in mixed)}: fixed "
            f"effects the between-participant terms ({model.get('between', '1')}) crossed "
            "with the conditions"
            + (f" and the map covariate(s) {join(covs)}" if covs else "")
            + "; random effects a participant intercept"
            + (f" and participant slope(s) of {join(slopes)} with an unstructured "
               "covariance" if slopes else "")
            + ". Every map was used, whatever the number of maps or conditions a participant "
            "had. The standard errors are those of the fixed effects given the variance "
            "estimates; t tests used Satterthwaite degrees of freedom "
            f"{cite('satterthwaite')} from the Hessian of the REML criterion "
            f"{cite('lmertest')}")
    if any(c["kind"] == "F" for c in mixed):
        text += f", F tests the method of Fai and Cornelius {cite('fai')}"
    text += (". Because the df differ by source and sample, maps, clusters and maxima use "
             "a z of equal p: the score z, the full model's t or F with the variance "
             "components of the model without the tested effect, converted through that "
             "fit's Satterthwaite df (the same statistic as every rearrangement's, below); "
             "the full model's own z, its t or F through its own df, is written beside it "
             "(z_full_model).")
    for c in mixed:
        spec = _spec(summary, c)
        _, tested = MEANING[contrast_kind(spec, c["kind"])](spec, c)
        dfs = c.get("df_per_feature") or {}
        rng = (f", Satterthwaite df from {fmt_df(dfs['min'])} to {fmt_df(dfs['max'])} "
               f"(median {fmt_df(dfs['median'])})" if dfs else "")
        extra = [t.format(n=c[k]) for k, t in COUNT_TEXT.items() if c.get(k)]
        text += (f" {c['name']} tested {tested} ({c['kind']}{rng}"
                 + "".join(f"; {e}" for e in extra) + ").")
    text += (f" Of the {n} fits, {share('converged')} converged inside the parameter space, "
             f"{share('boundary (variance at or below zero)')} on its boundary"
             + (" (a variance of zero or a correlation of +-1, kept with the estimates of that "
                "fit; their degrees of freedom were capped at the participant-level df, N minus "
                "the rank of the participant-level design, instead of moving towards the "
                "residual df)" if slopes else
                " (a participant variance estimated at or below zero: it was not constrained "
                "to be non-negative, so that a variance near zero or a negative "
                "within-participant correlation keeps the classical error term, and balanced "
                "designs give the classical tests)")
             + f", {share('not converged')} did not converge from any of three starting "
             f"values and {share('no residual variance')} had no residual variance.")
    return text
