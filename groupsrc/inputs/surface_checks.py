"""The per-file checks of a surface cohort: meshes, masks, atlas, map headers, time axes
(the CIFTI-2 brain-model checks are in :mod:`.cifti_checks`).

Used by :mod:`.surface_cohort` (which decodes and assembles the cohort); see
its docstring for the inputs and the list of checks.  Every function adds
its problems to a :class:`~groupsrc.inputs.problems.ProblemList` and carries
on, so that every problem is reported at once.
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .. import formats
from ..formats import gifti
from ..sources import TimeAxis
from ..sources.surface import HEMISPHERES, mesh_defects
from .tables import MISSING, map_path, real_path

FIX_MESH = ("give a closed, manifold mesh (e.g. the hemisphere's white or pial surface with "
            "the medial wall kept; exclude the medial wall with mask_left / mask_right), or "
            "set mesh_closed = false under [cohort] for a mesh with a cut")


def _majority(values):
    """The most common value (first seen on ties)."""
    counts = Counter(values)
    return max(counts, key=lambda v: (counts[v], -values.index(v)))


@dataclass
class _Mesh:
    name: str
    path: Path
    vertices: np.ndarray
    triangles: np.ndarray

    @property
    def n(self) -> int:
        return int(self.vertices.shape[0])


# ----------------------------------------------------------------------------
# template meshes, masks, atlas
# ----------------------------------------------------------------------------

def read_meshes(settings, problems) -> dict:
    """{hemisphere: _Mesh} for every mesh that reads and passes the checks."""
    closed = bool(settings.cohort.get("mesh_closed", True))
    out = {}
    for hemi in HEMISPHERES:
        path = settings.resolve(settings.cohort.get(f"mesh_{hemi}"))
        if path is None:
            continue
        where = f"{path} (mesh_{hemi})"
        try:
            v, t, structure = gifti.read_mesh(path)
        except FileNotFoundError:
            problems.add(where, "mesh file not found", "check the path (relative to the "
                         "analysis file)")
            continue
        except ValueError as exc:
            problems.add(where, str(exc), "give the hemisphere's template surface as GIfTI "
                         "(coordinates and triangles)")
            continue
        if structure is not None and structure != hemi:
            problems.add(where, f"the file marks itself as the {structure} hemisphere "
                         f"(AnatomicalStructurePrimary) but is given as mesh_{hemi}",
                         "swap mesh_left and mesh_right, or give the right file")
            continue
        defects = mesh_defects(v.shape[0], t, closed=closed)
        for d in defects:
            problems.add(where, d, FIX_MESH)
        extent = mesh_extent_problem(v)
        if extent:
            problems.add(where, *extent)
        if not defects and not extent:
            out[hemi] = _Mesh(hemi, path, v, t)
    return out


#: the largest side of a brain surface's bounding box, in mm, lies in this range: about
#: 170 mm for a human hemisphere, 200 mm for a sphere-inflated one, some 15 mm for a
#: rodent's cortex (common practice); metres or micrometres fall far outside
PLAUSIBLE_EXTENT_MM = (5.0, 1000.0)


def mesh_extent_problem(vertices):
    """(what, fix) when a mesh's coordinates cannot be millimetres, else None."""
    v = np.asarray(vertices, dtype=np.float64)
    if v.size == 0:
        return None
    if not np.all(np.isfinite(v)):
        return ("its coordinates hold NaN or infinite values",
                "write the mesh with finite coordinates in mm")
    side = float(np.max(np.ptp(v, axis=0)))
    lo, hi = PLAUSIBLE_EXTENT_MM
    if lo <= side <= hi:
        return None
    unit = ""
    if side > hi:
        unit = (" (they look like micrometres: divide them by 1000)" if 1e3 * lo <= side <= 1e3 * hi
                else "")
    elif 1e-3 * lo <= side <= 1e-3 * hi:
        unit = " (they look like metres: multiply them by 1000)"
    elif 1e-1 * lo <= side <= 1e-1 * hi:
        unit = " (they may be centimetres: multiply them by 10)"
    return (f"its coordinates span {side:.4g} units at most, implausible for a brain surface "
            f"in mm (expected {lo:g} to {hi:g} mm){unit}",
            "write the mesh's coordinates in millimetres; cluster tables and figures report "
            "them as mm")


