"""GIfTI: per-hemisphere surface files -- meshes, maps, masks, labels (nibabel.gifti).

GIfTI Surface Data Format 1.0 (NIfTI Data Format Working Group) stores data
arrays, each with a NIfTI intent code (nifti1.h names), optional metadata
(name/value pairs) and, for label files, one label table per file.

Reading (the input edge)
------------------------
* **Mesh** (``.surf.gii``): one ``NIFTI_INTENT_POINTSET`` array (V, 3) of
  vertex coordinates, taken as mm as stored (the array's coordinate-system
  transform is not applied), and one ``NIFTI_INTENT_TRIANGLE`` array (F, 3)
  of vertex indices.
* **Map** (functional file, one per hemisphere): either one data array per
  sample, each (V,), or one 2D array (V, T); any intent but pointset,
  triangle and label.  GIfTI carries no time axis, so ``time_start`` and
  ``sampling_interval`` come from the analysis file.
* **Mask** (e.g. ``.shape.gii``): the first data array, (V,); a vertex is a
  source where it is finite and nonzero.
* **Label file** (``.label.gii``): the first data array, (V,) integers, and
  the file's label table (key -> name).
* The file-level metadata ``AnatomicalStructurePrimary`` (``CortexLeft`` or
  ``CortexRight``, GIfTI standard metadata, from memory) names the
  hemisphere when present; a file marked for the other hemisphere is a
  problem.

The whole file is parsed when a header is read (GIfTI is XML with encoded
arrays; there is no lazy reading), so a damaged file is reported then.

Writing (results and the demo)
------------------------------
Maps are written on every vertex of the template mesh (0 outside the source
mask; p maps 1), one data array per sample, float32, with the intent code of
the map and, where the intent has parameters, ``intent_p1`` / ``intent_p2``
in the array's metadata (the GIfTI standard's place for NIfTI intent
parameters, from memory):

=================  ==========================  ===========================
map                intent                      parameters (array metadata)
=================  ==========================  ===========================
t statistic        NIFTI_INTENT_TTEST          intent_p1 = df
F statistic        NIFTI_INTENT_FTEST          intent_p1 = df1, intent_p2 = df2
z (mixed model)    NIFTI_INTENT_ZSCORE         none (df per vertex: the df map)
p values           NIFTI_INTENT_PVAL           none
estimate, effect   NIFTI_INTENT_ESTIMATE       none
cluster labels     NIFTI_INTENT_LABEL (int32)  the file's label table
mesh               NIFTI_INTENT_POINTSET /     GeometricType = Anatomical
                   NIFTI_INTENT_TRIANGLE
=================  ==========================  ===========================

Each array's ``Name`` metadata names the map and its sample time.  The time
axis of a written map is kept in the file's metadata as ``time_start_s`` and
``sampling_interval_s`` (our names: the standard has no time axis), and read
back from there by :func:`read_time_axis`; an input map that states them
(README, "Writing your own maps") has its time axis read from them.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np
from nibabel.gifti import GiftiDataArray, GiftiImage, GiftiLabel, GiftiLabelTable, GiftiMetaData

from ..atomic import write_bytes
from ..sources.timeaxis import TimeAxis

SUFFIXES = (".gii",)

#: GIfTI AnatomicalStructurePrimary values of the two cortical hemispheres
STRUCTURES = {"left": "CortexLeft", "right": "CortexRight"}
_HEMI_OF = {v.lower(): k for k, v in STRUCTURES.items()}
#: our metadata names for the time axis of a written map (seconds)
TIME_START, TIME_STEP = "time_start_s", "sampling_interval_s"

_NOT_MAP = {"NIFTI_INTENT_POINTSET": "a mesh file (vertex coordinates)",
            "NIFTI_INTENT_TRIANGLE": "a mesh file (triangles)",
            "NIFTI_INTENT_LABEL": "a label file"}


class DecodeError(ValueError):
    """The file's header was read but its data cannot be decoded."""

    fix = "the file is truncated or damaged: write it again (re-export it)"


def _intent(darray) -> str:
    return nib.nifti1.intent_codes.niistring[darray.intent]


