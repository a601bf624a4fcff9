"""NIfTI-1/2: the one place that reads and writes volume files (nibabel).

Reading (the input edge)
------------------------
Headers are inspected lazily (nibabel array proxies) so ``groupsrc check``
can compare every file's shape, affine and time axis before any data are
decoded.  Decoding checks integrity: a gzip-compressed file (``.gz``) is
decompressed whole, which verifies the CRC-32 and length stored in the gzip
trailer (RFC 1952), so a truncated or damaged file is an error naming the
file instead of a silent run on damaged values.  (Reading through nibabel's
lazy proxy alone stops at the last data byte and never reaches the trailer.)

The time axis: ``pixdim[4]`` is the sampling interval and ``toffset`` the
first sample time, both in the time unit of ``xyzt_units`` (NIfTI-1
standard, nifti1.h); an unset time unit (0) is taken as seconds.

Writing (results and the demo)
------------------------------
Every map is written on the template grid with the template affine in both
the sform and the qform (code 2, "aligned"), spatial units mm and time unit
seconds (``xyzt_units``), ``pixdim[4]`` = sampling interval and ``toffset`` =
first sample time of the analysed window, so that other NIfTI readers place
the data in space and time.  Intent codes follow nifti1.h:

=================  ====  ==========================================
map                code  intent parameters
=================  ====  ==========================================
t statistic        3     p1 = degrees of freedom (NIFTI_INTENT_TTEST)
F statistic        4     p1 = df1, p2 = df2 (NIFTI_INTENT_FTEST)
p values           22    none (NIFTI_INTENT_PVAL)
estimate, effect   1001  none (NIFTI_INTENT_ESTIMATE)
cluster labels     1002  none (NIFTI_INTENT_LABEL), int16 or int32
=================  ====  ==========================================

Voxels outside the source mask hold 0 (p maps: 1, "nothing there").
"""

from __future__ import annotations

import gzip
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np

from ..atomic import atomic_path
from ..sources.timeaxis import TimeAxis
from ..sources.volume import VolumeGrid

SUFFIXES = (".nii", ".nii.gz")

#: NIfTI-1 xyzt_units time codes (nifti1.h): 8 = seconds, 16 = milliseconds,
#: 24 = microseconds; the factor converts the header value to seconds.
NIFTI_TIME_UNITS = {8: 1.0, 16: 1e-3, 24: 1e-6}


def time_axis_from_header(header, n: int | None = None) -> TimeAxis:
    """The time axis of a NIfTI-1/2 header (see the module docstring)."""
    code = int(header["xyzt_units"]) & 0x38
    factor = NIFTI_TIME_UNITS.get(code, 1.0)
    dt = float(header["pixdim"][4]) * factor
    t0 = float(header["toffset"]) * factor
    if n is None:
        shape = header.get_data_shape()
        n = int(shape[3]) if len(shape) > 3 else 1
    return TimeAxis(t0, dt, int(n))


# ----------------------------------------------------------------------------
# reading
# ----------------------------------------------------------------------------

@dataclass
class MapHeader:
    path: Path
    shape: tuple
    affine: np.ndarray
    time_axis: TimeAxis | None
    image: object  # nibabel image with a lazy dataobj


class DecodeError(ValueError):
    """The header was readable but the data cannot be decoded (truncated or damaged file)."""

    fix = "the file is truncated or damaged: write it again (re-export it)"


def read_header(path: Path) -> MapHeader:
    """Open a NIfTI file lazily. Raises ValueError with a readable reason."""
    path = Path(path)
    if not path.exists():
        raise FileNotFoundError("file not found")
    if path.is_dir():
        raise ValueError("is a folder, not a NIfTI file")
    try:
        img = nib.load(str(path))
    except Exception as exc:  # nibabel raises several types for bad files
        raise ValueError(f"cannot be read as NIfTI ({type(exc).__name__}: {exc})") from None
    if not isinstance(img, (nib.Nifti1Image, nib.Nifti2Image)):
        raise ValueError(f"is a {type(img).__name__}, not NIfTI-1/2")
    shape = tuple(int(s) for s in img.shape)
    taxis = time_axis_from_header(img.header) if len(shape) == 4 else None
    return MapHeader(path, shape, img.affine.copy(), taxis, img)


