"""Where a source is, for the tables: hemisphere and vertex, or volume part and voxel.

:func:`mesh_place` gives the location columns of one source of a surface
(``hemisphere``, ``vertex``, and with CIFTI-2 volume parts ``structure``,
``i``, ``j``, ``k``; None where a column does not apply, written ``n/a``);
:func:`nullable_ints` keeps such integer columns integers.  Used by
:mod:`.tables`.
"""

from __future__ import annotations

import pandas as pd

#: integer columns that may be n/a (written as integers, not as floats)
OPTIONAL_INTS = ("peak_vertex", "peak_i", "peak_j", "peak_k", "vertex", "i", "j", "k")


def mesh_place(space, s) -> dict:
    """Where source ``s`` is on a surface: {'hemisphere', 'vertex'}, and with volume
    parts {'structure', 'i', 'j', 'k'} too (None where not applicable); {} on a volume."""
    if getattr(space, "kind", "volume") != "surface":
        return {}
    if getattr(space, "voxels", None) is None:
        lab = space.labels()
        return {"hemisphere": str(lab.hemisphere.iat[s]), "vertex": int(lab.vertex.iat[s])}
    n = space.n_surface_sources
    if s < n:
        lab = space.labels()
        return {"hemisphere": str(lab.hemisphere.iat[s]), "vertex": int(lab.vertex.iat[s]),
                "structure": None, "i": None, "j": None, "k": None}
    m = s - n
    i, j, k = (int(x) for x in space.voxels.ijk[m])
    return {"hemisphere": None, "vertex": None,
            "structure": space.voxels.names[space.voxels.structure_index[m]],
            "i": i, "j": j, "k": k}


def nullable_ints(frame: pd.DataFrame) -> pd.DataFrame:
    """Optional integer columns as nullable integers (n/a, not 12.0)."""
    for c in OPTIONAL_INTS:
        if c in frame.columns:
            frame[c] = pd.array(frame[c].tolist(), dtype="Int64")
    return frame
