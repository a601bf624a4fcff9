"""Reading participants' NIfTI maps (the input edge).

Headers are inspected lazily (nibabel array proxies) so ``groupsrc check``
can compare every file's shape, affine and time axis before any data are
decoded.

Decoding checks integrity: a gzip-compressed file (``.gz``) is decompressed
whole, which verifies the CRC-32 and length stored in the gzip trailer
(RFC 1952), so a truncated or damaged file is an error naming the file
instead of a silent run on damaged values.  (Reading through nibabel's lazy
proxy alone stops at the last data byte and never reaches the trailer.)
"""

from __future__ import annotations

import gzip
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np

from ..sources.volume import TimeAxis


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
    taxis = TimeAxis.from_header(img.header) if len(shape) == 4 else None
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


def read_sources(header: MapHeader, flat_index: np.ndarray, out: np.ndarray) -> None:
    """Decode one 4D map and copy its in-mask sources into ``out`` (sources, time)."""
    data = read_data(header, np.float32)
    n_t = data.shape[3]
    out[:] = data.reshape(-1, n_t)[flat_index]


def affine_difference(a: np.ndarray, b: np.ndarray) -> str:
    """Human-readable size of the difference between two affines."""
    shift = np.abs(a[:3, 3] - b[:3, 3]).max()
    lin = np.abs(a[:3, :3] - b[:3, :3]).max()
    return f"origin differs by up to {shift:.3g} mm, voxel axes by up to {lin:.3g} mm"
