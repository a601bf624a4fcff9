"""File formats: the only place that reads or writes map files.

One module per format (:mod:`.nifti` for volumes, :mod:`.gifti` and
:mod:`.cifti` for surfaces); :func:`format_for` picks the module that handles
a path by its suffix, trying the modules in order (CIFTI-2 first: a
``.dtseries.nii`` name also ends in ``.nii``).  Each format module provides, for
the input edge, ``read_header(path)`` (lazy, raises ValueError with a
readable reason), ``read_data(header)`` and ``time_axis_from_header``; and,
for results, a result-map class (``RESULT_MAPS``, by source-space kind) with
one method per map role (statistic, estimate, p_values, labels, ...), the
source-space files, and reading back per source for the report.
"""

from __future__ import annotations

from pathlib import Path

from . import cifti, gifti, nifti
from .surface_maps import SurfaceMaps

#: format modules, tried in order (CIFTI-2 before NIfTI: ".dtseries.nii" ends in ".nii");
#: each lists the file suffixes it reads
FORMATS = (cifti, gifti, nifti)


def format_for(path):
    """The format module for ``path`` (by suffix), or None when none reads it."""
    name = Path(path).name.lower()
    for fmt in FORMATS:
        if any(name.endswith(s) for s in fmt.SUFFIXES):
            return fmt
    return None


def known_suffixes() -> list:
    return [s for fmt in FORMATS for s in fmt.SUFFIXES]


def read_header(path):
    """Open a map file lazily through its format; ValueError for an unknown type."""
    name = Path(path).name.lower()
    kind = next((k for suffix, k in cifti.OTHER_KINDS.items() if name.endswith(suffix)), None)
    if kind is not None:
        raise ValueError(f"is a CIFTI-2 {kind} file, not a map over time (input maps are "
                         f"CIFTI-2 dense time series, .dtseries.nii, or NIfTI / GIfTI)")
    fmt = format_for(path)
    if fmt is None:
        p = Path(path)
        if not p.exists():
            raise FileNotFoundError("file not found")
        raise ValueError(f"is not a map file groupsrc reads (expected "
                         f"{', '.join(known_suffixes())})")
    return fmt.read_header(path)


def result_maps(space, time_axis=None):
    """The writer/reader of result maps for ``space`` (by its kind)."""
    maps = RESULT_MAPS.get(space.kind)
    if maps is None:
        raise ValueError(f"no result-map format for a {space.kind} source space")
    return maps(space, time_axis)


def result_maps_in(folder, kind, time_axis=None):
    """The result maps of a saved results folder whose source space is of ``kind``."""
    maps = RESULT_MAPS.get(kind)
    if maps is None:
        raise ValueError(f"no result-map format for a {kind} source space")
    return maps.read_space(folder, time_axis)


def expected_result_files(maps, summary: dict):
    """(space files, stem -> file names) that a saved folder of ``maps``' kind holds.

    A format whose file names depend on the saved space (a surface: which
    hemispheres, GIfTI or CIFTI-2) answers from the folder's summary; the
    others from their class constants.
    """
    if hasattr(maps, "expected_files"):
        return maps.expected_files(summary)
    return list(maps.SPACE_FILES), maps.files


#: result-map writers/readers by source-space kind
RESULT_MAPS = {"volume": nifti.VolumeMaps, "surface": SurfaceMaps}

__all__ = ["FORMATS", "RESULT_MAPS", "expected_result_files", "format_for", "known_suffixes",
           "read_header", "result_maps", "result_maps_in", "cifti", "gifti", "nifti"]
