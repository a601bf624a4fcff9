"""Cohort: the two tables and the data array ``Y[map, source, time]``.

:func:`load_cohort` is the input edge of the pipeline.  It reads the
participants and maps tables, inspects every map header, builds the template
:class:`~groupsrc.sources.volume.VolumeGrid` and :class:`~groupsrc.sources.volume.TimeAxis`, decodes the
maps into one float32 array (through the memory-mapped cache) and reports
every problem it finds at once as an :class:`~groupsrc.inputs.problems.InputError`.
Nothing downstream opens a file again.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from . import cache as _cache
from . import surface_cohort
from ..sources import TimeAxis, VolumeGrid
from .. import formats
from ..formats.nifti import (DecodeError, affine_difference, read_data, read_header, read_mask,
                             read_sources)
from .problems import InputError, ProblemList
from .settings import Settings, is_surface
from .units import LEVEL_ROWS, Standardizer, Units, split_units
from .tables import (HEMISPHERE_PATHS, ID, MISSING, check_tables, map_path, read_table,
                     real_path, rows_text)



@dataclass
class Cohort:
    participants: pd.DataFrame   # index: participant_id
    maps: pd.DataFrame           # one row per map, in the row order of Y
    grid: VolumeGrid
    time_axis: TimeAxis
    Y: np.ndarray                # (n_maps, n_sources, n_times) float32, centred and scaled
    inputs: dict = field(default_factory=dict)   # path -> sha256
    cache_hit: bool = False
    #: optional atlas: {"labels": (n_sources,) int array (0 = none), "names": {int: str}}
    atlas: dict | None = None
    #: facts about the inputs that ``check`` prints (e.g. CIFTI-2 parts not read)
    notes: dict = field(default_factory=dict)
    #: how ``Y`` relates to the input's units (:mod:`.units`): raw = scale * Y + offset
    units: Units = field(default_factory=Units)

    @property
    def n_maps(self) -> int:
        return int(self.Y.shape[0])

    def raw(self, rows=slice(None), sources=slice(None), samples=slice(None)) -> np.ndarray:
        """Maps in the input's units (float64): ``scale * Y + offset``."""
        Y = np.asarray(self.Y[rows], np.float64)[..., sources, samples]
        return Y * self.units.scale + self.units.scale * self.units.level(sources, samples)


_SURFACE_FORMATS = {"gifti": "GIfTI", "cifti": "CIFTI-2"}


