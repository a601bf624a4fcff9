"""Writers for the results folder's file types, all through :mod:`groupsrc.atomic`.
"""

from __future__ import annotations

import gzip
import json
from pathlib import Path

import numpy as np

from ..atomic import atomic_path, write_text

__all__ = ["atomic_path", "write_text", "write_json", "write_tsv", "save_figure", "jsonable"]


def write_json(path, obj) -> Path:
    return write_text(path, json.dumps(jsonable(obj), indent=2, allow_nan=False) + "\n")


def write_tsv(path, frame) -> Path:
    """Tidy table as TSV: tab separated, header row, 'n/a' for missing values."""
    if str(path).endswith(".gz"):
        # gzip without a time stamp or file name, so equal tables give equal files
        text = frame.to_csv(sep="\t", index=False, na_rep="n/a", float_format="%.7g")
        with atomic_path(path) as tmp:
            tmp.write_bytes(gzip.compress(text.encode("utf-8"), compresslevel=6, mtime=0))
        return Path(path)
    with atomic_path(path) as tmp:
        frame.to_csv(tmp, sep="\t", index=False, na_rep="n/a", float_format="%.7g")
    return Path(path)


def save_figure(fig, path, **kwargs) -> Path:
    path = Path(path)
    if path.suffix == ".svg":       # no creation date: equal figures give equal files
        kwargs.setdefault("metadata", {"Date": None})
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