def read_data(header: MapHeader, dtype=None) -> np.ndarray:
    """Decode the whole data array of a file whose header was read.

    Raises :class:`DecodeError` (a ValueError) with the reason when the data
    cannot be decoded; for ``.gz`` files the gzip CRC and length are verified.
    """
    try:
        image = header.image
        if header.path.name.endswith(".gz"):
            image = type(image).from_bytes(gzip.decompress(header.path.read_bytes()))
        data = np.asanyarray(image.dataobj, dtype=dtype)
        if tuple(data.shape) != tuple(header.shape):
            raise ValueError(f"decoded shape {data.shape} differs from the header's {header.shape}")
        return data
    except MemoryError:
        raise
    except Exception as exc:  # zlib, gzip, EOF, OS and nibabel errors all mean a damaged file
        raise DecodeError(f"data cannot be decoded ({type(exc).__name__}: {exc})") from None


def read_mask(path: Path):
    """Read a 3D mask (nonzero = source); a 4D mask with one volume is accepted."""
    hdr = read_header(path)
    data = read_data(hdr)
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    if data.ndim != 3:
        raise ValueError(f"a mask must be 3D, got shape {data.shape}")
    return np.isfinite(data) & (data != 0), hdr.affine


def read_sources(header: MapHeader, flat_index: np.ndarray) -> np.ndarray:
    """Decode one 4D map; its in-mask sources (sources, time) in float64.  The file is
    decoded in its own type (float64 files keep their precision, float32 ones are not
    doubled in memory), only the in-mask values are widened."""
    data = read_data(header)
    n_t = data.shape[3]
    return np.asarray(data.reshape(-1, n_t)[flat_index], dtype=np.float64)


def affine_difference(a: np.ndarray, b: np.ndarray) -> str:
    """Human-readable size of the difference between two affines."""
    shift = np.abs(a[:3, 3] - b[:3, 3]).max()
    lin = np.abs(a[:3, :3] - b[:3, :3]).max()
    return f"origin differs by up to {shift:.3g} mm, voxel axes by up to {lin:.3g} mm"


# ----------------------------------------------------------------------------
# writing
# ----------------------------------------------------------------------------

# nifti1.h intent codes
INTENT_NONE = 0
INTENT_TTEST = 3
INTENT_FTEST = 4
INTENT_ZSCORE = 5
INTENT_PVAL = 22
INTENT_ESTIMATE = 1001
INTENT_LABEL = 1002

#: NIfTI-1 sform/qform code 2 = NIFTI_XFORM_ALIGNED_ANAT (aligned to a template-like space)
XFORM_ALIGNED = 2


def _robust_abs(values, q=99.5):
    v = np.abs(np.asarray(values, float))
    v = v[np.isfinite(v)]
    if v.size == 0:
        return 1.0
    r = float(np.percentile(v, q))
    return r if r > 0 else (float(v.max()) or 1.0)


def make_image(values, grid: VolumeGrid, time_axis: TimeAxis | None, *, dtype, fill=0.0,
               intent=INTENT_NONE, intent_params=(), intent_name="", descrip="",
               cal=None) -> nib.Nifti1Image:
    """One NIfTI-1 image from per-source values.

    ``values`` is (n_sources, n_times) for a 4D map or (n_sources,) for a 3D
    map; ``cal`` is (cal_min, cal_max), the display range readers may use.
    """
    values = np.asarray(values)
    vol = grid.to_volume(values.astype(dtype), fill=np.asarray(fill).astype(dtype))
    affine = np.asarray(grid.affine, float)
    img = nib.Nifti1Image(vol, affine)
    hdr = img.header
    hdr.set_data_dtype(dtype)
    hdr.set_xyzt_units("mm", "sec")
    zooms = [float(z) for z in grid.voxel_size]
    if vol.ndim == 4:
        zooms.append(float(time_axis.dt))
        hdr["toffset"] = float(time_axis.t0)
    hdr.set_zooms(zooms)
    img.set_sform(affine, code=XFORM_ALIGNED)
    img.set_qform(affine, code=XFORM_ALIGNED)
    hdr.set_intent(intent, tuple(float(p) for p in intent_params), name=intent_name[:15])
    hdr["descrip"] = descrip.encode("ascii", "replace")[:79]
    if cal is not None:
        hdr["cal_min"], hdr["cal_max"] = float(cal[0]), float(cal[1])
    return img