def _vertex_file(settings, key, meshes, problems, reader, kind):
    """Read one per-vertex file (mask or atlas) of a hemisphere; None on a problem."""
    hemi = key.rsplit("_", 1)[1]
    path = settings.resolve(settings.cohort.get(key))
    if path is None or hemi not in meshes:
        return None, path
    where = f"{path} ({key})"
    try:
        result = reader(path)
    except FileNotFoundError:
        problems.add(where, f"{kind} file not found", f"check the path, or leave {key} out")
        return None, path
    except ValueError as exc:
        problems.add(where, str(exc), f"give a GIfTI {kind} file with one value per vertex")
        return None, path
    values, structure = result[0], result[-1]
    if structure is not None and structure != hemi:
        problems.add(where, f"the file marks itself as the {structure} hemisphere but is "
                     f"given as {key}", f"give the {hemi} hemisphere's {kind}")
        return None, path
    if values.shape[0] != meshes[hemi].n:
        problems.add(where, f"has {values.shape[0]} values; mesh_{hemi} has "
                     f"{meshes[hemi].n} vertices", f"give a {kind} on the template mesh")
        return None, path
    return result, path


def read_masks(settings, meshes, problems) -> dict:
    """{hemisphere: bool (V,)} of the masks given (nonzero and finite = source)."""
    out = {}
    for hemi in meshes:
        result, path = _vertex_file(settings, f"mask_{hemi}", meshes, problems,
                                    gifti.read_vertex_values, "mask")
        if result is None:
            continue
        mask = np.isfinite(result[0]) & (result[0] != 0)
        if not mask.any():
            problems.add(f"{path} (mask_{hemi})", "mask is empty",
                         "mark the sources with nonzero values")
            continue
        out[hemi] = mask
    return out


def read_atlas(settings, meshes, problems):
    """{"labels": {hemisphere: (V,) int}, "names": {key: name}, "paths": [...]} or None."""
    keys = [f"atlas_{h}" for h in meshes if settings.cohort.get(f"atlas_{h}") is not None]
    if not keys:
        return None
    labels, names, paths, ok = {}, {}, [], True
    for key in keys:
        result, path = _vertex_file(settings, key, meshes, problems, gifti.read_label_file,
                                    "label")
        if result is None:
            ok = False
            continue
        values, table, _ = result
        paths.append(path)
        unknown = sorted(set(np.unique(values).tolist()) - set(table) - {0})
        if unknown:
            problems.add(f"{path} ({key})", f"labels {unknown[:10]} occur in the file but not "
                         "in its label table", "add them to the label table (0 means unlabelled)")
            ok = False
        for k, name in table.items():
            if k in names and names[k] != name:
                problems.add(f"{path} ({key})", f"label {k} is '{name}' here but '{names[k]}' "
                             "in the other hemisphere's file",
                             "use one label table for both hemispheres")
                ok = False
            names.setdefault(k, name)
        labels[key.rsplit("_", 1)[1]] = values
    return {"labels": labels, "names": names, "paths": paths} if ok else None


# ----------------------------------------------------------------------------
# map headers
# ----------------------------------------------------------------------------

def _read(p, where, problems, want):
    """A map header of format ``want`` ("gifti" / "cifti"), or None with a problem."""
    try:
        h = formats.read_header(p)
    except FileNotFoundError:
        problems.add(where, "map file not found", "paths are relative to the folder of the "
                     "maps table")
        return None
    except ValueError as exc:
        problems.add(where, str(exc), "give a GIfTI map per hemisphere (.func.gii) in "
                     "path_left / path_right, or a CIFTI-2 dense time series (.dtseries.nii) "
                     "in path")
        return None
    fmt = getattr(h, "format", "nifti")
    if fmt != want:
        what = {"nifti": "a NIfTI volume", "gifti": "a GIfTI file (one hemisphere)",
                "cifti": "a CIFTI-2 file (both hemispheres)"}[fmt]
        fix = ("name each hemisphere's GIfTI file in path_left / path_right"
               if fmt == "gifti" else "name CIFTI-2 files in a 'path' column"
               if fmt == "cifti" else "a surface analysis reads GIfTI or CIFTI-2 maps; "
               "for volumes leave mesh_left / mesh_right out")
        problems.add(where, f"is {what}, not what this column holds", fix)
        return None
    return h


