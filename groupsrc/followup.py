"""``groupsrc followup RESULTS_DIR``: region means per map and a mixed-model refit.

For each significant cluster of a results folder (the clusters the report
marks, every contrast or the one ``--contrast`` names, or the ``--cluster``
numbers given) and for a region of the user's (``--mask``: a NIfTI mask on
the template grid of volume results; GIfTI masks per hemisphere and/or a
CIFTI-2 dense scalar / label file on surface results, read by
:func:`load_mask`; and ``--window START STOP`` in seconds), the mean of every map over the
region's source x sample points is tabulated, one row per map, and the
analysis's model is refitted on those means with statsmodels ``MixedLM``: the
same fixed effects (the mixed model's columns, which ``groupsrc check``
prints), a random intercept per participant and the analysis's random slopes,
REML unless ``estimation = "ml"``.  Every contrast of the analysis is then
tested on the region means by the analysis's own mixed model (t or F with
Satterthwaite df, as the run's maps), except, for a cluster, the contrast that
selected it.

Written to ``RESULTS_DIR_followup`` (or ``--out``), never into the results
folder or an input:

* ``regions.tsv``      one row per region: where it came from, its size and span, and
                       whether the same test selected it (the circularity caution)
* ``region_means.tsv`` one row per map and region: participant, condition, session,
                       map covariates, participants' model columns, the mean
* ``coefficients.tsv`` one row per region and term: fixed effects and variance
                       parameters (statsmodels MixedLM: estimate, SE, Wald z, p, 95%
                       interval), contrasts (the analysis's own mixed model: estimate,
                       SE, t or F with Satterthwaite df, p, 95% t-interval); for a
                       cluster, the test of the contrast that selected it is left out
                       ("circular, not reported")
* ``followup.md``      the same, readable, with the caution

Circularity: a cluster was selected by the test of its own contrast on these
same data, so means and estimates taken from it are inflated (Kriegeskorte et
al. 2009, Nat Neurosci 12:535-540); every table row from such a region says
so.  A region of the user's carries the caution only in the text (whether it
was chosen from these data is not known here).

The inputs are read again through the analysis file the run recorded; a map,
table or the analysis file changed since the run (sha256) is a problem, so
the follow-up always describes the data the results came from.
"""

from __future__ import annotations

import json
import os
import secrets
import shutil
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .atomic import write_text
from .inputs.problems import InputError, ProblemList, closest

MARKER = ".groupsrc-followup"
CAUTION = ("estimates from a region selected by the same test are inflated (circularity; "
           "Kriegeskorte et al. 2009, Nat Neurosci 12:535-540); use them to describe the "
           "cluster, not as an effect size")
USER_NOTE = ("a region given by the user: if it was chosen by looking at these data, the "
             "same circularity caution applies")
#: the note on the test of the contrast that selected a cluster region
SELECTING_NOTE = ("circular, not reported: this contrast's test selected the region, so its "
                  "t, df and p on the region say nothing new")


@dataclass
class Region:
    name: str
    points: np.ndarray          # (n_sources, n_times) bool over the analysed window
    origin: str                 # "cluster" or "mask"
    contrast: str | None = None
    cluster: int | None = None
    circular: bool = False
    what: str = ""


# ----------------------------------------------------------------------------
# reading the results and the inputs
# ----------------------------------------------------------------------------

def _read(results: Path, problems):
    from .outputs.layout import RUN_RECORD, SUMMARY_FILE, check_results_folder, read_json
    check_results_folder(results)
    record = read_json(results / RUN_RECORD)
    summary = read_json(results / SUMMARY_FILE)
    analysis = Path(record.get("analysis_file", ""))
    if not analysis.is_file():
        problems.add(results / RUN_RECORD, f"the analysis file of this run, {analysis}, is "
                     "not there any more", "put the cohort back where it was when the run "
                     "was made (the follow-up reads the same maps)")
    return record, summary, analysis


def _unchanged(record, cohort, problems):
    """Every input file still has the sha256 the run recorded."""
    then = record.get("inputs_sha256", {})
    for path, digest in cohort.inputs.items():
        if path in then and then[path] != digest:
            problems.add(path, "changed since the run (its sha256 differs from run.json)",
                         "run 'groupsrc run' again, then follow up the new results")


