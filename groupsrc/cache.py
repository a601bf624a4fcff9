"""Memory-mapped cache of the loaded data array.

The key is a sha256 over the content hashes of every map file, the mask and
the loading settings, so any change to any input gives a new entry.  File
content hashes are memoised by (path, size, mtime) in a small index so a
second run neither decodes NIfTI nor re-hashes unchanged files.  Entries are
written to a temporary name and renamed, so an interrupted load leaves no
half-written entry.
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import numpy as np

CACHE_ENV = "GROUPSRC_CACHE_DIR"


def default_cache_dir() -> Path:
    env = os.environ.get(CACHE_ENV)
    if env:
        return Path(env).expanduser()
    base = os.environ.get("XDG_CACHE_HOME") or (Path.home() / ".cache")
    return Path(base) / "groupsrc"


def sha256_file(path: Path, chunk: int = 1 << 20) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while True:
            block = fh.read(chunk)
            if not block:
                break
            h.update(block)
    return h.hexdigest()


class HashIndex:
    """Memo of file content hashes keyed by (absolute path, size, mtime_ns)."""

    def __init__(self, cache_dir: Path):
        self.path = Path(cache_dir) / "file_hashes.json"
        try:
            self.data = json.loads(self.path.read_text())
        except (OSError, ValueError):
            self.data = {}
        self.dirty = False

    def sha256(self, path: Path) -> str:
        path = Path(path).resolve()
        st = path.stat()
        key = f"{path}|{st.st_size}|{st.st_mtime_ns}"
        digest = self.data.get(key)
        if digest is None:
            digest = sha256_file(path)
            self.data[key] = digest
            self.dirty = True
        return digest

    def save(self) -> None:
        if not self.dirty:
            return
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            tmp = self.path.with_suffix(f".tmp{os.getpid()}")
            tmp.write_text(json.dumps(self.data))
            os.replace(tmp, self.path)
        except OSError:
            pass  # the cache is an optimisation; never fail a run over it


def cache_key(parts: list) -> str:
    h = hashlib.sha256()
    for p in parts:
        h.update(str(p).encode())
        h.update(b"\0")
    return h.hexdigest()[:32]


def load_cached(cache_dir: Path, key: str):
    """Return (array memmap, meta dict) or None."""
    base = Path(cache_dir) / key
    meta_path = base.with_suffix(".json")
    data_path = base.with_suffix(".f32")
    if not (meta_path.exists() and data_path.exists()):
        return None
    try:
        meta = json.loads(meta_path.read_text())
        arr = np.memmap(data_path, dtype=np.float32, mode="r", shape=tuple(meta["shape"]))
    except (OSError, ValueError, KeyError):
        return None
    return arr, meta


def store(cache_dir: Path, key: str, array: np.ndarray, meta: dict):
    """Write an entry atomically and return it re-opened as a read-only memmap."""
    cache_dir = Path(cache_dir)
    try:
        cache_dir.mkdir(parents=True, exist_ok=True)
        base = cache_dir / key
        tmp = base.with_suffix(f".f32.tmp{os.getpid()}")
        mm = np.memmap(tmp, dtype=np.float32, mode="w+", shape=array.shape)
        mm[:] = array
        mm.flush()
        del mm
        os.replace(tmp, base.with_suffix(".f32"))
        meta = dict(meta, shape=list(array.shape))
        tmpm = base.with_suffix(f".json.tmp{os.getpid()}")
        tmpm.write_text(json.dumps(meta))
        os.replace(tmpm, base.with_suffix(".json"))
    except OSError:
        return array
    return np.memmap(base.with_suffix(".f32"), dtype=np.float32, mode="r",
                     shape=array.shape)