def _load(path) -> GiftiImage:
    path = Path(path)
    if not path.exists():
        raise FileNotFoundError("file not found")
    if path.is_dir():
        raise ValueError("is a folder, not a GIfTI file")
    try:
        img = nib.load(str(path))
    except Exception as exc:  # XML, base64, zlib and nibabel errors all mean unreadable
        raise ValueError(f"cannot be read as GIfTI ({type(exc).__name__}: {exc})") from None
    if not isinstance(img, GiftiImage):
        raise ValueError(f"is a {type(img).__name__}, not GIfTI")
    return img


def structure_of(img) -> str | None:
    """'left' / 'right' from AnatomicalStructurePrimary, None when absent or another."""
    value = str(dict(img.meta).get("AnatomicalStructurePrimary", "")).strip().lower()
    return _HEMI_OF.get(value)


# ----------------------------------------------------------------------------
# reading maps
# ----------------------------------------------------------------------------

@dataclass
class GiftiHeader:
    """What the checks need of one GIfTI map file (its data are read again later)."""

    path: Path
    n_vertices: int
    n_times: int
    structure: str | None        # hemisphere named by the file's metadata
    layout: str                  # "arrays" (one per sample) or "matrix" (one (V, T) array)
    format: str = "gifti"
    #: GIfTI has none; ours (``time_start_s``, ``sampling_interval_s``) when the file states it
    time_axis: TimeAxis | None = None

    @property
    def shape(self) -> tuple:
        return (self.n_vertices, self.n_times)


def _map_arrays(img, path):
    """The data arrays of a map file, or ValueError saying why it is not one."""
    arrays = list(img.darrays)
    if not arrays:
        raise ValueError("holds no data array")
    for d in arrays:
        what = _NOT_MAP.get(_intent(d))
        if what:
            raise ValueError(f"is {what}, not a map (intent {_intent(d)})")
    return arrays


def read_header(path) -> GiftiHeader:
    """Inspect a GIfTI map file; ValueError with a readable reason when it is not one."""
    img = _load(path)
    arrays = _map_arrays(img, path)
    shapes = [tuple(np.shape(d.data)) for d in arrays]
    if len(arrays) == 1 and len(shapes[0]) == 2:
        n, t = shapes[0]
        layout = "matrix"
    elif all(len(s) == 1 for s in shapes):
        lengths = sorted({s[0] for s in shapes})
        if len(lengths) > 1:
            raise ValueError(f"its {len(arrays)} data arrays differ in length ({lengths[:4]}); "
                             "one array per sample must each hold one value per vertex")
        n, t, layout = lengths[0], len(arrays), "arrays"
    else:
        raise ValueError(f"data arrays of shapes {shapes[:3]}: expected one array per sample "
                         "(vertices,) or one array (vertices, samples)")
    return GiftiHeader(Path(path), int(n), int(t), structure_of(img), layout,
                       time_axis=_stated_time_axis(img, int(t)))


def _stated_time_axis(img, n) -> TimeAxis | None:
    """The time axis a map's metadata states (``time_start_s``, ``sampling_interval_s``,
    as groupsrc writes them and README's recipe does), or None when it states none."""
    meta = dict(img.meta)
    try:
        return TimeAxis(float(meta[TIME_START]), float(meta[TIME_STEP]), n)
    except (KeyError, TypeError, ValueError):
        return None


def read_data(header: GiftiHeader, dtype=np.float32) -> np.ndarray:
    """The map's values (V, T) as ``dtype``; DecodeError when the file changed or broke."""
    try:
        img = _load(header.path)
        arrays = _map_arrays(img, header.path)
        if header.layout == "matrix":
            data = np.asarray(arrays[0].data, dtype=dtype)
        else:
            data = np.column_stack([np.asarray(d.data, dtype=dtype).reshape(-1) for d in arrays])
    except MemoryError:
        raise
    except Exception as exc:
        raise DecodeError(f"data cannot be decoded ({type(exc).__name__}: {exc})") from None
    if data.shape != header.shape:
        raise DecodeError(f"decoded shape {data.shape} differs from the first reading's "
                          f"{header.shape}")
    return data


