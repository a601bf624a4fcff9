"""The optional anatomical underlay (``[cohort] underlay``): read, checked, resampled.

The file is a 3D NIfTI (a 4D file with one volume is accepted) on any grid with
an affine -- the template's own grid, a finer anatomical image, oblique or
flipped axes.  It is resampled onto a display grid over the template's box
(:mod:`groupsrc.sources.underlay`) and drawn under the volume figures only.
Problems, each naming the file: missing or unreadable, not 3D, an affine that
cannot be inverted, no finite value, or an image that does not reach the
template's sources; an underlay on a surface analysis.  Non-finite values are
background (0), as outside the image.
"""

from __future__ import annotations

import hashlib

import numpy as np

from ..formats import nifti
from ..sources.underlay import Underlay, overlap, underlay_for, voxel_sizes
from .problems import ProblemList

FIX_FILE = ("give a 3D anatomical NIfTI image (.nii or .nii.gz) in world mm, e.g. the "
            "template's T1 image, or remove the underlay key")


def read_underlay(settings, grid, problems: ProblemList, inputs=None) -> Underlay | None:
    """The display underlay of a volume analysis, or None without one; problems are
    added to ``problems``; the file's sha256 is added to ``inputs`` (path -> hash)."""
    rel = settings.cohort.get("underlay")
    if rel is None:
        return None
    path = settings.resolve(rel)
    where = f"{settings.path} [cohort] underlay"
    if getattr(grid, "kind", "volume") != "volume":
        problems.add(where, "an underlay is drawn under volume maps only, and this is a "
                     "surface analysis", "remove the underlay key")
        return None
    try:
        header = nifti.read_header(path)
        data = nifti.read_data(header, np.float32)
    except FileNotFoundError:
        problems.add(path, "the underlay file does not exist", FIX_FILE)
        return None
    except ValueError as exc:
        problems.add(path, f"the underlay {exc}", FIX_FILE)
        return None
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    if data.ndim != 3:
        problems.add(path, f"the underlay must be a 3D image, got shape {data.shape}",
                     FIX_FILE)
        return None
    affine = np.asarray(header.affine, float)
    if not np.all(np.isfinite(affine)) or abs(np.linalg.det(affine[:3, :3])) < 1e-9:
        problems.add(path, "the underlay's affine (voxel -> mm) cannot be inverted",
                     "write the image with a valid sform or qform")
        return None
    if not np.isfinite(data).any():
        problems.add(path, "the underlay holds no finite value", FIX_FILE)
        return None
    coords = grid.coords_mm
    lo, hi = coords.min(axis=0), coords.max(axis=0)
    if not overlap(data.shape, affine, lo, hi):
        problems.add(path, "the underlay does not reach the template's sources (its box "
                     f"in mm does not meet {np.round(lo, 1).tolist()} to "
                     f"{np.round(hi, 1).tolist()})",
                     "give an image in the template's world coordinates (mm)")
        return None
    if inputs is not None:
        inputs[str(path)] = hashlib.sha256(path.read_bytes()).hexdigest()
    return underlay_for(data, affine, lo, hi, voxel_sizes(grid.affine))