def _window_samples(summary, prep):
    """Indices of the analysed window's samples in the cohort's time axis."""
    win = summary["window"]
    return slice(int(prep.time_index[0]), int(prep.time_index[0]) + int(win["n"]))


# ----------------------------------------------------------------------------
# regions
# ----------------------------------------------------------------------------

def _cluster_regions(results, summary, maps, contrast, clusters, problems):
    from .outputs.layout import read_json, read_values
    names = summary.get("contrasts", [])
    if contrast is not None and contrast not in names:
        problems.add(f"--contrast {contrast}", "is not a contrast of these results",
                     closest(contrast, names) or f"contrasts are: {', '.join(names)}")
        return []
    out = []
    for name in ([contrast] if contrast else names):
        cs = read_json(results / name / "summary.json")
        labels = read_values(maps, results / name, "clusters").astype(np.int64)
        table = pd.read_csv(results / name / "clusters.tsv", sep="\t", na_values=["n/a"],
                            keep_default_na=False)
        known = [int(k) for k in table["cluster"]] if len(table) else []
        chosen = list(clusters) if clusters else list(cs.get("reported_clusters", []))
        for k in chosen:
            if k not in known:
                problems.add(f"--cluster {k}", f"contrast {name} has no cluster {k}",
                             f"its clusters are numbered 1 to {len(known)}" if known
                             else "this contrast has no cluster")
                continue
            row = table.loc[table["cluster"] == k].iloc[0]
            p = row.get("p_corrected")
            ptxt = f", corrected p = {p:.3g}" if isinstance(p, float) and np.isfinite(p) else ""
            out.append(Region(f"{name}_cluster{k}", labels == k, "cluster", name, int(k), True,
                              f"cluster {k} of contrast {name} ({row['t_start_ms']:g} to "
                              f"{row['t_end_ms']:g} ms, {_sources(row['n_sources'])}"
                              f"{ptxt})"))
    return out


def _sources(n) -> str:
    """'1 source', '12 sources'."""
    return f"{int(n)} source{'' if int(n) == 1 else 's'}"


def _mask_region(masks, window, maps, summary, problems, notes):
    """The region of the user's: the ``--mask`` files' sources x the ``--window`` samples."""
    from .outputs.layout import times_ms
    times = times_ms(summary["window"]) / 1e3
    if window is None:
        keep_t = np.ones(times.size, bool)
    else:
        start, stop = window
        keep_t = (times >= start - 1e-9) & (times <= stop + 1e-9)
        if start >= stop or not keep_t.any():
            problems.add(f"--window {start:g} {stop:g}", f"holds no sample of the analysed "
                         f"window ({times[0]:g} to {times[-1]:g} s)",
                         "give START < STOP in seconds inside that window")
            return None
    if not masks:
        if window is not None:
            problems.add("--window", "needs --mask", "give the region as --mask FILE")
        return None
    loaded = load_mask(masks, maps.space, problems)
    if loaded is None:
        return None
    src, left_out = loaded
    notes += left_out
    t_used = times[keep_t]
    stems = list(dict.fromkeys(Path(m).name.split(".")[0] for m in masks))
    kept = f" ({'; '.join(left_out)})" if left_out else ""
    return Region(f"mask_{'+'.join(stems)}", src[:, None] & keep_t[None, :], "mask",
                  what=f"{', '.join(Path(m).name for m in masks)}, {_sources(src.sum())}"
                  f"{kept}, {t_used[0] * 1e3:g} to {t_used[-1] * 1e3:g} ms")


# ----------------------------------------------------------------------------
# reading a region of the user's: one entry, one reader per mask file format
# ----------------------------------------------------------------------------

#: file-name endings of CIFTI-2 dense files (CIFTI-2 specification, 2014, from memory);
#: read before NIfTI, whose ".nii" they also end in
CIFTI_ENDINGS = (".dscalar.nii", ".dlabel.nii", ".dtseries.nii")
SURFACE_FIX = ("give one GIfTI mask per hemisphere (REGION.left.shape.gii / "
               "REGION.right.shape.gii, one value per vertex of the results' "
               "source_space.<hemisphere>.surf.gii, nonzero = in the region) or a CIFTI-2 "
               "dense scalar or label file (REGION.dscalar.nii / REGION.dlabel.nii)")


