"""Cohort: the two tables and the data array ``Y[map, source, time]``.

:func:`load_cohort` is the input edge of the pipeline.  It reads the
participants and maps tables, inspects every map header, builds the template
:class:`~groupsrc.grid.Grid` and :class:`~groupsrc.grid.TimeAxis`, decodes the
maps into one float32 array (through the memory-mapped cache) and reports
every problem it finds at once as an :class:`~groupsrc.problems.InputError`.
Nothing downstream opens a file again.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from . import cache as _cache
from .grid import Grid, TimeAxis
from .maps_io import affine_difference, read_header, read_mask, read_sources
from .problems import InputError, ProblemList, closest
from .settings import Settings

ID = "participant_id"


@dataclass
class Cohort:
    participants: pd.DataFrame   # index: participant_id
    maps: pd.DataFrame           # one row per map, in the row order of Y
    grid: Grid
    time_axis: TimeAxis
    Y: np.ndarray                # (n_maps, n_sources, n_times) float32
    inputs: dict = field(default_factory=dict)   # path -> sha256
    cache_hit: bool = False
    #: optional atlas: {"labels": (x, y, z) int array, "names": {int: str}}
    atlas: dict | None = None

    @property
    def n_maps(self) -> int:
        return int(self.Y.shape[0])


def read_table(path: Path, problems: ProblemList, label: str) -> pd.DataFrame | None:
    """Read a TSV with every column as text (types are decided later)."""
    if path is None:
        return None
    if not path.exists():
        problems.add(path, f"{label} table not found",
                     "check the path in the analysis file (relative to the analysis file)")
        return None
    try:
        df = pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False)
    except Exception as exc:
        problems.add(path, f"cannot be read as a tab-separated table ({exc})",
                     "save it as TSV with a header row")
        return None
    df.columns = [c.strip() for c in df.columns]
    if len(df.columns) == 1 and "," in df.columns[0]:
        problems.add(path, "looks comma-separated, not tab-separated", "save it as TSV")
        return None
    return df


def _numeric_columns(df: pd.DataFrame) -> pd.DataFrame:
    """Convert columns whose every non-empty value parses as a number."""
    out = df.copy()
    for col in out.columns:
        if col == ID:
            continue
        vals = out[col].replace({"": np.nan, "n/a": np.nan, "NA": np.nan})
        num = pd.to_numeric(vals, errors="coerce")
        if num.notna().sum() == vals.notna().sum() and vals.notna().any():
            out[col] = num
        else:
            out[col] = vals
    return out


def model_columns(settings: Settings) -> list:
    """participants columns named by the between formula and the contrasts."""
    from .design import formula_variables
    cols = list(formula_variables(settings.model.get("between") or "1"))
    for c in settings.contrasts:
        if c.slope:
            cols.append(c.slope)
        if c.compare:
            cols.extend(c.compare.keys())
    if settings.inference.get("blocks"):
        cols.append(settings.inference["blocks"])
    seen = []
    for c in cols:
        if c not in seen:
            seen.append(c)
    return seen


def check_tables(settings: Settings, problems: ProblemList):
    """Read and cross-check both tables. Returns (participants, maps) or Nones."""
    ppath = settings.resolve(settings.cohort.get("participants"))
    mpath = settings.resolve(settings.cohort.get("maps"))
    parts = read_table(ppath, problems, "participants") if ppath else None
    maps = read_table(mpath, problems, "maps") if mpath else None
    within = settings.model.get("within")

    if parts is not None:
        if ID not in parts.columns:
            problems.add(ppath, f"no '{ID}' column",
                         f"name the participant column '{ID}' (BIDS); "
                         + (closest(ID, parts.columns) or f"columns are: {', '.join(parts.columns)}"))
            parts = None
    if parts is not None:
        dup = parts[ID][parts[ID].duplicated(keep=False)]
        for pid in sorted(set(dup)):
            rows = [str(i + 2) for i in np.nonzero((parts[ID] == pid).to_numpy())[0]]
            problems.add(f"{ppath} rows {', '.join(rows)}", f"participant '{pid}' listed more than once",
                         "keep one row per participant")
        empty = parts.index[parts[ID].str.strip() == ""]
        for i in empty:
            problems.add(f"{ppath} row {i + 2}", f"empty {ID}", "fill it in or delete the row")
        for col in model_columns(settings):
            if col not in parts.columns:
                problems.add(f"{ppath} column '{col}'",
                             "named by the model but missing from the participants table",
                             closest(col, parts.columns) or f"add the column; present: {', '.join(parts.columns)}")
            else:
                miss = parts.index[parts[col].isin(["", "n/a", "NA"])]
                for i in miss:
                    problems.add(f"{ppath} row {i + 2} column '{col}'",
                                 f"missing value for participant '{parts.at[i, ID]}'",
                                 "fill it in or remove the participant from both tables")

    if maps is not None:
        need = [ID, "path"] + ([within] if within else [])
        for col in need:
            if col not in maps.columns:
                problems.add(f"{mpath} column '{col}'", "required column missing",
                             closest(col, maps.columns) or f"present: {', '.join(maps.columns)}")
        if all(c in maps.columns for c in need):
            key = [ID] + ([within] if within else []) + (["session"] if "session" in maps.columns else [])
            dup = maps.duplicated(subset=key, keep=False)
            if dup.any():
                for _, grp in maps[dup].groupby(key, sort=False):
                    rows = ", ".join(str(i + 2) for i in grp.index)
                    what = ", ".join(f"{k}={grp.iloc[0][k]!r}" for k in key)
                    problems.add(f"{mpath} rows {rows}", f"duplicate map for ({what})",
                                 "keep one row per participant, condition and session"
                                 + ("" if "session" in maps.columns else
                                    ", or add a 'session' column"))
        else:
            maps = None

    if parts is not None and maps is not None:
        in_p, in_m = set(parts[ID]), set(maps[ID])
        for pid in sorted(in_m - in_p):
            rows = ", ".join(str(i + 2) for i in np.nonzero((maps[ID] == pid).to_numpy())[0])
            problems.add(f"{mpath} rows {rows}", f"participant '{pid}' is not in {ppath.name}",
                         f"add a row for '{pid}' to {ppath.name} or remove these maps")
        for pid in sorted(in_p - in_m):
            row = int(np.nonzero((parts[ID] == pid).to_numpy())[0][0]) + 2
            problems.add(f"{ppath} row {row}", f"participant '{pid}' has no maps in {mpath.name}",
                         f"add their maps to {mpath.name} or remove the row")
        if within and within in maps.columns:
            conds = set(maps[within])
            for c in settings.contrasts:
                for level in (c.within or {}):
                    if level not in conds:
                        problems.add(f"{settings.path} contrast '{c.name}' within",
                                     f"condition '{level}' does not occur in {mpath.name} column '{within}'",
                                     closest(level, conds) or f"conditions are: {', '.join(sorted(conds))}")
            # every participant should have every condition
            levels = sorted(conds)
            have = maps.groupby(ID)[within].apply(set)
            for pid, got in have.items():
                lack = [lv for lv in levels if lv not in got]
                if lack:
                    problems.add(f"{mpath} participant '{pid}'",
                                 f"no map for condition(s) {', '.join(lack)}",
                                 "add the maps, or remove the participant (the summary-statistic "
                                 "approach needs every condition per participant)")
    if parts is not None:
        parts = _numeric_columns(parts)
        _check_levels(settings, parts, ppath, problems)
    return parts, maps, ppath, mpath


def _check_levels(settings, parts, ppath, problems):
    from .design import factor_columns
    present = [c for c in model_columns(settings) if c in parts.columns]
    for col in factor_columns(settings, parts, present):
        counts = parts[col].value_counts()
        for level, n in counts.items():
            if n < 2:
                problems.add(f"{ppath} column '{col}'",
                             f"level '{level}' has only {n} participant",
                             "a factor level needs at least 2 participants; merge or drop it")
    for c in settings.contrasts:
        if c.compare:
            for fac, levels in c.compare.items():
                if fac in parts.columns:
                    have = set(parts[fac].astype(str))
                    for lv in levels:
                        if str(lv) not in have:
                            problems.add(f"{settings.path} contrast '{c.name}' compare.{fac}",
                                         f"level '{lv}' does not occur in column '{fac}'",
                                         closest(str(lv), have) or f"levels are: {', '.join(sorted(have))}")
        if c.slope and c.slope in parts.columns and not pd.api.types.is_numeric_dtype(parts[c.slope]):
            problems.add(f"{ppath} column '{c.slope}'",
                         f"slope of contrast '{c.name}' needs a numeric column",
                         "every value must be a number")


def check_headers(settings, maps, mpath, problems):
    """Inspect every map header; returns (headers list aligned to maps rows, reference)."""
    headers = [None] * len(maps)
    ref = None
    shape_bad, affine_bad, time_bad = [], [], []
    rows = []
    for i, rel in enumerate(maps["path"]):
        row = f"{mpath} row {i + 2}"
        if not rel.strip():
            problems.add(row, "empty path", "give the map file, relative to the maps table")
            continue
        p = Path(rel)
        p = p if p.is_absolute() else (mpath.parent / p)
        try:
            h = read_header(p)
        except FileNotFoundError:
            problems.add(f"{row} ({p})", "map file not found",
                         "paths are relative to the folder of the maps table")
            continue
        except ValueError as exc:
            problems.add(f"{row} ({p})", str(exc), "give a NIfTI-1/2 file (.nii or .nii.gz)")
            continue
        if len(h.shape) != 4:
            problems.add(f"{row} ({p})", f"is {len(h.shape)}D with shape {h.shape}; a 4D map "
                         "(x, y, z, time) is expected", "save every map with time as the 4th axis")
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
    headers, ref = (None, None)
    if maps is not None:
        headers, ref = check_headers(settings, maps, mpath, problems)
    if ref is None:
        if maps is not None and not problems:
            problems.add(mpath, "no readable map", "")
        raise InputError(problems)
    time_axis = _time_of(settings, ref)
    if time_axis.dt <= 0:
        problems.add(ref.path, "sampling interval (pixdim[4]) is 0 or negative",
                     "set it in the file or give sampling_interval under [cohort]")

    mask_path = settings.resolve(settings.cohort.get("mask"))
    mask = None
    if mask_path is not None:
        try:
            mask, maff = read_mask(mask_path)
            if mask.shape != ref.shape[:3]:
                problems.add(mask_path, f"mask shape {mask.shape} differs from the maps' "
                             f"{ref.shape[:3]}", "use a mask on the maps' template grid")
                mask = None
            elif not np.allclose(maff, ref.affine, atol=1e-3):
                problems.add(mask_path, f"mask affine differs from the maps: "
                             f"{affine_difference(maff, ref.affine)}",
                             "use a mask on the maps' template grid")
                mask = None
            elif not mask.any():
                problems.add(mask_path, "mask is empty", "mark the sources with nonzero values")
                mask = None
        except FileNotFoundError:
            problems.add(mask_path, "mask file not found", "check the path, or leave mask out")
        except ValueError as exc:
            problems.add(mask_path, str(exc), "give a 3D NIfTI mask")
    atlas = _read_atlas(settings, ref, problems)
    if problems:
        # still count NaN/Inf in the maps that match the template, so that every
        # problem is listed in one pass
        good = [i for i, h in enumerate(headers) if h is not None and h.shape == ref.shape
                and np.allclose(h.affine, ref.affine, atol=1e-3)]
        _, _, bad = _decode([headers[i] for i in good], ref, mask, progress)
        for j, n in bad.items():
            i = good[j]
            _nonfinite_problem(problems, mpath, i, headers[i].path, n)
        raise InputError(problems)

    cache_dir = settings.resolve(settings.cohort.get("cache")) or _cache.default_cache_dir()
    index = _cache.HashIndex(cache_dir)
    map_paths = [h.path for h in headers]
    inputs = {str(p): index.sha256(p) for p in map_paths}
    if mask_path is not None:
        inputs[str(mask_path)] = index.sha256(mask_path)
    for p in (ppath, mpath, settings.path):
        inputs[str(p)] = index.sha256(p)
    index.save()
    key = _cache.cache_key([inputs[str(p)] for p in map_paths]
                           + [inputs.get(str(mask_path), "nomask"), "v1"])

    hit = _cache.load_cached(cache_dir, key) if use_cache else None
    if hit is not None:
        Y, meta = hit
        grid_mask = np.zeros(ref.shape[:3], bool)
        grid_mask.reshape(-1)[np.asarray(meta["flat_index"], dtype=np.int64)] = True
        grid = Grid.from_mask(grid_mask, ref.affine)
        bad = meta.get("nonfinite", {})
        cache_hit = True
    else:
        Y, grid, bad = _decode(headers, ref, mask, progress)
        cache_hit = False
        if not bad:
            Y = _cache.store(cache_dir, key, Y,
                             {"flat_index": grid.flat_index.tolist(), "nonfinite": {}})
    for i, n in sorted(bad.items(), key=lambda kv: int(kv[0])):
        i = int(i)
        _nonfinite_problem(problems, mpath, i, map_paths[i], n)
    if grid.n_sources == 0:
        problems.add(mpath, "no source is finite in every map", "give a mask")
    if problems:
        raise InputError(problems)
    if atlas is not None:
        for key in ("atlas", "atlas_labels"):
            p = settings.resolve(settings.cohort[key])
            inputs[str(p)] = index.sha256(p)
    return Cohort(participants=parts.set_index(ID, drop=False), maps=maps, grid=grid,
                  time_axis=time_axis, Y=Y, inputs=inputs, cache_hit=cache_hit, atlas=atlas)


def _nonfinite_problem(problems, mpath, row, path, n):
    problems.add(f"{mpath} row {row + 2} ({path})", f"{n} NaN/Inf value(s) inside the mask",
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
        data = np.asanyarray(h.image.dataobj)
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
            idx = pd.to_numeric(table["index"], errors="coerce")
            for i in np.nonzero(idx.isna().to_numpy())[0]:
                problems.add(f"{lpath} row {i + 2}", f"index {table['index'][i]!r} is not an integer",
                             "give the label's integer value")
            names = {int(k): str(v) for k, v in zip(idx, table["name"]) if not pd.isna(k)}
    if labels is not None and names is not None:
        unknown = sorted(set(np.unique(labels).tolist()) - set(names) - {0})
        if unknown:
            problems.add(lpath, f"labels {unknown[:10]} occur in the atlas but not in the table",
                         "add a row for each label (0 means unlabelled)")
    if len(problems) > n_before:
        return None
    return {"labels": labels, "names": names}


def _decode(headers, ref, mask, progress):
    from tqdm.auto import tqdm
    if progress is None:
        progress = sys.stderr.isatty()
    n_t = ref.shape[3]
    if mask is None:
        # default mask: sources finite (and not constantly zero) in every map
        mask = np.ones(ref.shape[:3], bool)
        for h in tqdm(headers, desc="scanning maps", unit="map", disable=not progress):
            data = np.asanyarray(h.image.dataobj, dtype=np.float32)
            mask &= np.isfinite(data).all(axis=3)
            mask &= ~(data == 0).all(axis=3)
    grid = Grid.from_mask(mask, ref.affine)
    Y = np.empty((len(headers), grid.n_sources, n_t), dtype=np.float32)
    flat = grid.flat_index
    bad = {}
    for i, h in enumerate(tqdm(headers, desc="loading maps", unit="map", disable=not progress)):
        read_sources(h, flat, Y[i])
        nonfinite = int((~np.isfinite(Y[i])).sum())
        if nonfinite:
            bad[i] = nonfinite
    return Y, grid, bad


def summary(cohort: Cohort, settings: Settings) -> dict:
    """Short description of a loaded cohort (printed by ``groupsrc check``)."""
    parts = cohort.participants
    out = {"participants": int(len(parts)), "maps": cohort.n_maps,
           "sources": cohort.grid.n_sources, "samples": cohort.time_axis.n,
           "time_range_ms": [round(cohort.time_axis.times[0] * 1e3, 3),
                             round(cohort.time_axis.times[-1] * 1e3, 3)],
           "sampling_interval_ms": round(cohort.time_axis.dt * 1e3, 6),
           "voxel_size_mm": [round(float(v), 3) for v in cohort.grid.voxel_size]}
    if "group" in parts.columns:
        out["per_group"] = {str(k): int(v) for k, v in parts["group"].value_counts().sort_index().items()}
    within = settings.model.get("within")
    if within:
        out["conditions"] = sorted(map(str, cohort.maps[within].unique()))
    if "session" in cohort.maps.columns:
        out["sessions"] = sorted(map(str, cohort.maps["session"].unique()))
    return out