def gifti_headers(maps, mpath, meshes, problems):
    """{(line, hemisphere): GiftiHeader} of files fit to read; problems for the others."""
    headers = {}
    for line in maps.index:
        row = {}
        for hemi in meshes:
            col = f"path_{hemi}"
            rel = maps.at[line, col]
            where = f"{mpath} row {line} column '{col}'"
            if rel in MISSING:
                problems.add(where, "empty path", f"give the {hemi} hemisphere's map file, "
                             "relative to the maps table")
                continue
            p = map_path(mpath, rel)
            h = _read(p, f"{where} ({p})", problems, "gifti")
            if h is not None:
                row[hemi] = h
        for hemi in _check_row_vertices(row, line, mpath, meshes, problems):
            headers[(line, hemi)] = row[hemi]
    return headers


def _check_row_vertices(row, line, mpath, meshes, problems) -> list:
    """Vertex counts and hemisphere marks of one row's files, with a swap hint;
    returns the hemispheres whose file fits its mesh."""
    where = f"{mpath} row {line}"
    if len(row) == 2:
        left, right = row["left"], row["right"]
        by_count = (meshes["left"].n != meshes["right"].n and left.n_vertices == meshes["right"].n
                    and right.n_vertices == meshes["left"].n)
        by_mark = left.structure == "right" and right.structure == "left"
        if by_count or by_mark:
            why = (f"path_left has {left.n_vertices} values, as the right mesh, and path_right "
                   f"{right.n_vertices}, as the left mesh" if by_count else
                   "path_left is marked as the right hemisphere and path_right as the left "
                   "(AnatomicalStructurePrimary)")
            problems.add(f"{where} ({left.path.name}, {right.path.name})",
                         f"the hemispheres look swapped: {why}",
                         "swap the two files in this row")
            return []
    fit = []
    for hemi, h in row.items():
        col = f"path_{hemi}"
        if h.n_vertices != meshes[hemi].n:
            other = [o for o in meshes if o != hemi and meshes[o].n == h.n_vertices]
            hint = (f"; that is the {other[0]} mesh's count: is this the {other[0]} "
                    "hemisphere's file?" if other else _transposed_hint(h, meshes[hemi].n))
            problems.add(f"{where} column '{col}' ({h.path})",
                         f"has {h.n_vertices} values per sample; mesh_{hemi} has "
                         f"{meshes[hemi].n} vertices{hint}",
                         "map every participant onto the template mesh")
        elif h.structure not in (None, hemi):
            problems.add(f"{where} column '{col}' ({h.path})",
                         f"the file marks itself as the {h.structure} hemisphere "
                         "(AnatomicalStructurePrimary)", f"give the {hemi} hemisphere's file")
        else:
            fit.append(hemi)
    return fit


def _transposed_hint(h, n_mesh) -> str:
    """A hint when a map's samples axis has the mesh's vertex count: its array is the
    wrong way round."""
    if h.n_times != n_mesh:
        return ""
    if h.layout == "matrix":
        return (f"; its one data array is {h.n_vertices} x {h.n_times}: it looks transposed "
                "(samples x vertices): write it as vertices x samples, one row per vertex")
    return (f"; it holds {h.n_times} data arrays of {h.n_vertices} values: one array per "
            "vertex instead of one per sample (transposed): write one array per sample, each "
            "with one value per vertex")