# ----------------------------------------------------------------------------
# reading meshes, masks, labels
# ----------------------------------------------------------------------------

def _first(img, intent):
    for d in img.darrays:
        if _intent(d) == intent:
            return d
    return None


def read_mesh(path):
    """(vertices (V, 3) float64 mm, triangles (F, 3) int64, hemisphere or None)."""
    img = _load(path)
    pts, tri = _first(img, "NIFTI_INTENT_POINTSET"), _first(img, "NIFTI_INTENT_TRIANGLE")
    missing = [n for n, d in (("NIFTI_INTENT_POINTSET (coordinates)", pts),
                              ("NIFTI_INTENT_TRIANGLE (triangles)", tri)) if d is None]
    if missing:
        raise ValueError(f"is not a surface mesh: no {' and no '.join(missing)} data array")
    v = np.asarray(pts.data, dtype=np.float64)
    t = np.asarray(tri.data)
    if v.ndim != 2 or v.shape[1] != 3 or v.shape[0] < 4:
        raise ValueError(f"vertex coordinates have shape {v.shape}, expected (vertices, 3)")
    if not np.all(np.isfinite(v)):
        raise ValueError("vertex coordinates hold NaN or infinite values")
    if t.ndim != 2 or t.shape[1] != 3 or not np.issubdtype(t.dtype, np.integer):
        raise ValueError(f"triangles have shape {t.shape} and type {t.dtype}, expected "
                         "(triangles, 3) integers")
    return v, t.astype(np.int64), structure_of(img)


def read_vertex_values(path, one_array=False) -> tuple:
    """(values (V,) float64 of the first data array, hemisphere or None).

    ``one_array``: a file of several data arrays (a map over time) is a
    ValueError instead of being read by its first array (a region mask).
    """
    img = _load(path)
    if not img.darrays:
        raise ValueError("holds no data array")
    if one_array and any(_intent(d) in ("NIFTI_INTENT_POINTSET", "NIFTI_INTENT_TRIANGLE")
                         for d in img.darrays):
        raise ValueError("is a mesh file (vertex coordinates and triangles), not values per "
                         "vertex")
    if one_array and len(img.darrays) > 1:
        raise ValueError(f"holds {len(img.darrays)} data arrays (a map over time?); a mask "
                         "holds one array of one value per vertex")
    d = np.asarray(img.darrays[0].data, dtype=np.float64)
    if d.ndim == 2 and d.shape[1] == 1:
        d = d[:, 0]
    if d.ndim != 1:
        raise ValueError(f"first data array has shape {d.shape}, expected one value per vertex")
    return d, structure_of(img)


def read_label_file(path):
    """(labels (V,) int64, names {key: name}, hemisphere or None) of a GIfTI label file."""
    img = _load(path)
    values, hemi = read_vertex_values(path)
    names = {int(k): str(v) for k, v in img.labeltable.get_labels_as_dict().items()}
    if not names:
        raise ValueError("has no label table (a GIfTI label file names its labels)")
    if not np.all(np.isfinite(values)) or not np.allclose(values, np.round(values)):
        raise ValueError("label values must be integers")
    return np.round(values).astype(np.int64), names, hemi


def read_time_axis(img) -> TimeAxis | None:
    """The time axis groupsrc wrote into a map's metadata, or None."""
    meta = dict(img.meta)
    if TIME_START not in meta or TIME_STEP not in meta:
        return None
    return TimeAxis(float(meta[TIME_START]), float(meta[TIME_STEP]), len(img.darrays))


# ----------------------------------------------------------------------------
# writing
# ----------------------------------------------------------------------------

#: label colours (Okabe-Ito palette, common practice for colour-blind-safe categories)
LABEL_COLOURS = ["#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7"]


def _meta(d: dict) -> GiftiMetaData:
    return GiftiMetaData({str(k): str(v) for k, v in d.items()})


