"""Atomic file writing for the results folder.

Every file is written to a temporary name in its destination folder and then
moved over the final name with :func:`os.replace`, so a reader (or an
interrupted run) never sees a half-written file.  Files get the mode a plain
``open`` would give under the user's umask (``tempfile.mkstemp`` alone would
make them owner-only).
"""

from __future__ import annotations

import json
import os
import tempfile
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from .folder import file_mode


@contextmanager
def atomic_path(path, suffix=None):
    """Yield a temporary path next to ``path``; move it over ``path`` on success.

    ``suffix`` defaults to the final name's full suffix (e.g. ``.nii.gz``) so
    that writers which choose a format from the extension still work.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    if suffix is None:
        suffix = "".join(path.suffixes)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=suffix + ".part"
                               if not suffix else suffix, dir=path.parent)
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        os.chmod(tmp, file_mode())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def write_text(path, text: str) -> Path:
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(path)


def write_json(path, obj) -> Path:
    return write_text(path, json.dumps(jsonable(obj), indent=2, allow_nan=False) + "\n")


def write_tsv(path, frame) -> Path:
    """Tidy table as TSV: tab separated, header row, 'n/a' for missing values."""
    with atomic_path(path) as tmp:
        frame.to_csv(tmp, sep="\t", index=False, na_rep="n/a", float_format="%.7g")
    return Path(path)


def save_nifti(path, image) -> Path:
    import nibabel as nib
    with atomic_path(path) as tmp:
        nib.save(image, str(tmp))
    return Path(path)


def save_figure(fig, path, **kwargs) -> Path:
    path = Path(path)
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format=path.suffix.lstrip("."), **kwargs)
    return path


def jsonable(obj):
    """Plain JSON types from numpy scalars/arrays, tuples, paths; NaN/inf -> None."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist())
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if np.isfinite(v) else None
    if isinstance(obj, Path):
        return str(obj)
    if obj is None or isinstance(obj, (str, int)):
        return obj
    return str(obj)