def statistic_image(statistic, grid, time_axis, kind, df, name):
    """t (intent 3, p1 = df) or F (intent 4, p1 = df1, p2 = df2) map, float32; ``kind``
    "z": a z map (intent 5, no parameter), e.g. the z of equal p of a mixed model."""
    if kind == "z":
        r = _robust_abs(statistic)
        return make_image(statistic, grid, time_axis, dtype=np.float32, intent=INTENT_ZSCORE,
                          intent_name="z of equal p",
                          descrip=f"groupsrc z (same p as the test), contrast {name}",
                          cal=(-r, r))
    if kind == "t":
        r = _robust_abs(statistic)
        return make_image(statistic, grid, time_axis, dtype=np.float32, intent=INTENT_TTEST,
                          intent_params=(df[0],), intent_name="t statistic",
                          descrip=f"groupsrc t map, contrast {name}, df {df[0]}", cal=(-r, r))
    r = _robust_abs(statistic)
    return make_image(statistic, grid, time_axis, dtype=np.float32, intent=INTENT_FTEST,
                      intent_params=(df[0], df[1]), intent_name="F statistic",
                      descrip=f"groupsrc F map, contrast {name}, df {df[0]},{df[1]}",
                      cal=(0.0, r))


def p_image(p, grid, time_axis, name, which):
    """p-value map (intent 22), float32, 1 outside the mask, display range 0..1."""
    p = np.where(np.isfinite(p), p, 1.0)
    return make_image(p, grid, time_axis, dtype=np.float32, fill=1.0, intent=INTENT_PVAL,
                      intent_name=f"p {which}"[:15], descrip=f"groupsrc {which} p, contrast {name}",
                      cal=(0.0, 1.0))


def estimate_image(values, grid, time_axis, name, what, signed=True, bounded=False):
    """Contrast estimate, standard error or standardized effect (intent 1001), float32.

    Display range: symmetric for signed maps, from 0 otherwise (capped at 1 for
    ``bounded`` effects such as partial eta squared)."""
    r = _robust_abs(values)
    cal = (-r, r) if signed else (0.0, min(1.0, r) if bounded else r)
    return make_image(values, grid, time_axis, dtype=np.float32, intent=INTENT_ESTIMATE,
                      intent_name=what[:15], descrip=f"groupsrc {what}, contrast {name}",
                      cal=cal)


def label_dtype(n_labels: int):
    return np.int16 if n_labels <= np.iinfo(np.int16).max else np.int32


def label_image(labels, grid, time_axis, name):
    """Cluster labels 1..K, 0 = none (intent 1002), int16 (int32 beyond 32767 labels)."""
    k = int(np.max(labels)) if np.size(labels) else 0
    return make_image(labels, grid, time_axis, dtype=label_dtype(k), intent=INTENT_LABEL,
                      intent_name="cluster label", descrip=f"groupsrc clusters, contrast {name}",
                      cal=(0, max(k, 1)))


def cluster_summary_values(statistic, labels, keep):
    """Per source: the statistic of largest magnitude over the samples where the
    source belongs to one of the clusters in ``keep``; 0 elsewhere (n_sources,)."""
    stat = np.asarray(statistic, float)
    member = np.isin(labels, np.asarray(list(keep), dtype=np.int64)) & (labels > 0)
    masked = np.where(member, stat, 0.0)
    idx = np.argmax(np.abs(masked), axis=1)
    return masked[np.arange(stat.shape[0]), idx]


def cluster_summary_image(statistic, labels, keep, grid, kind, name):
    """3D overlay (x, y, z): peak statistic over each source's cluster time span."""
    vals = cluster_summary_values(statistic, labels, keep)
    r = _robust_abs(vals[vals != 0]) if np.any(vals != 0) else 1.0
    return make_image(vals, grid, None, dtype=np.float32, intent=INTENT_NONE,
                      intent_name=f"peak {kind} in cl",
                      cal=(-r, r) if kind in ("t", "z") else (0.0, r),
                      descrip=f"groupsrc peak {kind} over cluster span, contrast {name}")


def read_image(path):
    """(data, affine) of a whole NIfTI file, for reading results back.

    Raises FileNotFoundError, or another exception when the file is damaged.
    """
    path = Path(path)
    if not path.exists():
        raise FileNotFoundError(str(path))
    img = nib.load(str(path))
    if path.name.endswith(".gz"):
        img = type(img).from_bytes(gzip.decompress(path.read_bytes()))
    return np.asarray(img.dataobj), img.affine