def _file_meta(hemi, time_axis=None, extra=None) -> dict:
    meta = {}
    if hemi is not None:
        meta["AnatomicalStructurePrimary"] = STRUCTURES[hemi]
    if time_axis is not None:
        meta[TIME_START] = repr(float(time_axis.t0))
        meta[TIME_STEP] = repr(float(time_axis.dt))
    meta.update(extra or {})
    return meta


def _sample_names(name, time_axis, n):
    if time_axis is None or n == 1:
        return [name] * n
    return [f"{name}, {t * 1e3:.6g} ms" for t in time_axis.times[:n]]


def map_image(values, hemi, intent, *, name, time_axis=None, params=(),
              dtype=np.float32, extra_meta=None) -> GiftiImage:
    """A functional file: one data array per sample of ``values`` (V, T) or (V,)."""
    v = np.asarray(values, dtype=dtype)
    cols = v.reshape(v.shape[0], -1)
    array_meta = {f"intent_p{i + 1}": repr(float(p)) for i, p in enumerate(params)}
    datatype = {np.dtype(np.float32): "NIFTI_TYPE_FLOAT32", np.dtype(np.int32): "NIFTI_TYPE_INT32",
                np.dtype(np.uint8): "NIFTI_TYPE_UINT8"}[np.dtype(dtype)]
    arrays = [GiftiDataArray(np.ascontiguousarray(cols[:, j]), intent=intent, datatype=datatype,
                             meta=_meta({"Name": label, **array_meta}))
              for j, label in enumerate(_sample_names(name, time_axis, cols.shape[1]))]
    return GiftiImage(darrays=arrays, meta=_meta(_file_meta(hemi, time_axis if v.ndim == 2
                                                             else None, extra_meta)))


def _rgba(hexcode):
    h = hexcode.lstrip("#")
    return tuple(int(h[i:i + 2], 16) / 255 for i in (0, 2, 4))


def label_table(names: dict) -> GiftiLabelTable:
    """A label table: key 0 transparent, the others from LABEL_COLOURS in turn."""
    table = GiftiLabelTable()
    for j, (key, text) in enumerate(sorted(names.items())):
        lab = GiftiLabel(key=int(key))
        lab.label = str(text)
        r, g, b = (1.0, 1.0, 1.0) if key == 0 else _rgba(LABEL_COLOURS[(j - 1) % len(LABEL_COLOURS)])
        lab.red, lab.green, lab.blue, lab.alpha = r, g, b, 0.0 if key == 0 else 1.0
        table.labels.append(lab)
    return table


def label_image(labels, hemi, names: dict, *, name, time_axis=None) -> GiftiImage:
    """A label file: int32 arrays (one per sample of (V, T), or one of (V,)) and its table."""
    img = map_image(labels, hemi, "NIFTI_INTENT_LABEL", name=name, time_axis=time_axis,
                    dtype=np.int32)
    img.labeltable = label_table(names)
    return img


def mesh_image(vertices, triangles, hemi) -> GiftiImage:
    """A surface file: float32 coordinates (mm) and int32 triangles."""
    pts = GiftiDataArray(np.asarray(vertices, np.float32), intent="NIFTI_INTENT_POINTSET",
                         datatype="NIFTI_TYPE_FLOAT32",
                         meta=_meta({"GeometricType": "Anatomical"}))
    tri = GiftiDataArray(np.asarray(triangles, np.int32), intent="NIFTI_INTENT_TRIANGLE",
                         datatype="NIFTI_TYPE_INT32")
    return GiftiImage(darrays=[pts, tri], meta=_meta(_file_meta(hemi)))


def to_bytes(img: GiftiImage) -> bytes:
    return img.to_bytes()


def save(path, img: GiftiImage) -> Path:
    """Write a GIfTI image atomically."""
    return write_bytes(path, img.to_bytes())


def load(path) -> GiftiImage:
    """A whole GIfTI file (results and tests); FileNotFoundError / ValueError as for inputs."""
    return _load(path)


def read_arrays(path) -> np.ndarray:
    """All data arrays of a written map as (V, T) (one per sample) or (V,) (one array)."""
    img = _load(path)
    cols = [np.asarray(d.data) for d in img.darrays]
    return cols[0] if len(cols) == 1 else np.column_stack(cols)