def check_headers(settings, maps, mpath, problems):
    """Inspect every map header; returns (headers list aligned to maps rows, reference)."""
    headers = [None] * len(maps)
    ref = None
    shape_bad, affine_bad, time_bad = [], [], []
    rows = []
    for i, (line, rel) in enumerate(maps["path"].items()):
        row = f"{mpath} row {line}"
        if rel in MISSING:
            problems.add(row, "empty path", "give the map file, relative to the maps table")
            continue
        p = map_path(mpath, rel)
        try:
            h = formats.read_header(p)
        except FileNotFoundError:
            problems.add(f"{row} ({p})", "map file not found",
                         "paths are relative to the folder of the maps table")
            continue
        except ValueError as exc:
            problems.add(f"{row} ({p})", str(exc), "give a NIfTI-1/2 file (.nii or .nii.gz)")
            continue
        if getattr(h, "format", "nifti") != "nifti":
            problems.add(f"{row} ({p})", f"is a {_SURFACE_FORMATS[h.format]} surface map, but "
                         "the analysis file names no template mesh",
                         "for surface maps give mesh_left / mesh_right under [cohort] "
                         "(README, Surfaces); for volumes give NIfTI maps")
            continue
        if len(h.shape) != 4:
            problems.add(f"{row} ({p})", f"is {len(h.shape)}D with shape {h.shape}; a 4D map "
                         "(x, y, z, time) is expected", "save every map with time as the 4th axis")
            continue
        if min(h.shape) < 1:
            problems.add(f"{row} ({p})", f"has shape {h.shape} with an empty axis",
                         "write the map again with its data")
            continue
        if not np.all(np.isfinite(h.affine)):
            problems.add(f"{row} ({p})", "the voxel-to-world affine (sform/qform) holds NaN "
                         "or infinite values", "write the map with a valid template affine")
            continue
        headers[i] = h
        rows.append((i, row, p, h))
    if not rows:
        return headers, None
    # the reference geometry is the one most maps share, so one odd file is the one named
    keys = [(h.shape[:3], tuple(np.round(h.affine, 3).ravel()), h.shape[3],
             round(h.time_axis.dt, 9), round(h.time_axis.t0, 9)) for _, _, _, h in rows]
    best = max(set(keys), key=lambda k: (keys.count(k), -keys.index(k)))
    ref = rows[keys.index(best)][3]
    for i, row, p, h in rows:
        if h is ref:
            continue
        if h.shape[:3] != ref.shape[:3]:
            shape_bad.append((row, p, h))
        elif not np.allclose(h.affine, ref.affine, atol=1e-3):
            affine_bad.append((row, p, h))
        if not _time_of(settings, h).close_to(_time_of(settings, ref)):
            time_bad.append((row, p, h))
    for row, p, h in shape_bad:
        problems.add(f"{row} ({p})", f"grid shape {h.shape[:3]} differs from {ref.shape[:3]} of "
                     f"{ref.path.name}", "resample every map onto the same template grid")
    for row, p, h in affine_bad:
        problems.add(f"{row} ({p})", f"affine differs from {ref.path.name}: "
                     f"{affine_difference(h.affine, ref.affine)}",
                     "map every participant onto the same template grid")
    for row, p, h in time_bad:
        a, b = _time_of(settings, h), _time_of(settings, ref)
        problems.add(f"{row} ({p})",
                     f"time axis ({a.n} samples from {a.t0 * 1e3:.4g} ms every {a.dt * 1e3:.4g} ms) "
                     f"differs from {ref.path.name} ({b.n} samples from {b.t0 * 1e3:.4g} ms every "
                     f"{b.dt * 1e3:.4g} ms)", "crop or resample every map to the same samples")
    return headers, ref


def _describe(maps, line, within):
    """'participant 'sub-01' condition 'rare'' for one maps row."""
    text = f"participant '{maps.at[line, ID]}'"
    for col in ([within] if within else []) + (["session"] if "session" in maps.columns else []):
        text += f" {col} '{maps.at[line, col]}'"
    return text


def check_same_files(settings, maps, mpath, digests, problems):
    """Two rows that name one file (same resolved path, or same content) are a problem.

    Paths are compared after resolving '..' and symbolic links; contents by
    the sha256 in ``digests`` (maps row -> hex digest, for readable files).
    Used twice, the same map gives a zero within-participant contrast or a
    copied participant -- a wrong answer, never an error, so it is refused.
    """
    within = settings.model.get("within")
    resolved = {}
    for line, rel in maps["path"].items():
        if rel not in MISSING:
            resolved.setdefault(real_path(map_path(mpath, rel)), []).append(line)
    for real, lines in resolved.items():
        if len(lines) > 1:
            problems.add(f"{mpath} rows {rows_text(lines)}",
                         f"the same file {real} is used for "
                         + "; ".join(_describe(maps, ln, within) for ln in lines),
                         "give each map its own file (the same file twice gives a zero "
                         "contrast or a copied participant)")
    by_digest = {}
    for line, digest in digests.items():
        by_digest.setdefault(digest, []).append(line)
    for digest, lines in by_digest.items():
        files = {real_path(map_path(mpath, maps.at[ln, "path"])) for ln in lines}
        if len(files) > 1:
            problems.add(f"{mpath} rows {rows_text(lines)}",
                         "files " + ", ".join(maps.at[ln, "path"] for ln in lines)
                         + f" have identical content (sha256 {digest[:12]}...), used for "
                         + "; ".join(_describe(maps, ln, within) for ln in lines),
                         "give each map its own data; a copied file gives a zero contrast "
                         "or a copied participant")


