"""Memory-mapped cache of the loaded data array.

The key of an entry is a sha256 over the content hashes of every map file
and the mask (and a format version), so any change to any input gives a new
entry.  Entries are written to a temporary name and renamed, so an
interrupted load leaves no half-written entry.

Content hashes (sha256 of the whole file) are memoised in
``file_hashes.json`` so that a second run need not read every file again.
The rule for reusing a memoised hash -- it is reused only when the file's
*fingerprint* is unchanged:

* resolved path, size, modification time (ns), inode number, and the
  inode change time ``st_ctime`` (ns).  Writing to a file, truncating it or
  setting its times marks ``st_ctime`` with the current time (POSIX
  ``write``, ``ftruncate``, ``utimensat``), and no ordinary program can set
  it back, so a file rewritten with the same size and a restored
  modification time still gets a new fingerprint; a file replaced by
  renaming gets a new inode;
* the sha256 of the file's first and last 64 KiB, which hold the NIfTI
  header and, for ``.nii.gz``, the gzip trailer with the CRC-32 of all the
  uncompressed data (RFC 1952) -- a guard for file systems whose change
  times are coarse or unreliable;
* a hash taken while the file was changed less than ``RACY_SECONDS`` ago is
  not memoised (the file could change again within one tick of the
  file-system clock without changing its times).

Anything else is hashed in full again.  The cache is an optimisation: when
it cannot be written, loading still succeeds.

The folder's size limit, eviction and clean-up are in :mod:`.cache_upkeep`.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import time
from pathlib import Path

import numpy as np

from .cache_upkeep import HASHES_FILE, _tmp, enforce_limit, remove_dead_temporaries

CACHE_ENV = "GROUPSRC_CACHE_DIR"
log = logging.getLogger("groupsrc")


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


#: bytes hashed at each end of a file for its fingerprint
SAMPLE_BYTES = 1 << 16
#: a file changed more recently than this (seconds) is hashed but not memoised
RACY_SECONDS = 2.0


def _stat_part(st) -> str:
    return f"{st.st_size}|{st.st_mtime_ns}|{st.st_ctime_ns}|{st.st_ino}"


def _sample_part(path: Path, size: int) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        h.update(fh.read(SAMPLE_BYTES))
        if size > SAMPLE_BYTES:
            fh.seek(max(SAMPLE_BYTES, size - SAMPLE_BYTES))
            h.update(fh.read(SAMPLE_BYTES))
    return h.hexdigest()[:32]


def fingerprint(path: Path, st=None) -> str:
    """Cheap identity of a file's current content (see the module docstring)."""
    st = st if st is not None else os.stat(path)
    return f"{_stat_part(st)}|{_sample_part(path, st.st_size)}"


class HashIndex:
    """Memo of file content hashes: resolved path -> (fingerprint, sha256)."""

    def __init__(self, cache_dir: Path):
        self.path = Path(cache_dir) / HASHES_FILE
        # the cache is opened: temporary files of runs killed while writing go
        for name in remove_dead_temporaries(cache_dir):
            log.info(f"removed {name} from the loading cache (a temporary file of an "
                     "interrupted run)")
        try:
            data = json.loads(self.path.read_text())
            # entries of another layout (older versions) are dropped
            self.data = {k: v for k, v in data.items() if isinstance(v, list)}
        except (OSError, ValueError, AttributeError):
            self.data = {}
        self.dirty = False

    def sha256(self, path: Path) -> str:
        path = Path(path).resolve()
        st = os.stat(path)
        fp = fingerprint(path, st)
        entry = self.data.get(str(path))
        if isinstance(entry, list) and len(entry) == 2 and entry[0] == fp:
            return entry[1]
        digest = sha256_file(path)
        changed = max(st.st_mtime_ns, st.st_ctime_ns) / 1e9
        if time.time() - changed >= RACY_SECONDS and fingerprint(path) == fp:
            self.data[str(path)] = [fp, digest]
            self.dirty = True
        return digest

    def save(self) -> None:
        if not self.dirty:
            return
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            tmp = _tmp(self.path.parent, "file_hashes")
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
    try:
        os.utime(meta_path)             # last use, for the least-recently-used eviction
    except OSError:
        pass
    return arr, meta


def _tmp_data(cache_dir: Path, key: str) -> Path:
    return _tmp(cache_dir, f"{key}.f32")


def create(cache_dir: Path, key: str, shape):
    """A writable memmap for a new entry at a temporary name (None when the cache
    cannot be written): the maps are decoded straight into it, so loading never
    holds the whole array in memory; :func:`store` then commits it."""
    try:
        Path(cache_dir).mkdir(parents=True, exist_ok=True)
        return np.memmap(_tmp_data(cache_dir, key), dtype=np.float32, mode="w+",
                         shape=tuple(shape))
    except (OSError, ValueError):
        return None


def store(cache_dir: Path, key: str, array: np.ndarray, meta: dict):
    """Write an entry atomically and return it re-opened as a read-only memmap.

    ``array`` may be the memmap of :func:`create` (then it is renamed into
    place, not copied).  An entry that cannot be written is dropped."""
    cache_dir = Path(cache_dir)
    tmp = _tmp_data(cache_dir, key)
    try:
        cache_dir.mkdir(parents=True, exist_ok=True)
        base = cache_dir / key
        if isinstance(array, np.memmap) and array.filename \
                and os.path.realpath(array.filename) == os.path.realpath(tmp):
            array.flush()
        else:
            mm = np.memmap(tmp, dtype=np.float32, mode="w+", shape=array.shape)
            mm[:] = array
            mm.flush()
            del mm
        os.replace(tmp, base.with_suffix(".f32"))
        meta = dict(meta, shape=list(array.shape))
        tmpm = _tmp(cache_dir, f"{key}.json")
        tmpm.write_text(json.dumps(meta))
        os.replace(tmpm, base.with_suffix(".json"))
    except OSError:
        return array
    stored = np.memmap(base.with_suffix(".f32"), dtype=np.float32, mode="r",
                       shape=array.shape)
    enforce_limit(cache_dir, keep=key)
    return stored


def discard(array) -> None:
    """Remove the temporary file of a :func:`create` memmap that is not stored."""
    name = getattr(array, "filename", None)
    if name and ".f32.tmp" in str(name):
        Path(name).unlink(missing_ok=True)
