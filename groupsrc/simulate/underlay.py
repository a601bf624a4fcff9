"""The demo's anatomical underlay: a synthetic head of our own, T1-like contrast.

Not anybody's anatomy: nested ellipsoids around the demo's spherical source
space -- scalp (bright), skull (dark), a thin layer of fluid (dark grey), grey
matter whose outer surface is folded by a few sinusoids, white matter
(brightest), two ventricles (dark) -- and a nose, so the head has a front.
Deterministic (no random numbers), so builds stay byte-identical.

It lies on its own grid, not the template's: 2.5 mm voxels with the x axis
flipped (voxel i grows to the left) and its own origin, so that the
analysis exercises the resampling of an underlay from any grid with an affine.
Values are uint8 (0..250).
"""

from __future__ import annotations

import numpy as np

VOXEL_MM = 2.5
#: half-extent of the image (mm): the head fits inside
HALF_MM = 112.5
#: T1-like intensities (0..250)
SCALP, SKULL, FLUID, GREY, WHITE = 170, 25, 45, 130, 215


def underlay_affine() -> np.ndarray:
    """2.5 mm voxels, x flipped (i grows to the left), origin at the image's corner."""
    n = int(round(2 * HALF_MM / VOXEL_MM)) + 1
    a = np.diag([-VOXEL_MM, VOXEL_MM, VOXEL_MM, 1.0])
    a[:3, 3] = [HALF_MM, -HALF_MM, -HALF_MM + 10.0]      # the head sits a little low
    return a, (n, n, n)


def head_image(brain_radius_mm: float) -> tuple:
    """(uint8 image, affine) of the synthetic head around a source space of radius
    ``brain_radius_mm``."""
    affine, shape = underlay_affine()
    ijk = np.indices(shape).reshape(3, -1).T.astype(float)
    xyz = ijk @ affine[:3, :3].T + affine[:3, 3]
    x, y, z = xyz.T
    # brain: semi-axes a little beyond the source sphere, longer front to back
    b = np.array([1.06, 1.2, 1.04]) * brain_radius_mm
    r = np.sqrt((x / b[0]) ** 2 + (y / b[1]) ** 2 + (z / b[2]) ** 2)
    theta = np.arctan2(np.hypot(x, y), z)
    phi = np.arctan2(y, x)
    folds = 0.035 * np.sin(7 * theta) * np.sin(6 * phi) + 0.02 * np.sin(11 * theta + 3 * phi)
    img = np.zeros(r.shape, np.float32)
    shell = 1.0 + 10.0 / brain_radius_mm                 # ~10 mm of fluid and skull
    head = (r <= shell + 8.0 / brain_radius_mm) & (z > -0.9 * b[2] - 25)
    img[head] = SCALP
    img[r <= shell] = SKULL
    img[r <= 1.0 + 3.0 / brain_radius_mm] = FLUID
    img[r <= 1.0 + folds] = GREY
    img[r <= 0.82 + 0.6 * folds] = WHITE
    # ventricles: two small ellipsoids either side of the midline
    for side in (-1, 1):
        v = (((x - side * 9) / 7) ** 2 + ((y - 5) / 24) ** 2 + ((z - 12) / 9) ** 2)
        img[v <= 1] = FLUID
    # a nose at the front, below the brain
    nose = (((x) / 12) ** 2 + ((y - 0.95 * b[1] - 22) / 14) ** 2
            + ((z + 0.35 * b[2]) / 22) ** 2) <= 1
    img[nose & (img == 0)] = SCALP
    return img.reshape(shape).astype(np.uint8), affine
