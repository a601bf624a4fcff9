"""Loading a surface cohort: template meshes, per-hemisphere maps, masks, atlas.

:func:`load_surface` is the surface branch of
:func:`groupsrc.inputs.cohort.load_cohort` (which calls it when the analysis
file names a template mesh); it returns the pieces of a
:class:`~groupsrc.inputs.cohort.Cohort` or raises one
:class:`~groupsrc.inputs.problems.InputError` listing every problem.

Inputs (README, "Surfaces"):

* ``[cohort] mesh_left`` / ``mesh_right`` -- the template meshes (GIfTI); one
  or both; closed manifolds unless ``mesh_closed = false``;
* the maps table names the files either in ``path_left`` and ``path_right``
  (GIfTI, one file per hemisphere and map) or in ``path`` (CIFTI-2 dense
  time series, both hemispheres in one file, and any volume parts: their
  voxels become sources after the vertices, each labelled in the atlas with
  its CIFTI-2 structure name);
* optional ``mask_left`` / ``mask_right`` (GIfTI, nonzero = source) and
  ``atlas_left`` / ``atlas_right`` (GIfTI label files sharing one table);
* the time axis: from CIFTI-2 files; GIfTI carries none, so
  ``time_start`` and ``sampling_interval`` are then required.

Checks, all reported together: meshes readable, manifold (and closed when
expected); every file readable and of the right kind for its column; vertex
counts equal to the mesh (with a hint when the two hemispheres' files are
swapped, by count or by the files' ``AnatomicalStructurePrimary``); every
map with the same samples (and time axis); CIFTI-2 files with the same
vertices and the same volume parts (:mod:`.cifti_checks`); the same file
not used twice; no NaN or infinite value at a source; masks and atlas on
the meshes.  Without a mask, the sources are the
vertices finite and not constantly zero in every map (as for volumes).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import cache as _cache
from ..formats import cifti, gifti
from ..sources import Hemisphere, SurfaceMesh, TimeAxis
from ..sources.surface import HEMISPHERES
from ..sources.voxels import VoxelParts
from .problems import InputError, ProblemList
from .cifti_checks import cifti_headers
from .surface_checks import (_check_time, _times, check_same_files, gifti_headers,
                             read_atlas, read_masks, read_meshes)
from .tables import HEMISPHERE_PATHS, MISSING, map_path
from .units import LEVEL_ROWS, Standardizer, Units, split_units

#: cache entries of surfaces carry this tag, so they never collide with volumes
CACHE_TAG = "surface-v2-units"
#: and those of CIFTI-2 files whose volume parts are sources too (earlier entries held no voxels)
VOLUME_CACHE_TAG = "cifti-volume-parts-v1"


@dataclass
class SurfaceInputs:
    """What :func:`load_surface` hands back to the cohort loader."""

    space: SurfaceMesh
    time_axis: TimeAxis
    Y: np.ndarray
    inputs: dict
    cache_hit: bool
    atlas: dict | None
    notes: dict = field(default_factory=dict)
    units: Units = field(default_factory=Units)


# ----------------------------------------------------------------------------
# decoding
# ----------------------------------------------------------------------------

def _read_row(fmt, headers, line, hemis, dtype=np.float32):
    """{hemisphere: (V, T) dtype} of one maps row (NaN where a CIFTI file has no value)."""
    if fmt == "cifti":
        return cifti.read_data(headers[(line, None)], dtype)
    return {h: gifti.read_data(headers[(line, h)], dtype) for h in hemis}


def decode(fmt, headers, lines, meshes, masks, n_t, progress, voxels=None):
    """(stored, masks used, {line: {part: NaN count}}, {line: decode error}, scale) for
    complete rows.  ``stored`` holds the maps centred and scaled in float64 as they are
    decoded, then two rows of ``offset / scale`` (:mod:`.units`).

    ``voxels``: the CIFTI-2 volume parts (their voxels follow the vertices in Y);
    ``progress``: a :func:`groupsrc.progress.reporter` (silent when quiet), or
    True/False/None (a bar on a terminal), as for volumes.
    """
    from ..progress import per_item
    each = per_item(progress)
    hemis = list(meshes)
    names = list(voxels.names) if voxels is not None else []
    broken, bad = {}, {}
    use = {h: masks[h].copy() if h in masks else None for h in hemis}
    if fmt == "cifti":
        present = {}
        for h in hemis:
            first = next(hd for k, hd in headers.items() if k[0] in lines)
            m = np.zeros(meshes[h].n, bool)
            m[first.parts[h][1]] = True
            present[h] = m
            use[h] = m if use[h] is None else use[h] & m
    if any(u is None for u in use.values()):
        scan = {h: np.ones(meshes[h].n, bool) for h in hemis}
        for line in each(lines, "scanning maps", "map"):
            try:
                data = _read_row(fmt, headers, line, hemis)
            except gifti.DecodeError as exc:
                broken[line] = str(exc)
                continue
            for h in hemis:
                scan[h] &= np.isfinite(data[h]).all(axis=1) & ~(data[h] == 0).all(axis=1)
        use = {h: scan[h] if use[h] is None else use[h] for h in hemis}
    sizes = [int(use[h].sum()) for h in hemis] + [len(ijk) for _, ijk in
                                                  (voxels.parts if voxels is not None else ())]
    bounds = np.cumsum([0] + sizes)
    Y = np.empty((len(lines) + LEVEL_ROWS, int(bounds[-1]), n_t), dtype=np.float32)
    standard = Standardizer()
    for i, line in enumerate(each(lines, "loading maps", "map")):
        if line in broken:
            continue
        try:
            data = _read_row(fmt, headers, line, hemis, np.float64)
        except gifti.DecodeError as exc:
            broken[line] = str(exc)
            continue
        Y[i] = standard(np.concatenate([data[h][use[h]] for h in hemis]
                                       + [data[n] for n in names]))
        nonfinite = {part: int((~np.isfinite(Y[i, a:b])).sum())
                     for part, a, b in zip(hemis + names, bounds[:-1], bounds[1:])}
        if any(nonfinite.values()):
            bad[line] = {part: n for part, n in nonfinite.items() if n}
    standard.settle(Y, len(lines))
    Y[len(lines):] = standard.level_rows(Y.shape[1:])
    return Y, use, bad, broken, float(standard.scale or 1.0)


# ----------------------------------------------------------------------------
# the surface branch of load_cohort
# ----------------------------------------------------------------------------

def _layout(maps, mpath, meshes, problems):
    """'gifti' (path_left / path_right) or 'cifti' (path), or None with a problem."""
    has_hemi = [c for c in HEMISPHERE_PATHS if c in maps.columns]
    if "path" in maps.columns and has_hemi:
        problems.add(mpath, f"has both 'path' and {', '.join(repr(c) for c in has_hemi)}",
                     "name GIfTI files per hemisphere in path_left / path_right, or CIFTI-2 "
                     "files in path, not both")
        return None
    if "path" in maps.columns:
        return "cifti"
    missing = [f"path_{h}" for h in meshes if f"path_{h}" not in maps.columns]
    extra = [c for c in has_hemi if c.split("_", 1)[1] not in meshes]
    for col in missing:
        problems.add(f"{mpath} column '{col}'", "required column missing: the analysis file "
                     f"gives mesh_{col.split('_', 1)[1]}", f"add the column {col}")
    for col in extra:
        hemi = col.split("_", 1)[1]
        problems.add(f"{mpath} column '{col}'", f"names {hemi} maps but the analysis file "
                     f"gives no mesh_{hemi}", f"add mesh_{hemi} under [cohort], or drop {col}")
    return None if missing or extra else "gifti"


def load_surface(settings, maps, mpath, problems: ProblemList, *, progress=None,
                 use_cache=True) -> SurfaceInputs:
    """Load and check a surface cohort (see the module docstring); InputError lists all."""
    meshes = read_meshes(settings, problems)
    masks = read_masks(settings, meshes, problems)
    atlas = read_atlas(settings, meshes, problems)
    mesh_given = [h for h in HEMISPHERES if settings.cohort.get(f"mesh_{h}") is not None]
    fmt = _layout(maps, mpath, {h: None for h in mesh_given}, problems) if maps is not None \
        else None
    if maps is None or fmt is None or not meshes:
        raise InputError(problems)
    headers = (cifti_headers if fmt == "cifti" else gifti_headers)(maps, mpath, meshes, problems)
    ref = _times(settings, headers, mpath, problems)
    time_axis = _check_time(settings, ref, fmt, problems, headers)

    cache_dir = settings.resolve(settings.cohort.get("cache")) or _cache.default_cache_dir()
    index = _cache.HashIndex(cache_dir)
    entries = {}
    for line in maps.index:
        for col in ([f"path_{h}" for h in meshes] if fmt == "gifti" else ["path"]):
            rel = maps.at[line, col]
            if rel not in MISSING:
                entries[(line, col.split("_", 1)[1] if fmt == "gifti" else None)] = \
                    map_path(mpath, rel)
    digests = {k: index.sha256(headers[k].path) for k in headers}
    check_same_files(entries, mpath, digests, problems)
    hemis = list(meshes)
    complete = [line for line in maps.index
                if all((line, h if fmt == "gifti" else None) in headers for h in hemis)]
    n_t = ref.n if ref is not None else 1
    voxels = _voxel_parts(headers, complete)
    if problems or time_axis is None:
        # decode what passed, so NaN values and damaged files are listed in this pass too
        if complete:
            _, _, bad, broken, _ = decode(fmt, headers, complete, meshes, masks, n_t, progress,
                                       voxels)
            _decode_problems(problems, mpath, bad, broken)
        index.save()
        raise InputError(problems)

    inputs = {str(headers[k].path): digests[k] for k in sorted(headers, key=str)}
    mask_paths = [settings.resolve(settings.cohort.get(f"mask_{h}")) for h in masks]
    for p in mask_paths + [settings.path, mpath,
                           settings.resolve(settings.cohort.get("participants"))]:
        inputs[str(p)] = index.sha256(p)
    for p in (atlas or {}).get("paths", []):
        inputs[str(p)] = index.sha256(p)
    for m in meshes.values():
        inputs[str(m.path)] = index.sha256(m.path)
    index.save()
    order = [(line, h if fmt == "gifti" else None) for line in maps.index
             for h in (hemis if fmt == "gifti" else [None])]
    key = _cache.cache_key([digests[k] for k in order]
                           + [inputs[str(p)] for p in mask_paths]
                           + [inputs[str(meshes[h].path)] for h in hemis] + [CACHE_TAG]
                           + ([VOLUME_CACHE_TAG] if voxels is not None else []))
    hit = _cache.load_cached(cache_dir, key) if use_cache else None
    if hit is not None:
        stored, meta = hit
        use = {}
        for h in hemis:
            use[h] = np.zeros(meshes[h].n, bool)
            use[h][np.asarray(meta["sources"][h], dtype=np.int64)] = True
        bad, broken = {}, {}
    else:
        stored, use, bad, broken, scale = decode(fmt, headers, list(maps.index), meshes,
                                                 masks, n_t, progress, voxels)
        meta = {"sources": {h: np.flatnonzero(use[h]).tolist() for h in hemis},
                "scale": scale}
        if not bad and not broken:
            stored = _cache.store(cache_dir, key, stored, meta)
    Y, units = split_units(stored, meta)
    _decode_problems(problems, mpath, bad, broken)
    if sum(int(u.sum()) for u in use.values()) == 0 and not broken:
        problems.add(mpath, "no vertex is finite in every map", "give mask_left / mask_right")
    if problems:
        raise InputError(problems)
    space = SurfaceMesh(tuple(Hemisphere.from_arrays(h, meshes[h].vertices, meshes[h].triangles,
                                                     use[h]) for h in hemis), maps_format=fmt,
                        voxels=voxels)
    notes = _notes(fmt, headers, masks, use)
    return SurfaceInputs(space, time_axis, Y, inputs, hit is not None,
                         source_atlas(space, atlas), notes, units)


def _voxel_parts(headers, lines) -> VoxelParts | None:
    """The volume parts of the CIFTI-2 files (all equal once checked), or None."""
    first = next((h for k, h in headers.items() if k[0] in lines), None)
    if first is None or not getattr(first, "voxels", None):
        return None
    return cifti.voxel_parts(first)


def source_atlas(space, atlas) -> dict | None:
    """One atlas label per source: {"labels": (n_sources,) int, "names": {key: name}}.

    Vertices take the GIfTI atlas (0 where a hemisphere has none).  Voxels of
    the volume parts take their CIFTI-2 structure name, under keys after the
    atlas's; without a GIfTI atlas the vertices are then named by their cortex
    structure, so every source has a name.  None without atlas and volume parts.
    """
    if atlas is None and space.voxels is None:
        return None
    hemis = space.hemispheres
    if atlas is not None:
        labels = [atlas["labels"][h.name][h.sources] if h.name in atlas["labels"]
                  else np.zeros(h.sources.size, np.int64) for h in hemis]
        names = dict(atlas["names"])
    else:
        names = {i + 1: cifti.STRUCTURES[h.name] for i, h in enumerate(hemis)}
        labels = [np.full(h.sources.size, i + 1, np.int64) for i, h in enumerate(hemis)]
    if space.voxels is not None:
        first = max(names, default=0) + 1
        parts = space.voxels.names
        names.update({first + j: name for j, name in enumerate(parts)})
        labels.append(first + space.voxels.structure_index)
    return {"labels": np.concatenate(labels).astype(np.int64), "names": names}


def _decode_problems(problems, mpath, bad, broken):
    for line in sorted(set(bad) | set(broken)):
        if line in broken:
            problems.add(f"{mpath} row {line}", broken[line], gifti.DecodeError.fix)
            continue
        parts = bad[line]
        volume = [p for p in parts if p not in HEMISPHERES]
        where = ", ".join(f"{n} in {p if p in volume else p + ' hemisphere'}"
                          for p, n in parts.items())
        problems.add(f"{mpath} row {line}",
                     f"{sum(parts.values())} NaN/Inf value(s) at sources ({where})",
                     "fix the inverse solution for this map" + (
                         ", or give mask_left / mask_right excluding those vertices"
                         if len(volume) < len(parts) else "")
                     + ("; every voxel a volume part lists is a source, so give it a finite "
                        "value" if volume else ""))


def _notes(fmt, headers, masks, use) -> dict:
    """Facts ``check`` prints: CIFTI-2 parts not read, mask vertices without data."""
    notes = {}
    ignored = {}
    for h in headers.values():
        for name, n in getattr(h, "ignored", {}).items():
            ignored[name] = n
    if ignored:
        notes["ignored_parts"] = {k: ignored[k] for k in sorted(ignored)}
    dropped = {h: int((masks[h] & ~use[h]).sum()) for h in masks if (masks[h] & ~use[h]).any()}
    if dropped:
        notes["mask_vertices_without_data"] = dropped
    return notes


__all__ = ["SurfaceInputs", "load_surface", "read_meshes"]