@dataclass
class MaskPart:
    """What one mask file marks: sources of the analysis, and what it covers."""

    path: Path
    sources: np.ndarray          # (n_sources,) bool
    covers: tuple                # hemispheres / volume parts / "volume" the file marks in
    n_marked: int                # elements marked (finite, nonzero)
    unit: str = "voxels"         # what the file marks: voxels or vertices


def mask_format(path) -> str | None:
    """'nifti', 'gifti' or 'cifti' by the file name's ending; None for another."""
    name = Path(path).name.lower()
    if name.endswith(".gii"):
        return "gifti"
    if name.endswith(CIFTI_ENDINGS):
        return "cifti"
    if name.endswith((".nii", ".nii.gz")):
        return "nifti"
    return None


def load_mask(paths, space, problems):
    """(sources (n_sources,) bool, notes) of the region the mask files mark together.

    A mask marks with a finite nonzero value (label files: a nonzero key).
    Each file is read by its format (:func:`mask_format`): a 3D NIfTI on a
    volume grid; on a surface, GIfTI files of one hemisphere each and CIFTI-2
    dense files (either, or both).  Two files may not both mark in one
    hemisphere / structure (one file per hemisphere).  Marked elements that are
    not sources (outside the results' source mask) are left out with a note;
    a file marking no source is a problem.  None when any file is a problem
    (every one reported).
    """
    readers = {"nifti": _nifti_mask, "gifti": _gifti_mask, "cifti": _cifti_mask}
    parts, bad = [], False
    seen = {}
    for path in map(Path, paths):
        if path.resolve() in seen:
            problems.add(f"--mask {path}", "is given twice", "give each file once")
            bad = True
            continue
        seen[path.resolve()] = path
        fmt = mask_format(path)
        if not path.exists():
            problems.add(path, "mask file not found", "check the path")
            bad = True
            continue
        if fmt is None:
            problems.add(f"--mask {path}", "is not a mask file followup reads (expected .nii / "
                         ".nii.gz, .gii, or a CIFTI-2 .dscalar.nii / .dlabel.nii)",
                         "give the region in one of those formats")
            bad = True
            continue
        part = readers[fmt](path, space, problems)
        bad |= part is None
        parts += [part] if part is not None else []
    for a_i, a in enumerate(parts):
        for b in parts[a_i + 1:]:
            both = [c for c in a.covers if c in b.covers]
            if both:
                problems.add(f"--mask {b.path}", f"gives {', '.join(both)} again, as "
                             f"{a.path} does", "give each hemisphere or structure in one file")
                bad = True
    for p in parts:
        if p.n_marked and not p.sources.any():
            problems.add(p.path, f"marks {p.n_marked} {p.unit}, none of them a source of the "
                         "analysis (all outside the results' source mask)",
                         "mark sources inside the results' " + _source_mask_name(space))
            bad = True
    if bad:
        return None
    notes = [f"{p.path.name}: {p.n_marked - int(p.sources.sum())} marked {p.unit} are not "
             "sources of the analysis and were left out" for p in parts
             if p.n_marked > p.sources.sum()]
    return np.logical_or.reduce([p.sources for p in parts]), notes


def _source_mask_name(space) -> str:
    if space.kind == "volume":
        return "source_mask.nii.gz"
    return " / ".join(f"source_mask.{h}.shape.gii" for h in space.names)


def _marked(values) -> np.ndarray:
    values = np.asarray(values, np.float64)
    return np.isfinite(values) & (values != 0)