def content_digests(Y, skip=()) -> dict:
    """{row: digest of its decoded values} for the rows of ``Y`` (maps, sources, time)
    not in ``skip``; a memory-mapped ``Y``'s pages are handed back row by row."""
    import hashlib

    from ..stats.engine.pages import release
    out = {}
    for i in range(Y.shape[0]):
        if i in skip:
            continue
        # SHA-1 for speed (hardware-assisted on most processors, about 1.5 GB/s here):
        # an equality test between a cohort's own maps, not a guard against forgery
        out[i] = hashlib.sha1(memoryview(np.ascontiguousarray(Y[i])).cast("B"),
                              usedforsecurity=False).hexdigest()
        release(Y)
    return out


#: maps with fewer values (sources x samples) are not compared by content: a few values can
#: coincide by chance (e.g. weights of a tiny test cohort), thousands cannot
MIN_CONTENT_POINTS = 64


def same_content(Y, skip=()) -> list:
    """Groups (row lists, two or more) of rows of ``Y`` that hold identical decoded data
    (none for maps of fewer than ``MIN_CONTENT_POINTS`` values)."""
    if Y.shape[0] == 0 or int(np.prod(Y.shape[1:])) < MIN_CONTENT_POINTS:
        return []
    by = {}
    for i, d in content_digests(Y, skip).items():
        by.setdefault(d, []).append(i)
    return [rows for rows in by.values() if len(rows) > 1]


def check_same_content(settings, maps, mpath, Y, problems, skip=(), cells=None):
    """Maps of different files whose decoded data are identical are a problem.

    The file check (:func:`check_same_files`) compares bytes; a map re-saved as
    ``.nii`` instead of ``.nii.gz``, with another compression level or data type, or
    converted from another format holds the same values in other bytes.  ``Y``'s rows
    follow ``maps``' rows; ``cells(line)`` names a row's files (default: its path).
    """
    within = settings.model.get("within")
    lines = list(maps.index)
    cells = cells or (lambda line: maps.at[line, "path"])
    for rows in same_content(Y, skip):
        found = [lines[i] for i in rows]
        first = np.asarray(Y[rows[0]])
        why = (f"(every value {float(first.flat[0]):g}: an empty estimate?)"
               if np.all(first == first.flat[0]) else
               "(one map saved again, e.g. as .nii instead of .nii.gz or with another "
               "compression)")
        problems.add(f"{mpath} rows {rows_text(found)}",
                     "maps " + ", ".join(str(cells(ln)) for ln in found) + " are different "
                     f"files holding the same data once decoded {why}, used for "
                     + "; ".join(_describe(maps, ln, within) for ln in found),
                     "give each map its own data; a copied map gives a zero contrast or a "
                     "copied participant")


def _time_of(settings, header):
    t = header.time_axis
    t0 = settings.cohort.get("time_start")
    dt = settings.cohort.get("sampling_interval")
    return TimeAxis(float(t0) if t0 is not None else t.t0,
                    float(dt) if dt is not None else t.dt, t.n)