def _times(settings, headers, mpath, problems):
    """The shared time axis; problems for files whose samples (or axis) differ."""
    t0, dt = settings.cohort.get("time_start"), settings.cohort.get("sampling_interval")
    if not headers:
        return None
    counts = {k: h.n_times for k, h in headers.items()}
    # one row's two hemispheres first: "time axes differ" named for the row
    for line in sorted({k[0] for k in headers}):
        row = {k[1]: counts[k] for k in counts if k[0] == line}
        if len(set(row.values())) > 1:
            problems.add(f"{mpath} row {line}", "the hemispheres' files have different numbers "
                         f"of samples ({', '.join(f'{h} {n}' for h, n in row.items())})",
                         "write both hemispheres of a map with the same samples")
            for h in list(row):
                headers.pop((line, h))
    if not headers:
        return None
    axes = {k: h.time_axis if h.time_axis is not None else TimeAxis(0.0, 1.0, h.n_times)
            for k, h in headers.items()}
    axes = {k: TimeAxis(float(t0) if t0 is not None else a.t0,
                        float(dt) if dt is not None else a.dt, a.n) for k, a in axes.items()}
    keys = list(axes)
    sig = [(a.n, round(a.t0, 9), round(a.dt, 9)) for a in axes.values()]
    ref = axes[keys[sig.index(_majority(sig))]]
    for k in keys:
        a = axes[k]
        if not a.close_to(ref):
            h = headers.pop(k)
            what = (f"has {a.n} samples; most maps have {ref.n}" if a.n != ref.n else
                    f"time axis ({a.n} samples from {a.t0 * 1e3:.4g} ms every "
                    f"{a.dt * 1e3:.4g} ms) differs from most maps' ({ref.t0 * 1e3:.4g} ms "
                    f"every {ref.dt * 1e3:.4g} ms)")
            col = f" column 'path_{k[1]}'" if k[1] else ""
            problems.add(f"{mpath} row {k[0]}{col} ({h.path})", what,
                         "crop or resample every map to the same samples")
    return ref


def _check_time(settings, ref, fmt, problems, headers=None):
    """GIfTI maps need time_start and sampling_interval unless every file states its time
    axis in its metadata (``headers``); every axis needs finite values."""
    where = f"{settings.path} [cohort]"
    if fmt == "gifti":
        missing = [k for k in ("time_start", "sampling_interval")
                   if settings.cohort.get(k) is None]
        stated = bool(headers) and all(h.time_axis is not None for h in headers.values())
        if missing and not stated:
            problems.add(where, f"{' and '.join(missing)} required: GIfTI maps carry no time "
                         "axis (and these state none in their metadata time_start_s and "
                         "sampling_interval_s)",
                         "add e.g. time_start = -0.1 and sampling_interval = 0.004 "
                         "(seconds) under [cohort]")
            return None
    if ref is None:
        return None
    if not (math.isfinite(ref.dt) and ref.dt > 0) or not math.isfinite(ref.t0):
        problems.add(where, f"the maps' time axis ({ref.t0} s every {ref.dt} s) is not usable",
                     "give time_start and sampling_interval under [cohort]")
        return None
    return ref


# ----------------------------------------------------------------------------
# files used twice
# ----------------------------------------------------------------------------

def check_same_files(entries, mpath, digests, problems):
    """Two cells naming one file (resolved path) or files with one content are problems.

    ``entries``: {(line, hemisphere or None): path}; ``digests``: the same keys -> sha256.
    """
    def cell(k):
        return f"row {k[0]}" + (f" column 'path_{k[1]}'" if k[1] else "")

    by_path = {}
    for k, p in entries.items():
        by_path.setdefault(real_path(p), []).append(k)
    for real, ks in by_path.items():
        if len(ks) > 1:
            problems.add(f"{mpath} {', '.join(cell(k) for k in ks)}",
                         f"the same file {real} is named more than once",
                         "give each map and hemisphere its own file (the same file twice gives "
                         "a zero contrast or a copied participant)")
    by_digest = {}
    for k, d in digests.items():
        by_digest.setdefault(d, []).append(k)
    for d, ks in by_digest.items():
        if len({real_path(entries[k]) for k in ks}) > 1:
            problems.add(f"{mpath} {', '.join(cell(k) for k in ks)}",
                         f"files with identical content (sha256 {d[:12]}...)",
                         "give each map its own data; a copied file gives a zero contrast or a "
                         "copied participant")
