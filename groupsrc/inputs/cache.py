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

**Size and clean-up** (``groupsrc cache`` shows and clears the folder):

* a size limit, ``DEFAULT_LIMIT`` unless ``groupsrc cache --limit SIZE`` stored
  another in the folder's ``limit.json`` (or ``$GROUPSRC_CACHE_LIMIT`` says
  so); after a new entry is stored, the entries used least recently are
  removed until the folder fits (never the entry just stored).  An entry's
  last use is its ``.json`` file's modification time, set on every hit.
  Removing an entry another run has open is safe: its mapping keeps the data;
* temporary files carry their writer's owner token
  (``<key>.f32.tmp-<host>-<pid>-<start>``, :mod:`groupsrc.processes`), and
  those of processes provably gone (killed while decoding) are removed when
  the cache is next opened (:class:`HashIndex`), as are files of the earlier
  ``.tmp<pid>`` naming whose process is gone and that were not written to for
  an hour.
* only files of the cache's own names are ever removed (``ENTRY`` and the
  temporary names above, ``file_hashes.json``), so a ``cache`` folder set to
  a folder of the user's loses nothing else.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import re
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..processes import owner_is_dead, owner_token

CACHE_ENV = "GROUPSRC_CACHE_DIR"
LIMIT_ENV = "GROUPSRC_CACHE_LIMIT"
#: size limit of a cache folder unless set otherwise (bytes)
DEFAULT_LIMIT = 4 * 2 ** 30
LIMIT_FILE = "limit.json"
HASHES_FILE = "file_hashes.json"
#: the files of one entry: ``<key>.f32`` (the data), ``<key>.json`` (its description),
#: ``<key>.digests.json`` (a hash of each map's decoded data)
ENTRY = re.compile(r"^([0-9a-f]{32})\.(f32|json|digests\.json)$")
#: temporary files: the owner-token naming, and the earlier ``.tmp<pid>``
_TMP = re.compile(r"^(?:[0-9a-f]{32}\.(?:f32|json|digests\.json)|file_hashes)"
                  r"\.tmp(?:-(?P<token>[0-9a-f]{8}-\d+-\d+)|(?P<pid>\d+))$")
#: an earlier-style temporary file is left alone while written to this recently (s)
_LEGACY_QUIET = 3600.0
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


def _tmp(cache_dir: Path, name: str) -> Path:
    """A temporary file name of this process in the cache folder."""
    return Path(cache_dir) / f"{name}.tmp-{owner_token()}"


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


# ----------------------------------------------------------------------------
# decoded-content digests of an entry (files used twice, by their data)
# ----------------------------------------------------------------------------

def load_digests(cache_dir: Path, key: str) -> list | None:
    """The per-map digests saved beside entry ``key`` (None when there are none)."""
    try:
        data = json.loads((Path(cache_dir) / f"{key}.digests.json").read_text())
        return data if isinstance(data, list) else None
    except (OSError, ValueError):
        return None


def save_digests(cache_dir: Path, key: str, digests: list) -> None:
    """Keep the per-map digests beside entry ``key`` (only while the entry exists)."""
    cache_dir = Path(cache_dir)
    if not (cache_dir / f"{key}.f32").exists():
        return
    try:
        tmp = _tmp(cache_dir, f"{key}.digests.json")
        tmp.write_text(json.dumps(list(digests)))
        os.replace(tmp, cache_dir / f"{key}.digests.json")
    except OSError:
        pass


# ----------------------------------------------------------------------------
# size, eviction, clean-up
# ----------------------------------------------------------------------------

@dataclass
class Entry:
    """One cache entry: its key, bytes on disk, last use (seconds since the epoch) and
    shape (maps, sources, samples) when its description says."""

    key: str
    size: int
    last_use: float
    shape: tuple | None = None


def entries(cache_dir: Path) -> list:
    """The cache folder's entries, least recently used first."""
    cache_dir = Path(cache_dir)
    found = {}
    try:
        names = os.listdir(cache_dir)
    except OSError:
        return []
    for name in names:
        m = ENTRY.match(name)
        if not m:
            continue
        try:
            st = os.stat(cache_dir / name)
        except OSError:
            continue
        e = found.setdefault(m.group(1), Entry(m.group(1), 0, 0.0))
        e.size += st.st_size
        if m.group(2) == "json":
            e.last_use = st.st_mtime
            try:
                e.shape = tuple(json.loads((cache_dir / name).read_text())["shape"])
            except (OSError, ValueError, KeyError, TypeError):
                pass
    return sorted(found.values(), key=lambda e: (e.last_use, e.key))