def load_cohort(settings: Settings, *, progress: bool | None = None,
                use_cache: bool = True) -> Cohort:
    """Load and validate everything; raise InputError listing every problem."""
    problems = ProblemList()
    parts, maps, ppath, mpath = check_tables(settings, problems)
    if is_surface(settings.cohort):
        return _surface_cohort(settings, parts, maps, mpath, problems, progress, use_cache)
    if maps is not None and "path" not in maps.columns:
        problems.add(mpath, "names one file per hemisphere (path_left / path_right), but the "
                     "analysis file names no template mesh",
                     "give mesh_left / mesh_right under [cohort] (README, Surfaces)")
        raise InputError(problems)
    headers, ref = (None, None)
    if maps is not None:
        headers, ref = check_headers(settings, maps, mpath, problems)
    if ref is None:
        if maps is not None:
            check_same_files(settings, maps, mpath, {}, problems)
            if not problems:
                problems.add(mpath, "no readable map", "")
        raise InputError(problems)
    time_axis = _time_of(settings, ref)
    if not (math.isfinite(time_axis.dt) and time_axis.dt > 0):
        problems.add(ref.path, f"sampling interval (pixdim[4]) is {time_axis.dt}, not a "
                     "positive number", "set it in the file or give sampling_interval under [cohort]")
    if not math.isfinite(time_axis.t0):
        problems.add(ref.path, f"first sample time (toffset) is {time_axis.t0}",
                     "set it in the file or give time_start under [cohort]")
    mask_path = settings.resolve(settings.cohort.get("mask"))
    mask = _read_mask(mask_path, ref, problems)
    atlas = _read_atlas(settings, ref, problems)

    cache_dir = settings.resolve(settings.cohort.get("cache")) or _cache.default_cache_dir()
    index = _cache.HashIndex(cache_dir)
    digests = {maps.index[i]: index.sha256(h.path) for i, h in enumerate(headers) if h is not None}
    check_same_files(settings, maps, mpath, digests, problems)
    if problems:
        # still decode the maps that match the template, so that NaN/Inf values and
        # damaged files are listed in the same pass
        good = [i for i, h in enumerate(headers) if h is not None and h.shape == ref.shape
                and np.allclose(h.affine, ref.affine, atol=1e-3)]
        _, _, bad, broken, _ = _decode([headers[i] for i in good], ref, mask, progress)
        _decode_problems(problems, maps, mpath, [headers[i] for i in good],
                         {good[j]: v for j, v in bad.items()},
                         {good[j]: v for j, v in broken.items()})
        index.save()
        raise InputError(problems)

    map_paths = [h.path for h in headers]
    inputs = {str(h.path): digests[maps.index[i]] for i, h in enumerate(headers)}
    if mask_path is not None:
        inputs[str(mask_path)] = index.sha256(mask_path)
    for p in (ppath, mpath, settings.path):
        inputs[str(p)] = index.sha256(p)
    index.save()
    key = _cache.cache_key([inputs[str(p)] for p in map_paths]
                           + [inputs.get(str(mask_path), "nomask"), CACHE_VERSION])

    hit = _cache.load_cached(cache_dir, key) if use_cache else None
    if hit is not None:
        stored, meta = hit
        Y, units = split_units(stored, meta)
        grid_mask = np.zeros(ref.shape[:3], bool)
        grid_mask.reshape(-1)[np.asarray(meta["flat_index"], dtype=np.int64)] = True
        grid = VolumeGrid.from_mask(grid_mask, ref.affine)
        bad, broken = {int(k): v for k, v in meta.get("nonfinite", {}).items()}, {}
        cache_hit = True
    else:
        stored, grid, bad, broken, scale = _decode(
            headers, ref, mask, progress,
            allocate=(lambda shape: _cache.create(cache_dir, key, shape)) if use_cache else None)
        cache_hit = False
        meta = {"flat_index": grid.flat_index.tolist(), "nonfinite": {}, "scale": scale}
        if not bad and not broken:
            stored = _cache.store(cache_dir, key, stored, meta)
        else:
            _cache.discard(stored)
        Y, units = split_units(stored, meta)
    _decode_problems(problems, maps, mpath, headers, bad, broken)
    check_same_content(settings, maps, mpath, Y, problems, skip=set(bad) | set(broken))
    if grid.n_sources == 0 and not broken:
        problems.add(mpath, "no source is finite in every map", "give a mask")
    if problems:
        raise InputError(problems)
    if atlas is not None:
        for key in ("atlas", "atlas_labels"):
            p = settings.resolve(settings.cohort[key])
            inputs[str(p)] = index.sha256(p)
        # one label per source: the atlas in the source space's own terms
        atlas = {"labels": grid.from_volume(atlas["labels"]).astype(np.int64),
                 "names": atlas["names"]}
    return Cohort(participants=parts.set_index(ID, drop=False),
                  maps=maps.reset_index(drop=True), grid=grid, time_axis=time_axis, Y=Y,
                  inputs=inputs, cache_hit=cache_hit, atlas=atlas, units=units)


def _surface_cohort(settings, parts, maps, mpath, problems, progress, use_cache) -> Cohort:
    """The surface branch: meshes, per-hemisphere maps (inputs/surface_cohort.py)."""
    got = surface_cohort.load_surface(settings, maps, mpath, problems, progress=progress,
                                      use_cache=use_cache)
    check_same_content(settings, maps, mpath, got.Y, problems, cells=lambda line: " + ".join(
        str(maps.at[line, c]) for c in maps.columns if c in ("path",) + HEMISPHERE_PATHS))
    if parts is None or problems:
        raise InputError(problems)
    return Cohort(participants=parts.set_index(ID, drop=False),
                  maps=maps.reset_index(drop=True), grid=got.space, time_axis=got.time_axis,
                  Y=got.Y, inputs=got.inputs, cache_hit=got.cache_hit, atlas=got.atlas,
                  notes=got.notes, units=got.units)