def _nifti_mask(path, grid, problems):
    """A 3D NIfTI mask on the template grid of volume results."""
    from .formats.nifti import DecodeError, affine_difference, read_mask
    if grid.kind != "volume":
        problems.add(f"--mask {path}", f"is read as a NIfTI volume mask (by its name); these "
                     f"results are on a {grid.kind} source space", SURFACE_FIX)
        return None
    try:
        vol, affine = read_mask(path)
    except FileNotFoundError:
        problems.add(path, "mask file not found", "check the path")
        return None
    except (DecodeError, ValueError) as exc:
        problems.add(path, str(exc), "give a 3D NIfTI mask on the template grid")
        return None
    if vol.shape != grid.mask.shape or not np.allclose(affine, grid.affine, atol=1e-3):
        how = (f"shape {vol.shape} differs from the template's {grid.mask.shape}"
               if vol.shape != grid.mask.shape else
               f"affine differs from the template: {affine_difference(affine, grid.affine)}")
        problems.add(path, how, "give a mask on the results' template grid "
                     "(source_mask.nii.gz in the results folder is one)")
        return None
    src = grid.from_volume(vol.astype(bool))
    if not src.any():
        problems.add(path, "holds no source of the analysis", "mark sources inside the "
                     "results' source_mask.nii.gz")
        return None
    return MaskPart(path, src, ("volume",), int(vol.sum()))


def _not_volume(path, space, problems, what) -> bool:
    if space.kind == "volume":
        problems.add(f"--mask {path}", f"is {what}; these results are on a volume grid",
                     "give a 3D NIfTI mask on the template grid (source_mask.nii.gz in the "
                     "results folder is one, with your sources marked)")
        return False
    return True


def _gifti_mask(path, space, problems):
    """One hemisphere's GIfTI mask (shape, func or label file, one array) on a surface."""
    from .formats import gifti
    if not _not_volume(path, space, problems, "a GIfTI surface file"):
        return None
    try:
        values, structure = gifti.read_vertex_values(path, one_array=True)
    except FileNotFoundError:
        problems.add(path, "mask file not found", "check the path")
        return None
    except ValueError as exc:
        problems.add(path, str(exc), SURFACE_FIX)
        return None
    hemi = _hemisphere(path, structure, problems)
    if hemi is None:
        return None
    if hemi not in space.names:
        problems.add(path, f"is a mask of the {hemi} hemisphere; these results have no {hemi} "
                     "hemisphere", f"give masks of the {' and '.join(space.names)} only")
        return None
    h = space.hemisphere(hemi)
    if values.size != h.n_vertices:
        other = [o.name for o in space.hemispheres if o.name != hemi
                 and o.n_vertices == values.size]
        hint = (f" (the {other[0]} mesh's count: is it that hemisphere's mask?)"
                if other else "")
        problems.add(path, f"has {values.size} values; the results' {hemi} mesh has "
                     f"{h.n_vertices} vertices{hint}", f"give one value per vertex of "
                     f"source_space.{hemi}.surf.gii in the results folder (source_mask.{hemi}"
                     ".shape.gii there is one, with your vertices marked)")
        return None
    marked = _marked(values)
    if not marked.any():
        problems.add(path, "marks no vertex (every value is 0 or not finite)",
                     "mark the region with nonzero values")
        return None
    src = np.zeros(space.n_sources, bool)
    src[space.source_slice(hemi)] = marked[h.sources]
    return MaskPart(path, src, (f"the {hemi} hemisphere",), int(marked.sum()), "vertices")


def _hemisphere(path, structure, problems) -> str | None:
    """The hemisphere of a GIfTI mask: its AnatomicalStructurePrimary metadata, else a
    '.left.' / '.right.' part of its file name; a problem when neither or they differ."""
    from .sources.surface import HEMISPHERES
    named = [h for h in HEMISPHERES if h in Path(path).name.lower().split(".")]
    if structure is not None and named and named != [structure]:
        problems.add(path, f"its metadata (AnatomicalStructurePrimary) says {structure} "
                     f"but its name says {' and '.join(named)}",
                     "rename the file or correct its metadata")
        return None
    if structure is not None:
        return structure
    if len(named) == 1:
        return named[0]
    problems.add(path, "does not say which hemisphere it is on (no AnatomicalStructurePrimary "
                 "CortexLeft / CortexRight in its metadata, and "
                 + ("both 'left' and 'right'" if named else "no '.left.' or '.right.'")
                 + " in its name)", "name it REGION.left.shape.gii or REGION.right.shape.gii")
    return None