def read_volume(path) -> np.ndarray:
    """The data array of a NIfTI file (lazy reading; for tests and the demo's truth)."""
    return np.asanyarray(nib.load(str(path)).dataobj)


def save(path, image) -> Path:
    """Write a nibabel image atomically (the format follows the suffix)."""
    with atomic_path(path) as tmp:
        nib.save(image, str(tmp))
    return Path(path)


def gz_bytes(image) -> bytes:
    """A .nii.gz file's bytes that depend on the image only (no gzip timestamp)."""
    return gzip.compress(image.to_bytes(), compresslevel=6, mtime=0)


def grid_image(data, affine, dt=None, t0=None, descrip="") -> nib.Nifti1Image:
    """A plain NIfTI-1 image of an array on ``affine`` (3D, or 4D with a time axis)."""
    img = nib.Nifti1Image(np.asarray(data), affine)
    hdr = img.header
    img.set_sform(affine, code=XFORM_ALIGNED)
    img.set_qform(affine, code=XFORM_ALIGNED)
    if np.ndim(data) == 4:
        hdr.set_xyzt_units("mm", "sec")
        voxel = np.sqrt((np.asarray(affine)[:3, :3] ** 2).sum(axis=0))
        hdr.set_zooms(tuple(float(v) for v in voxel) + (float(dt),))
        hdr["toffset"] = float(t0)
    else:
        hdr.set_xyzt_units("mm")
    hdr["descrip"] = descrip[:79].encode()
    return img


# ----------------------------------------------------------------------------
# result maps of a volume source space
# ----------------------------------------------------------------------------

class VolumeMaps:
    """Result maps of a :class:`VolumeGrid` as NIfTI-1 files (one file per map).

    The writer asks for maps by role; the report reads them back per source.
    Another source space has its own class with the same methods (see
    :func:`groupsrc.formats.result_maps`).
    """

    format = "nifti"
    #: files describing the source space itself (read back by :meth:`read_space`)
    SPACE_FILES = ("source_mask.nii.gz",)

    def __init__(self, grid: VolumeGrid, time_axis: TimeAxis | None = None):
        self.grid, self.time_axis = grid, time_axis

    @property
    def space(self) -> VolumeGrid:
        return self.grid

    @staticmethod
    def files(stem) -> list:
        return [f"{stem}.nii.gz"]

    def _save(self, folder, stem, image) -> list:
        return [save(Path(folder) / self.files(stem)[0], image)]

    def statistic(self, folder, stem, values, kind, df, name):
        return self._save(folder, stem, statistic_image(values, self.grid, self.time_axis,
                                                        kind, df, name))

    def estimate(self, folder, stem, values, name, what, signed=True, bounded=False):
        return self._save(folder, stem, estimate_image(values, self.grid, self.time_axis,
                                                       name, what, signed, bounded))

    def p_values(self, folder, stem, values, name, which):
        return self._save(folder, stem, p_image(values, self.grid, self.time_axis, name, which))

    def labels(self, folder, stem, labels, name):
        return self._save(folder, stem, label_image(labels, self.grid, self.time_axis, name))

    def cluster_summary(self, folder, stem, statistic, labels, keep, kind, name):
        """A 3D overlay for slice viewers: peak statistic over each source's cluster span."""
        return self._save(folder, stem, cluster_summary_image(statistic, labels, keep,
                                                              self.grid, kind, name))

    def write_space(self, folder) -> list:
        img = make_image(np.ones(self.grid.n_sources, np.uint8), self.grid, None,
                         dtype=np.uint8, intent_name="source mask",
                         descrip="groupsrc source mask", cal=(0, 1))
        return [save(Path(folder) / self.SPACE_FILES[0], img)]

    def read(self, folder, stem) -> np.ndarray:
        """Per-source values (n_sources, n_times) of a written map (raises when damaged)."""
        data, _ = read_image(Path(folder) / self.files(stem)[0])
        if data.ndim == 3:
            data = data[..., None]
        return self.grid.from_volume(data)

    @classmethod
    def read_space(cls, folder, time_axis=None) -> "VolumeMaps":
        data, affine = read_image(Path(folder) / cls.SPACE_FILES[0])
        return cls(VolumeGrid.from_mask(np.asarray(data) > 0, affine), time_axis)