def _read_mask(mask_path, ref, problems):
    """The optional mask as a boolean volume on the template grid, or None."""
    if mask_path is None:
        return None
    try:
        mask, maff = read_mask(mask_path)
    except FileNotFoundError:
        problems.add(mask_path, "mask file not found", "check the path, or leave mask out")
        return None
    except DecodeError as exc:
        problems.add(mask_path, str(exc), exc.fix)
        return None
    except ValueError as exc:
        problems.add(mask_path, str(exc), "give a 3D NIfTI mask")
        return None
    if mask.shape != ref.shape[:3]:
        problems.add(mask_path, f"mask shape {mask.shape} differs from the maps' "
                     f"{ref.shape[:3]}", "use a mask on the maps' template grid")
    elif not np.allclose(maff, ref.affine, atol=1e-3):
        problems.add(mask_path, f"mask affine differs from the maps: "
                     f"{affine_difference(maff, ref.affine)}",
                     "use a mask on the maps' template grid")
    elif not mask.any():
        problems.add(mask_path, "mask is empty", "mark the sources with nonzero values")
    else:
        return mask
    return None


def _decode_problems(problems, maps, mpath, headers, bad, broken):
    """Problems for maps with NaN/Inf values (``bad``) or damaged data (``broken``)."""
    for i in sorted(set(bad) | set(broken)):
        line, path = maps.index[i], headers[i].path
        if i in broken:
            problems.add(f"{mpath} row {line} ({path})", broken[i], DecodeError.fix)
        else:
            _nonfinite_problem(problems, mpath, line, path, bad[i])


def _nonfinite_problem(problems, mpath, row, path, n):
    problems.add(f"{mpath} row {row} ({path})", f"{n} NaN/Inf value(s) inside the mask",
                 "fix the inverse solution for this map, or give a mask that excludes "
                 "those sources")


def _read_atlas(settings, ref, problems):
    """Optional labelled atlas on the template grid with its lookup table."""
    ipath = settings.resolve(settings.cohort.get("atlas"))
    lpath = settings.resolve(settings.cohort.get("atlas_labels"))
    if ipath is None or lpath is None:
        return None
    n_before = len(problems)
    labels = None
    try:
        h = read_header(ipath)
        data = read_data(h)
        if data.ndim == 4 and data.shape[3] == 1:
            data = data[..., 0]
        if data.shape != ref.shape[:3]:
            problems.add(ipath, f"atlas shape {data.shape} differs from the maps' {ref.shape[:3]}",
                         "resample the atlas onto the template grid (nearest neighbour)")
        elif not np.allclose(h.affine, ref.affine, atol=1e-3):
            problems.add(ipath, f"atlas affine differs from the maps: "
                         f"{affine_difference(h.affine, ref.affine)}",
                         "resample the atlas onto the template grid")
        elif not np.all(np.isfinite(data)) or not np.allclose(data, np.round(data)):
            problems.add(ipath, "atlas values must be integer labels", "save it as an integer image")
        else:
            labels = np.round(data).astype(np.int32)
    except FileNotFoundError:
        problems.add(ipath, "atlas file not found", "check the path")
    except DecodeError as exc:
        problems.add(ipath, str(exc), exc.fix)
    except ValueError as exc:
        problems.add(ipath, str(exc), "give a 3D NIfTI label image")
    table = read_table(lpath, problems, "atlas labels")
    names = None
    if table is not None:
        miss = [c for c in ("index", "name") if c not in table.columns]
        if miss:
            problems.add(lpath, f"missing column(s) {', '.join(miss)}",
                         "the lookup table needs columns 'index' and 'name'")
        else:
            integer = table["index"].str.fullmatch(r"[+-]?\d+")
            for row in table.index[~integer]:
                problems.add(f"{lpath} row {row}",
                             f"index {table.at[row, 'index']!r} is not an integer",
                             "give the label's integer value")
            names = {int(k): str(v) for k, v in zip(table["index"][integer],
                                                     table["name"][integer])}
    if labels is not None and names is not None:
        unknown = sorted(set(np.unique(labels).tolist()) - set(names) - {0})
        if unknown:
            problems.add(lpath, f"labels {unknown[:10]} occur in the atlas but not in the table",
                         "add a row for each label (0 means unlabelled)")
    if len(problems) > n_before:
        return None
    return {"labels": labels, "names": names}


