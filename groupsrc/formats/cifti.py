"""CIFTI-2: both hemispheres in one file (nibabel.cifti2).

A CIFTI-2 file (CIFTI-2 specification, 2014) is a NIfTI-2 file whose
extension describes each axis of its 2D data matrix.  A dense time series
(``.dtseries.nii``) has a *series* axis (start, step, unit) along rows and a
*brain-model* axis along columns: for each structure, the vertices of a
surface (``CIFTI_STRUCTURE_CORTEX_LEFT`` / ``_RIGHT``, with the vertex count
of the whole surface and the indices of the vertices present, e.g. without
the medial wall) or voxels of a volume (voxel indices i, j, k in one volume
whose shape and voxel -> world affine the axis carries once for every
volume part).

Reading (the input edge)
------------------------
Headers are read lazily; the time axis comes from the series axis (unit
``SECOND`` required; a ``time_start`` / ``sampling_interval`` in the
analysis file overrides it).  Read: the two cortex surfaces and every
volume part (any structure given as voxels: subcortical structures,
cerebellum).  Any other structure (a surface other than the two cortices)
is listed as ignored, never read silently as cortex.  Values come back per
hemisphere on every vertex of the surface, NaN where the file has no value
(those vertices are not sources), and per volume part in the file's voxel
order, under the part's structure name.

Writing (results)
-----------------
Result maps of a surface whose maps came as CIFTI-2 are written on the
sources only (brain models of the two cortex structures, vertex counts of
the template meshes, then the volume parts with the inputs' voxels, volume
shape and affine; the cortex comes first whatever the inputs' order):

* ``<stem>.dtseries.nii`` -- statistic, estimate, standard error, effect
  size and p maps over time (intent ``NIFTI_INTENT_CONNECTIVITY_DENSE_SERIES``,
  series axis in seconds).  The NIfTI intent of a CIFTI file names its
  axes, so the statistic's kind and degrees of freedom go to the matrix
  metadata as ``statistic`` (t, F), ``intent_p1`` and ``intent_p2`` (our
  names), next to ``map`` (what the file holds);
* ``<stem>.dlabel.nii`` -- cluster labels, one label map per sample, each
  with the label table (intent ``NIFTI_INTENT_CONNECTIVITY_DENSE_LABELS``);
* ``<stem>.dscalar.nii`` -- a single map (intent
  ``NIFTI_INTENT_CONNECTIVITY_DENSE_SCALARS``).

:func:`structure_image` labels every source with its structure (one dense
label map); the results folder keeps it so the volume parts can be read
back (:func:`voxel_parts`).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import nibabel as nib
import numpy as np
from nibabel import cifti2

from ..atomic import write_bytes
from ..sources.timeaxis import TimeAxis
from ..sources.voxels import VoxelParts
from .gifti import LABEL_COLOURS, DecodeError

SUFFIXES = (".dtseries.nii",)
#: other CIFTI-2 file kinds (by the name ending the standard gives them): not input maps
OTHER_KINDS = {".dscalar.nii": "dense scalar", ".dlabel.nii": "dense label",
               ".dconn.nii": "dense connectivity", ".ptseries.nii": "parcellated time series",
               ".pscalar.nii": "parcellated scalar", ".pconn.nii": "parcellated connectivity",
               ".pdconn.nii": "parcel-dense connectivity",
               ".dpconn.nii": "dense-parcel connectivity"}

#: CIFTI-2 brain-structure names of the two cortical hemispheres
STRUCTURES = {"left": "CIFTI_STRUCTURE_CORTEX_LEFT", "right": "CIFTI_STRUCTURE_CORTEX_RIGHT"}
_HEMI_OF = {v: k for k, v in STRUCTURES.items()}


@dataclass
class CiftiHeader:
    """What the checks need of one CIFTI-2 dense time series."""

    path: Path
    n_times: int                 # rows: samples of a series, maps of a scalar / label file
    time_axis: TimeAxis | None   # None for a scalar or label file (read_header(rows="any"))
    #: hemisphere -> (vertex count of the whole surface, indices of the vertices present)
    parts: dict
    #: structures not read (surfaces other than the cortex): name -> number of elements
    ignored: dict = field(default_factory=dict)
    image: object = None
    format: str = "cifti"
    #: volume parts: structure name -> (n, 3) voxel indices, in the file's order
    voxels: dict = field(default_factory=dict)
    #: the volume of the volume parts: voxel -> world affine (4, 4) and shape (None without)
    volume_affine: np.ndarray | None = None
    volume_shape: tuple | None = None

    @property
    def shape(self) -> tuple:
        return (self.n_times, int(sum(len(v) for _, v in self.parts.values())
                                  + sum(len(v) for v in self.voxels.values())))


def read_header(path, rows="series") -> CiftiHeader:
    """Inspect a dense file lazily; ValueError with a readable reason.

    ``rows="series"`` (the maps): a dense time series, with at least one
    cortex surface.  ``rows="any"`` (a region mask): also a dense scalar or
    label file (rows of one map each, ``time_axis`` None), and volume parts
    without a cortex surface.  :func:`read_data` reads either.
    """
    path = Path(path)
    if not path.exists():
        raise FileNotFoundError("file not found")
    if path.is_dir():
        raise ValueError("is a folder, not a CIFTI-2 file")
    try:
        img = nib.load(str(path))
    except Exception as exc:
        raise ValueError(f"cannot be read as CIFTI-2 ({type(exc).__name__}: {exc})") from None
    if not isinstance(img, cifti2.Cifti2Image):
        raise ValueError(f"is a {type(img).__name__}, not a CIFTI-2 file")
    try:
        series, models = img.header.get_axis(0), img.header.get_axis(1)
    except Exception as exc:
        raise ValueError(f"its CIFTI-2 axes cannot be read ({type(exc).__name__}: {exc})") from None
    row_axes = (cifti2.SeriesAxis,) if rows == "series" else (
        cifti2.SeriesAxis, cifti2.ScalarAxis, cifti2.LabelAxis)
    if not isinstance(series, row_axes) or not isinstance(models, cifti2.BrainModelAxis):
        raise ValueError(f"has axes {type(series).__name__} x {type(models).__name__}; a dense "
                         + ("time series (series x brain models)" if rows == "series" else
                            "file (series, scalars or labels x brain models)") + " is expected")
    is_series = isinstance(series, cifti2.SeriesAxis)
    if is_series and series.unit != "SECOND":
        raise ValueError(f"its series axis runs in {series.unit}, not SECOND")
    parts, voxels, ignored = {}, {}, {}
    for name, slc, bm in models.iter_structures():
        hemi = _HEMI_OF.get(name)
        if name in parts or name in voxels or (hemi is not None and hemi in parts):
            raise ValueError(f"lists {name} in more than one place on its brain-model axis")
        if bm.volume_mask.all():
            voxels[name] = np.asarray(bm.voxel, dtype=np.int64)
        elif hemi is not None and bm.surface_mask.all():
            parts[hemi] = (int(bm.nvertices[name]), np.asarray(bm.vertex, dtype=np.int64))
        else:
            ignored[name] = int(len(bm))
    if not parts and (rows == "series" or not voxels):
        raise ValueError("holds no cortex surface (CIFTI_STRUCTURE_CORTEX_LEFT / _RIGHT)")
    taxis = TimeAxis(float(series.start), float(series.step), int(series.size)) \
        if is_series else None
    affine = np.asarray(models.affine, float) if voxels else None
    shape = tuple(int(n) for n in models.volume_shape) if voxels else None
    return CiftiHeader(path, int(series.size), taxis, parts, ignored, img, voxels=voxels,
                       volume_affine=affine, volume_shape=shape)


def voxel_parts(models) -> VoxelParts | None:
    """The volume parts of a brain-model axis (or a CiftiHeader), or None without any."""
    if isinstance(models, CiftiHeader):
        if not models.voxels:
            return None
        return VoxelParts.from_parts(models.volume_affine, models.volume_shape,
                                     list(models.voxels.items()))
    parts = [(name, np.asarray(bm.voxel, np.int64)) for name, _, bm in models.iter_structures()
             if bm.volume_mask.all()]
    if not parts:
        return None
    return VoxelParts.from_parts(models.affine, models.volume_shape, parts)


def read_data(header: CiftiHeader, dtype=np.float32) -> dict:
    """{hemisphere: (V, T) values on every vertex, NaN where the file has none;
    volume part's structure name: (n, T) values at its voxels, in the file's order}."""
    try:
        img = nib.load(str(header.path))
        data = np.asarray(img.dataobj, dtype=dtype)
        models = img.header.get_axis(1)
        out = {}
        for name, slc, bm in models.iter_structures():
            if name in header.voxels:
                if not np.array_equal(bm.voxel, header.voxels[name]):
                    raise ValueError("the brain models changed since the header was read")
                out[name] = np.ascontiguousarray(data[:, slc].T)
                continue
            hemi = _HEMI_OF.get(name)
            if hemi not in header.parts:
                continue
            n, present = header.parts[hemi]
            if bm.nvertices[name] != n or not np.array_equal(bm.vertex, present):
                raise ValueError("the brain models changed since the header was read")
            full = np.full((n, data.shape[0]), np.nan, dtype=dtype)
            full[present] = data[:, slc].T
            out[hemi] = full
    except MemoryError:
        raise
    except Exception as exc:
        raise DecodeError(f"data cannot be decoded ({type(exc).__name__}: {exc})") from None
    return out


# ----------------------------------------------------------------------------
# writing
# ----------------------------------------------------------------------------

def brain_models(space) -> cifti2.BrainModelAxis:
    """The brain-model axis of a surface source space's sources (left, right, then
    the volume parts in their order)."""
    axis = None
    for h in space.hemispheres:
        part = cifti2.BrainModelAxis.from_surface(h.sources, h.n_vertices, STRUCTURES[h.name])
        axis = part if axis is None else axis + part
    vox = getattr(space, "voxels", None)
    for name, ijk in (vox.parts if vox is not None else ()):
        axis = axis + cifti2.BrainModelAxis(name=[name] * len(ijk), voxel=ijk,
                                            affine=vox.affine, volume_shape=vox.shape)
    return axis


def source_structures(space) -> dict:
    """{key: CIFTI-2 structure name} of the space's parts, keys from 1 in source order."""
    names = [STRUCTURES[h.name] for h in space.hemispheres]
    vox = getattr(space, "voxels", None)
    names += list(vox.names) if vox is not None else []
    return {k + 1: n for k, n in enumerate(names)}