def _cifti_mask(path, space, problems):
    """A CIFTI-2 dense scalar / label file (one map) on the results' meshes and volume."""
    from .formats import cifti
    if not _not_volume(path, space, problems, "a CIFTI-2 file"):
        return None
    try:
        header = cifti.read_header(path, rows="any")
        if header.n_times != 1:
            problems.add(path, f"holds {header.n_times} maps (rows)", "keep the one map of "
                         "the region (a mask holds one)")
            return None
        if not _cifti_geometry(header, space, problems):
            return None
        data = cifti.read_data(header, np.float64)
    except FileNotFoundError:
        problems.add(path, "mask file not found", "check the path")
        return None
    except ValueError as exc:   # DecodeError is one
        problems.add(path, str(exc), SURFACE_FIX)
        return None
    src = np.zeros(space.n_sources, bool)
    n_marked, covers = 0, []
    for hemi in header.parts:
        marked = _marked(data[hemi][:, 0])
        n_marked += int(marked.sum())
        covers += [f"the {hemi} hemisphere"] if marked.any() else []
        if hemi in space.names:
            src[space.source_slice(hemi)] = marked[space.hemisphere(hemi).sources]
    vox = space.voxels
    for name, ijk in header.voxels.items():
        marked = _marked(data[name][:, 0])
        n_marked += int(marked.sum())
        covers += [name] if marked.any() else []
        if vox is None or name not in vox.names:
            continue
        where = np.full(vox.shape, -1, np.int64)
        own = vox.part_slice(name)
        where[tuple(vox.ijk[own].T)] = np.arange(own.start, own.stop)
        at = where[tuple(ijk[marked].T)]
        src[space.voxel_slice.start + at[at >= 0]] = True
    if not n_marked:
        problems.add(path, "marks nothing (every value is 0 or not finite)",
                     "mark the region with nonzero values")
        return None
    return MaskPart(path, src, tuple(covers), n_marked, "vertices or voxels" if header.voxels
                    else "vertices")


def _cifti_geometry(header, space, problems) -> bool:
    """The file's surfaces have the results' vertex counts, its volume their volume."""
    from .formats import cifti
    ok = True
    for hemi, (n, _) in header.parts.items():
        if hemi in space.names and n != space.hemisphere(hemi).n_vertices:
            problems.add(header.path, f"its {cifti.STRUCTURES[hemi]} has {n} vertices; "
                         f"the results' {hemi} mesh has "
                         f"{space.hemisphere(hemi).n_vertices}", "give a mask on the results' "
                         "meshes (the brain models of the analysed maps)")
            ok = False
    vox = space.voxels
    if header.voxels and vox is not None and (
            tuple(header.volume_shape) != tuple(vox.shape)
            or not np.allclose(header.volume_affine, vox.affine, atol=1e-3)):
        problems.add(header.path, f"its volume parts lie in a volume of shape "
                     f"{tuple(header.volume_shape)} that is not the results' "
                     f"{tuple(vox.shape)} (or has another affine)", "give a mask on the "
                     "brain models of the analysed maps")
        ok = False
    return ok


# ----------------------------------------------------------------------------
# the table and the refit
# ----------------------------------------------------------------------------

def region_means(Y, samples, regions, units=None) -> np.ndarray:
    """(n_maps, n_regions): each map's mean over each region's points, in the input's
    units when the stored maps' ``units`` are given (``scale * mean + mean offset``)."""
    out = np.empty((Y.shape[0], len(regions)))
    for k in range(Y.shape[0]):
        block = np.asarray(Y[k, :, samples], np.float64)
        for j, r in enumerate(regions):
            out[k, j] = block[r.points].mean()
    if units is not None and units.level_rows is not None:
        level = units.level(slice(None), samples)
        out = out * units.scale + units.scale * np.array([level[r.points].mean()
                                                          for r in regions])[None, :]
    return out