def _decode(headers, ref, mask, progress, allocate=None):
    """(stored array, grid, {i: NaN/Inf count}, {i: decode error}, scale).

    The stored array is (maps + 2, sources, time) float32: the maps centred and scaled
    in float64 as they are decoded (:mod:`.units`), then the two rows of ``offset /
    scale``.  ``progress``: a :func:`groupsrc.progress.reporter`, or True/False/None
    (a bar on a terminal); ``allocate(shape)`` gives the array it is decoded into
    (e.g. the cache's memory-mapped file, whose pages are handed back map by map).
    """
    from ..progress import per_item
    from ..stats.engine.pages import release
    each = per_item(progress)
    n_t = ref.shape[3]
    broken = {}
    if mask is None:
        # default mask: sources finite (and not constantly zero) in every map
        mask = np.ones(ref.shape[:3], bool)
        for i, h in enumerate(each(headers, "scanning maps", "map")):
            try:
                data = read_data(h, np.float32)
            except DecodeError as exc:
                broken[i] = str(exc)
                continue
            mask &= np.isfinite(data).all(axis=3)
            mask &= ~(data == 0).all(axis=3)
    grid = VolumeGrid.from_mask(mask, ref.affine)
    shape = (len(headers) + LEVEL_ROWS, grid.n_sources, n_t)
    Y = allocate(shape) if allocate is not None else None
    Y = np.empty(shape, dtype=np.float32) if Y is None else Y
    flat = grid.flat_index
    bad = {}
    standard = Standardizer()
    for i, h in enumerate(each(headers, "loading maps", "map")):
        if i in broken:
            continue
        try:
            raw = read_sources(h, flat)
        except DecodeError as exc:
            broken[i] = str(exc)
            continue
        Y[i] = standard(raw)
        nonfinite = int((~np.isfinite(Y[i])).sum())
        if nonfinite:
            bad[i] = nonfinite
        release(Y)
    standard.settle(Y, len(headers))
    Y[len(headers):] = standard.level_rows(Y.shape[1:])
    return Y, grid, bad, broken, float(standard.scale or 1.0)


#: the loading cache's format: centred and scaled maps plus two rows of offset / scale
CACHE_VERSION = "v2-units"


def summary(cohort: Cohort, settings: Settings) -> dict:
    """Short description of a loaded cohort (printed by ``groupsrc check``)."""
    parts = cohort.participants
    out = {"participants": int(len(parts)), "maps": cohort.n_maps,
           "sources": cohort.grid.n_sources, "samples": cohort.time_axis.n,
           "time_range_ms": [round(cohort.time_axis.times[0] * 1e3, 3),
                             round(cohort.time_axis.times[-1] * 1e3, 3)],
           "sampling_interval_ms": round(cohort.time_axis.dt * 1e3, 6)}
    if cohort.grid.kind == "volume":
        out["voxel_size_mm"] = [round(float(v), 3) for v in cohort.grid.voxel_size]
    else:
        out["hemispheres"] = {h.name: {"vertices": h.n_vertices, "sources": int(h.sources.size)}
                              for h in cohort.grid.hemispheres}
        out["map_format"] = cohort.grid.maps_format
        if cohort.grid.voxels is not None:
            out["volume_parts"] = {n: int(ijk.shape[0]) for n, ijk in cohort.grid.voxels.parts}
    out.update(cohort.notes)
    if "group" in parts.columns:
        out["per_group"] = {str(k): int(v) for k, v in parts["group"].value_counts().sort_index().items()}
    within = settings.model.get("within")
    if within:
        out["conditions"] = sorted(map(str, cohort.maps[within].unique()))
    if "session" in cohort.maps.columns:
        out["sessions"] = sorted(map(str, cohort.maps["session"].unique()))
    return out