def structure_keys(space) -> np.ndarray:
    """(n_sources,) int: each source's key in :func:`source_structures`."""
    sizes = [h.sources.size for h in space.hemispheres]
    vox = getattr(space, "voxels", None)
    sizes += [ijk.shape[0] for _, ijk in vox.parts] if vox is not None else []
    return np.repeat(np.arange(1, len(sizes) + 1), sizes)


def structure_image(space) -> cifti2.Cifti2Image:
    """One dense label map: every source labelled with its CIFTI-2 structure."""
    names = {0: "none", **source_structures(space)}
    axis = cifti2.LabelAxis(["structure"], [label_dict(names)])
    return _image(structure_keys(space).reshape(1, -1).astype(np.int32), axis, space,
                  "NIFTI_INTENT_CONNECTIVITY_DENSE_LABELS", {"map": "structure of each source"})


def _image(data, row_axis, space, intent, meta) -> cifti2.Cifti2Image:
    header = cifti2.Cifti2Header.from_axes((row_axis, brain_models(space)))
    if meta:
        header.matrix.metadata = cifti2.Cifti2MetaData({k: str(v) for k, v in meta.items()})
    img = cifti2.Cifti2Image(np.asarray(data), header)
    img.nifti_header.set_intent(intent)
    return img


def series_image(values, space, time_axis, meta=None, dtype=np.float32) -> cifti2.Cifti2Image:
    """Per-source values (n_sources, T) as a dense time series (T x sources)."""
    v = np.asarray(values, dtype=dtype).reshape(space.n_sources, -1)
    series = cifti2.SeriesAxis(start=float(time_axis.t0), step=float(time_axis.dt),
                               size=v.shape[1], unit="SECOND")
    return _image(v.T, series, space, "NIFTI_INTENT_CONNECTIVITY_DENSE_SERIES", meta)