def remove_entry(cache_dir: Path, key: str) -> None:
    # the description first: without it the entry is no longer served
    for suffix in (".json", ".f32", ".digests.json"):
        try:
            (Path(cache_dir) / f"{key}{suffix}").unlink()
        except OSError:
            pass


def limit(cache_dir: Path) -> tuple:
    """(bytes, where it comes from) of the cache folder's size limit."""
    env = os.environ.get(LIMIT_ENV)
    if env:
        from ..stats.engine.memory import parse_size
        try:
            return parse_size(env), f"${LIMIT_ENV}"
        except ValueError:
            log.info(f"${LIMIT_ENV} = {env!r} is not a size such as 4G; the default is used")
    try:
        value = json.loads((Path(cache_dir) / LIMIT_FILE).read_text())["bytes"]
        if isinstance(value, int) and value > 0:
            return value, "groupsrc cache --limit"
    except (OSError, ValueError, KeyError, TypeError):
        pass
    return DEFAULT_LIMIT, "default"


def set_limit(cache_dir: Path, nbytes: int) -> None:
    Path(cache_dir).mkdir(parents=True, exist_ok=True)
    tmp = _tmp(cache_dir, "limit")
    tmp.write_text(json.dumps({"bytes": int(nbytes)}))
    os.replace(tmp, Path(cache_dir) / LIMIT_FILE)


def enforce_limit(cache_dir: Path, keep: str | None = None) -> list:
    """Remove the least recently used entries until the folder fits its limit (never
    ``keep``); return the keys removed.  Says so when ``keep`` alone is above it."""
    cap, _ = limit(cache_dir)
    found = entries(cache_dir)
    total = sum(e.size for e in found)
    removed = []
    for e in found:
        if total <= cap:
            break
        if e.key == keep:
            continue
        remove_entry(cache_dir, e.key)
        total -= e.size
        removed.append(e.key)
    if total > cap and keep is not None:
        log.info(f"the loading cache ({cache_dir}) holds {total / 2 ** 30:.3g} GiB, above "
                 f"its limit of {cap / 2 ** 30:.3g} GiB, with this analysis's data alone; "
                 "they are removed first when the next analysis needs room (raise the limit "
                 "with 'groupsrc cache --limit SIZE')")
    return removed


def remove_dead_temporaries(cache_dir: Path) -> list:
    """Remove temporary files of processes that are provably gone; return their names."""
    cache_dir = Path(cache_dir)
    try:
        names = os.listdir(cache_dir)
    except OSError:
        return []
    removed = []
    for name in names:
        m = _TMP.match(name)
        if not m or not _tmp_is_dead(cache_dir / name, m):
            continue
        try:
            (cache_dir / name).unlink()
            removed.append(name)
        except OSError:
            pass
    return removed


def _tmp_is_dead(path: Path, m) -> bool:
    if m.group("token"):
        return owner_is_dead(m.group("token"))
    pid = int(m.group("pid"))           # the earlier naming: no host in the name
    try:
        os.kill(pid, 0)
        return False
    except ProcessLookupError:
        pass
    except OSError:
        return False
    try:
        return time.time() - os.stat(path).st_mtime > _LEGACY_QUIET
    except OSError:
        return False


def clear(cache_dir: Path) -> tuple:
    """Remove every entry and the memo of file hashes (the limit setting stays), and the
    temporary files of ended runs; returns (entries removed, bytes freed, temporary
    files of live runs left alone)."""
    cache_dir = Path(cache_dir)
    found = entries(cache_dir)
    for e in found:
        remove_entry(cache_dir, e.key)
    (cache_dir / HASHES_FILE).unlink(missing_ok=True)
    remove_dead_temporaries(cache_dir)
    live = [n for n in (os.listdir(cache_dir) if cache_dir.is_dir() else []) if _TMP.match(n)]
    return len(found), sum(e.size for e in found), live