def _map_columns(prep):
    """The maps-table columns that describe each map, and the participants' model columns."""
    from .inputs.tables import model_columns
    s = prep.settings
    maps = prep.cohort.maps
    cols = ["participant_id"] + [c for c in (s.model.get("within"), "session")
                                 if c and c in maps.columns]
    cols += [c for c in s.model.get("map_covariates") or [] if c in maps.columns]
    frame = maps[cols].copy()
    parts = prep.cohort.participants
    for c in model_columns(s):
        if c in parts.columns and c not in frame.columns:
            frame[c] = parts.loc[maps["participant_id"], c].to_numpy()
    return frame


def refit(values, mdesign, reml, contrasts):
    """statsmodels MixedLM on one region's means: (rows, note)."""
    from statsmodels.regression.mixed_linear_model import MixedLM
    X, Z = mdesign.X, pd.DataFrame(mdesign.Z, columns=mdesign.z_names)
    groups = np.asarray(mdesign.participants)[mdesign.groups]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            fit = MixedLM(values, X.reset_index(drop=True), groups, exog_re=Z).fit(reml=reml)
        except (np.linalg.LinAlgError, ValueError) as exc:
            return [], f"the refit failed: {exc}"
    note = "; ".join(sorted({str(w.message).splitlines()[0] for w in caught}))
    rows = []
    ci = np.asarray(fit.conf_int())
    for j, term in enumerate(X.columns):
        rows.append({"term": term, "kind": "fixed", "estimate": fit.fe_params.iloc[j],
                     "std_error": fit.bse_fe.iloc[j], "z": fit.tvalues.iloc[j],
                     "p": fit.pvalues.iloc[j], "ci_low": ci[j, 0], "ci_high": ci[j, 1]})
    cov = np.asarray(fit.cov_re)
    names = list(mdesign.z_names)
    for a in range(len(names)):
        for b in range(a + 1):
            term = (f"variance of participant {names[a]}" if a == b
                    else f"covariance of participant {names[b]} and {names[a]}")
            rows.append({"term": term, "kind": "variance", "estimate": cov[a, b]})
    rows.append({"term": "residual variance", "kind": "variance", "estimate": fit.scale})
    for name, L in contrasts:
        rows.append({"term": f"contrast {name}" + (" (F)" if np.ndim(L) == 2 and
                                                    np.shape(L)[0] > 1 else ""),
                     "kind": "contrast", "contrast": name,
                     **_contrast_test(values, mdesign, reml, L)})
    return rows, note


def _contrast_test(values, mdesign, reml, L) -> dict:
    """The contrast on the region means by the analysis's own mixed model (REML or ML,
    Satterthwaite df; F by Fai and Cornelius): estimate, SE, t (or F), df, p and the
    95% t-interval at that df."""
    from scipy import stats as sps
    from .stats.models.mixed.fit import fit_features
    from .stats.models.mixed.inference import contrast_statistics
    from .stats.models.mixed.model import MixedCore
    y = np.asarray(values, np.float64)[:, None]
    fit = fit_features(MixedCore(mdesign.stats_design()), y, reml=reml)
    cs = contrast_statistics(fit, y, np.atleast_2d(np.asarray(L, float)))
    df = float(cs.df[0])
    if cs.k > 1:
        return {"F": float(cs.statistic[0]), "df": df, "df1": cs.k, "p": float(cs.p[0])}
    est, se = float(cs.estimate[0]), float(cs.se[0])
    q = float(sps.t.ppf(0.975, df)) if np.isfinite(df) and df > 0 else np.nan
    return {"estimate": est, "std_error": se, "t": float(cs.statistic[0]), "df": df,
            "p": float(cs.p[0]), "ci_low": est - q * se, "ci_high": est + q * se}


def _contrast_weights(prep, mdesign):
    """Every contrast of the analysis over the mixed model's columns (its meaning kept)."""
    from .inputs.mixed_design import plan_mixed_contrast
    out = []
    for spec in prep.settings.contrasts:
        plan = plan_mixed_contrast(spec, prep.design, mdesign, ProblemList(), "")
        if plan is not None:
            out.append((spec.name, plan.weights))
    return out


# ----------------------------------------------------------------------------
# the command
# ----------------------------------------------------------------------------

