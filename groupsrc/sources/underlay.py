"""An anatomical underlay for figures: an image resampled onto a display grid.

The user's anatomy (``[cohort] underlay``) may be on any grid with an affine
(voxel -> world mm; oblique or flipped axes included).  For drawing under a
volume template's maps it is resampled, by trilinear interpolation in world
coordinates, onto a *display grid*: axis-aligned (diagonal affine, positive
voxel sizes), covering the template grid's box plus a margin, with voxels a
quarter of the template's (at least 1 mm, never finer than the image's own).
Points outside the image are 0.  Format-free: the file is read by
:mod:`groupsrc.inputs.underlay` through :mod:`groupsrc.formats`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

#: display voxels per template voxel along each axis, the margin around the template's
#: box (mm), and the smallest display voxel (mm)
REFINE, MARGIN_MM, MIN_VOXEL_MM = 4, 30.0, 1.0
#: at most this many display voxels (memory of the figures)
MAX_VOXELS = 8_000_000


@dataclass(frozen=True)
class Underlay:
    """``values`` (3D float32, 0 outside the image) on ``affine`` (diagonal, positive
    voxel sizes, voxel -> world mm)."""

    values: np.ndarray
    affine: np.ndarray

    def axis_coords(self, i):
        a = np.asarray(self.affine, float)
        return a[i, i] * np.arange(self.values.shape[i]) + a[i, 3]


def voxel_sizes(affine) -> np.ndarray:
    return np.sqrt((np.asarray(affine, float)[:3, :3] ** 2).sum(axis=0))


def display_grid(box_lo, box_hi, template_voxel, image_voxel):
    """(shape, affine) of the display grid over the box [lo, hi] (mm)."""
    lo = np.asarray(box_lo, float) - MARGIN_MM
    hi = np.asarray(box_hi, float) + MARGIN_MM
    step = max(MIN_VOXEL_MM, float(np.min(template_voxel)) / REFINE,
               float(np.min(image_voxel)))
    shape = np.maximum(np.ceil((hi - lo) / step).astype(int) + 1, 1)
    while np.prod(shape.astype(float)) > MAX_VOXELS:
        step *= 1.25
        shape = np.maximum(np.ceil((hi - lo) / step).astype(int) + 1, 1)
    affine = np.diag([step, step, step, 1.0])
    affine[:3, 3] = lo
    return tuple(int(n) for n in shape), affine


def resample(image, image_affine, shape, affine) -> np.ndarray:
    """Trilinear values of ``image`` (3D) at the voxel centres of the grid
    (``shape``, ``affine``); 0 outside the image."""
    to_image = np.linalg.inv(np.asarray(image_affine, float)) @ np.asarray(affine, float)
    out = ndimage.affine_transform(np.asarray(image, np.float32), to_image[:3, :3],
                                   offset=to_image[:3, 3], output_shape=shape, order=1,
                                   mode="constant", cval=0.0)
    return out.astype(np.float32)


def underlay_for(image, image_affine, box_lo, box_hi, template_voxel) -> Underlay:
    """The display underlay of ``image`` for a template whose sources lie in the box."""
    img = np.where(np.isfinite(image), image, 0.0)
    shape, affine = display_grid(box_lo, box_hi, template_voxel, voxel_sizes(image_affine))
    return Underlay(resample(img, image_affine, shape, affine), affine)


def overlap(image_shape, image_affine, box_lo, box_hi) -> bool:
    """Whether the image's box meets the template's box (world mm)."""
    corners = np.array([[i, j, k, 1.0] for i in (0, image_shape[0] - 1)
                        for j in (0, image_shape[1] - 1) for k in (0, image_shape[2] - 1)])
    world = corners @ np.asarray(image_affine, float).T
    lo, hi = world[:, :3].min(axis=0), world[:, :3].max(axis=0)
    return bool(np.all(lo <= np.asarray(box_hi)) and np.all(hi >= np.asarray(box_lo)))
