"""The CIFTI-2 checks of a surface cohort: files, cortex vertices, volume parts.

Used by :mod:`.surface_cohort` when the maps table names CIFTI-2 dense time
series in its ``path`` column.  All files must carry the same brain models:
each cortex with the template mesh's vertex count and the same vertices
present, and the same volume parts (structures, voxel indices, one volume
shape and affine); the reference is what most files hold.  Every function
adds its problems to a :class:`~groupsrc.inputs.problems.ProblemList`, naming
the file and the structure, and drops the files it cannot use.
"""

from __future__ import annotations

import numpy as np

from ..formats import cifti
from ..formats.nifti import affine_difference
from .surface_checks import _majority, _read
from .tables import map_path
from .tables import MISSING

FIX_MODELS = ("write every map with the same brain models (the same cortex vertices, and "
              "the same voxels of the same volume parts in one volume)")


def cifti_headers(maps, mpath, meshes, problems):
    """{(line, None): CiftiHeader} of files fit to read; problems for the others."""
    headers = {}
    for line in maps.index:
        rel = maps.at[line, "path"]
        where = f"{mpath} row {line}"
        if rel in MISSING:
            problems.add(where, "empty path", "give the map file, relative to the maps table")
            continue
        p = map_path(mpath, rel)
        h = _read(p, f"{where} ({p})", problems, "cifti")
        if h is None:
            continue
        bad = False
        for hemi, mesh in meshes.items():
            if hemi not in h.parts:
                problems.add(f"{where} ({p})", f"holds no {cifti.STRUCTURES[hemi]}",
                             f"give files with both hemispheres, or leave mesh_{hemi} out")
                bad = True
            elif h.parts[hemi][0] != mesh.n:
                problems.add(f"{where} ({p})", f"its {hemi} surface has {h.parts[hemi][0]} "
                             f"vertices; mesh_{hemi} has {mesh.n}",
                             "map every participant onto the template mesh")
                bad = True
        if h.voxels:
            try:
                cifti.voxel_parts(h)
            except ValueError as exc:
                problems.add(f"{where} ({p})", f"its volume parts cannot be used: {exc}",
                             FIX_MODELS)
                bad = True
        if not bad:
            headers[(line, None)] = h
    _check_cifti_vertices(headers, mpath, meshes, problems)
    _check_cifti_volumes(headers, mpath, problems)
    return headers


def _check_cifti_vertices(headers, mpath, meshes, problems):
    """Every CIFTI-2 file holds the same vertices of each hemisphere (the majority's)."""
    for hemi in meshes:
        keys = list(headers)
        sets = [headers[k].parts[hemi][1].tobytes() for k in keys]
        if not sets:
            continue
        ref = _majority(sets)
        for k, s in zip(keys, sets):
            if s != ref:
                h = headers.pop(k)
                problems.add(f"{mpath} row {k[0]} ({h.path})",
                             vertex_difference(hemi, h.parts[hemi][1],
                                               np.frombuffer(ref, np.int64)),
                             FIX_MODELS)


def vertex_difference(hemi, mine, most) -> str:
    """How one file's vertices of a hemisphere differ from most maps' (indices into the
    mesh), with a few of each kind named."""
    mine, most = np.asarray(mine, np.int64), np.asarray(most, np.int64)
    missing = np.setdiff1d(most, mine)
    extra = np.setdiff1d(mine, most)

    def some(a):
        shown = ", ".join(str(int(x)) for x in a[:5])
        return shown + (", ..." if a.size > 5 else "")
    parts = []
    if missing.size:
        parts.append(f"{missing.size} of most maps' vertices are not in it (e.g. {some(missing)})")
    if extra.size:
        parts.append(f"it has {extra.size} vertices most maps lack (e.g. {some(extra)})")
    if not parts:
        parts.append("the same vertices in another order")
    count = (f"{mine.size} {hemi} vertices, as most maps do, but not the same ones"
             if mine.size == most.size else f"{mine.size} {hemi} vertices, most maps {most.size}")
    return f"holds {count}: " + "; ".join(parts)


def _voxel_signature(h):
    return tuple(sorted((name, ijk.tobytes()) for name, ijk in h.voxels.items()))


def _check_cifti_volumes(headers, mpath, problems):
    """Every CIFTI-2 file holds the same volume parts as most maps: the same
    structures, the same voxels of each, in the same volume (shape and affine).

    One problem per differing structure, naming the file; such files are not read.
    """
    keys = list(headers)
    if not keys:
        return
    sigs = [_voxel_signature(headers[k]) for k in keys]
    ref_sig = _majority(sigs)
    ref = headers[keys[sigs.index(ref_sig)]]
    for k, sig in zip(keys, sigs):
        h = headers[k]
        where = f"{mpath} row {k[0]} ({h.path})"
        found = []
        if sig != ref_sig:
            for name, ijk in ref.voxels.items():
                if name not in h.voxels:
                    found.append(f"lacks the volume part {name} ({len(ijk)} voxels) that most "
                                 "maps hold")
                elif not np.array_equal(h.voxels[name], ijk):
                    n = len(h.voxels[name])
                    found.append(f"its volume part {name} holds other voxels than most maps' ("
                                 + (f"{n} voxels, most maps {len(ijk)})" if n != len(ijk) else
                                    f"{n} voxels each, not the same voxel indices)"))
            for name, ijk in h.voxels.items():
                if name not in ref.voxels:
                    found.append(f"holds a volume part {name} ({len(ijk)} voxels) that most "
                                 "maps do not")
        elif h.voxels and (h.volume_shape != ref.volume_shape
                           or not np.allclose(h.volume_affine, ref.volume_affine, atol=1e-3)):
            what = (f"shape {h.volume_shape}, most maps {ref.volume_shape}"
                    if h.volume_shape != ref.volume_shape else
                    affine_difference(h.volume_affine, ref.volume_affine))
            found.append(f"its volume parts ({', '.join(h.voxels)}) lie in another volume "
                         f"than most maps' ({what})")
        for what in found:
            problems.add(where, what, FIX_MODELS)
        if found:
            headers.pop(k)