def scalar_image(values, space, name, meta=None) -> cifti2.Cifti2Image:
    """Per-source values (n_sources,) as one dense scalar map."""
    v = np.asarray(values, dtype=np.float32).reshape(1, -1)
    return _image(v, cifti2.ScalarAxis([name]), space,
                  "NIFTI_INTENT_CONNECTIVITY_DENSE_SCALARS", meta)


def _rgba(hexcode):
    h = hexcode.lstrip("#")
    return tuple(int(h[i:i + 2], 16) / 255 for i in (0, 2, 4)) + (1.0,)


def label_dict(names: dict) -> dict:
    """{key: (name, rgba)}: key 0 transparent, others from LABEL_COLOURS in turn."""
    out = {}
    for j, (key, text) in enumerate(sorted(names.items())):
        rgba = (1.0, 1.0, 1.0, 0.0) if key == 0 else _rgba(LABEL_COLOURS[(j - 1) % len(LABEL_COLOURS)])
        out[int(key)] = (str(text), rgba)
    return out


def label_image(labels, space, names: dict, time_axis, meta=None) -> cifti2.Cifti2Image:
    """Per-source labels (n_sources, T) as dense label maps, one per sample."""
    lab = np.asarray(labels).reshape(space.n_sources, -1).astype(np.int32)
    table = label_dict(names)
    t = time_axis.times[:lab.shape[1]] if time_axis is not None else np.zeros(lab.shape[1])
    axis = cifti2.LabelAxis([f"{s * 1e3:.6g} ms" for s in t], [table] * lab.shape[1])
    return _image(lab.T, axis, space, "NIFTI_INTENT_CONNECTIVITY_DENSE_LABELS", meta)


def save(path, img) -> Path:
    """Write a CIFTI-2 image atomically."""
    return write_bytes(path, img.to_bytes())


def load_values(path, space) -> tuple:
    """(per-source values (n_sources, rows), the image) of a file written for ``space``.

    Raises FileNotFoundError, or ValueError when its brain models are not the
    space's sources (not compared when ``space`` is None).
    """
    path = Path(path)
    if not path.exists():
        raise FileNotFoundError(str(path))
    img = nib.load(str(path))
    models = img.header.get_axis(1)
    if space is not None and models != brain_models(space):
        raise ValueError("its brain models are not the sources of this surface")
    return np.asarray(img.dataobj).T, img