def followup(results, *, contrast=None, clusters=None, mask=None, window=None, out=None,
             overwrite=False, notes=None) -> Path:
    """Write the follow-up tables of a results folder; return the folder written.

    ``mask``: one mask file or a list of them, read together as one region
    (:func:`load_mask`); ``notes``: a list that receives what the user should
    know (marked elements left out of the region).
    """
    masks = [] if mask is None else [mask] if isinstance(mask, (str, os.PathLike)) \
        else list(mask)
    notes = [] if notes is None else notes
    from .inputs.mixed_design import build_mixed_design
    from .inputs.settings import parse_settings
    from .outputs.layout import open_maps
    from .pipeline import prepare
    results = Path(results)
    problems = ProblemList()
    record, summary, analysis = _read(results, problems)
    if problems:
        raise InputError(problems)
    if clusters and not contrast:
        problems.add("--cluster", "needs --contrast", "name the contrast the cluster belongs to")
        raise InputError(problems)
    prep = prepare(parse_settings(analysis))
    _unchanged(record, prep.cohort, problems)
    mdesign = prep.mixed or build_mixed_design(prep.settings, prep.design, prep.cohort.maps,
                                               problems, f"{analysis} [model]")
    maps = open_maps(results, summary)
    regions = [] if (masks and not clusters and not contrast) else \
        _cluster_regions(results, summary, maps, contrast, clusters, problems)
    user = _mask_region(masks, window, maps, summary, problems, notes)
    regions += [user] if user is not None else []
    if not regions and not problems:
        problems.add(results, "no significant cluster to follow up",
                     "name one with --contrast NAME --cluster K, or give a region with "
                     "--mask FILE [--window START STOP]")
    target = _target(results, out, overwrite, prep.cohort.inputs, problems)
    if problems:
        raise InputError(problems)
    samples = _window_samples(summary, prep)
    means = region_means(prep.cohort.Y, samples, regions, prep.cohort.units)
    reml = prep.settings.model.get("estimation", "reml") == "reml"
    tables = _tables(prep, regions, means, mdesign, reml, _contrast_weights(prep, mdesign))
    return _write(target, tables, _markdown(tables, regions, results, reml), results)


def _tables(prep, regions, means, mdesign, reml, contrasts):
    info = _map_columns(prep)
    mean_rows, coef_rows, region_rows = [], [], []
    for j, r in enumerate(regions):
        frame = info.copy()
        frame.insert(0, "region", r.name)
        frame["value"] = means[:, j]
        mean_rows.append(frame)
        rows, note = refit(means[:, j], mdesign, reml, contrasts)
        for row in rows:
            selecting = r.circular and row.pop("contrast", None) == r.contrast
            row.pop("contrast", None)
            if selecting:            # the test that chose the region: its result is circular
                row.update({k: np.nan for k in ("t", "F", "df", "df1", "p")})
            coef_rows.append({"region": r.name, **row, "circular": "yes" if r.circular else "no",
                              "note": SELECTING_NOTE if selecting else "n/a"})
        src, smp = np.flatnonzero(r.points.any(axis=1)), np.flatnonzero(r.points.any(axis=0))
        region_rows.append({"region": r.name, "origin": r.origin, "contrast": r.contrast,
                            "cluster": r.cluster, "description": r.what,
                            "n_sources": int(src.size), "n_samples": int(smp.size),
                            "n_points": int(r.points.sum()),
                            "circular": "yes" if r.circular else "no",
                            "caution": CAUTION if r.circular else USER_NOTE,
                            "fit_note": note or "n/a"})
    coef_cols = ["region", "term", "kind", "estimate", "std_error", "z", "t", "F", "df", "df1",
                 "p", "ci_low", "ci_high", "circular", "note"]
    return {"regions.tsv": pd.DataFrame(region_rows),
            "region_means.tsv": pd.concat(mean_rows, ignore_index=True),
            "coefficients.tsv": pd.DataFrame(coef_rows).reindex(columns=coef_cols)}


def _markdown(tables, regions, results, reml) -> str:
    lines = ["# Follow-up of " + str(results), ""]
    if any(r.circular for r in regions):
        lines += [f"**Caution:** the clusters were selected by the same test on these data; "
                  f"{CAUTION}.", ""]
    coefs = tables["coefficients.tsv"]
    for r, row in zip(regions, tables["regions.tsv"].to_dict("records")):
        lines += [f"## {r.name}", "", f"{r.what}; {row['n_points']} source x sample points."
                  + ("" if r.circular else f" Note: {USER_NOTE}."), "",
                  f"The region mean of every map, refitted with the analysis's fixed and "
                  f"random effects ({'REML' if reml else 'ML'}): fixed effects and variances "
                  "by statsmodels MixedLM (Wald z); the contrasts by the analysis's own mixed "
                  "model (t or F with Satterthwaite df). Intervals are 95%.", "",
                  "| term | estimate [95% CI] | std. error | test | p |",
                  "|---|---|---|---|---|"]
        for c in coefs[coefs.region == r.name].to_dict("records"):
            lines.append(f"| {c['term']} | {_est_ci(c)} | {_num(c.get('std_error'))} | "
                         f"{_test_text(c)} | {_p_text(c)} |")
        if row["fit_note"] != "n/a":
            lines += ["", f"statsmodels said: {row['fit_note']}"]
        lines.append("")
    return "\n".join(lines) + "\n"


def _num(v, digits=4) -> str:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return ""
    return f"{v:.{digits}g}" if np.isfinite(v) else ""


def _est_ci(c) -> str:
    est, lo, hi = _num(c.get("estimate")), _num(c.get("ci_low")), _num(c.get("ci_high"))
    return f"{est} [{lo}, {hi}]" if est and lo and hi else est


def _test_text(c) -> str:
    if c.get("note", "n/a") == SELECTING_NOTE:
        return "circular, not reported"
    if _num(c.get("t")):
        return f"t({_num(c.get('df'), 3)}) = {_num(c.get('t'), 3)}"
    if _num(c.get("F")):
        return f"F({_num(c.get('df1'), 3)}, {_num(c.get('df'), 3)}) = {_num(c.get('F'), 3)}"
    if _num(c.get("z")):
        return f"z = {_num(c.get('z'), 3)}"
    return ""


def _p_text(c) -> str:
    if c.get("note", "n/a") == SELECTING_NOTE:
        return "circular, not reported"
    return _num(c.get("p"), 3)


def _target(results, out, overwrite, inputs, problems) -> Path | None:
    """The folder to write: new or empty, or (``--overwrite``) one a follow-up wrote;
    never the results folder, inside it, or an input."""
    target = Path(out) if out is not None else results.parent / (results.name + "_followup")
    t = target.resolve()
    r = results.resolve()
    if t == r or r in t.parents or t in r.parents:
        problems.add(target, "is, holds or sits inside the results folder",
                     "choose another --out (the results folder stays as groupsrc wrote it)")
        return None
    for p in inputs:
        p = Path(p).resolve()
        if p == t or t in p.parents:
            problems.add(target, f"is or holds an input ({p})", "choose another --out")
            return None
    if target.exists() and (not target.is_dir() or any(target.iterdir())):
        if not (target / MARKER).is_file():
            problems.add(target, "exists and was not written by 'groupsrc followup'; nothing "
                         "was changed", "choose another --out")
        elif not overwrite:
            problems.add(target, "holds an earlier follow-up", "add --overwrite to replace it")
    return target


def _write(target: Path, tables, markdown, results) -> Path:
    """Every file into a hidden sibling, then swapped into place (an earlier follow-up
    is replaced only after the new one is complete)."""
    from .outputs.files import write_tsv
    staging = target.parent / f".{target.name}.followup-staging-{secrets.token_hex(4)}"
    staging.mkdir(parents=True)
    try:
        for name, frame in tables.items():
            write_tsv(staging / name, frame)
        write_text(staging / "followup.md", markdown)
        write_text(staging / MARKER, json.dumps({"results": str(results.resolve())}) + "\n")
        if target.exists():
            old = target.parent / f".{target.name}.followup-old-{secrets.token_hex(4)}"
            os.replace(target, old)
            os.replace(staging, target)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(staging, target)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return target
