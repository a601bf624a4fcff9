"""The loading cache's upkeep: its size limit, eviction, clean-up (``groupsrc cache``).

* a size limit, ``DEFAULT_LIMIT`` unless ``groupsrc cache --limit SIZE`` stored
  another in the folder's ``limit.json`` (or ``$GROUPSRC_CACHE_LIMIT`` says
  so); after a new entry is stored, the entries used least recently are
  removed until the folder fits (never the entry just stored).  An entry's
  last use is its ``.json`` file's modification time, set on every hit.
  Removing an entry another run has open is safe: its mapping keeps the data;
* temporary files carry their writer's owner token
  (``<key>.f32.tmp-<host>-<pid>-<start>``, :mod:`groupsrc.processes`), and
  those of processes provably gone (killed while decoding) are removed when
  the cache is next opened (:class:`.cache.HashIndex`), as are files of the earlier
  ``.tmp<pid>`` naming whose process is gone and that were not written to for
  an hour.
* only files of the cache's own names are ever removed (``ENTRY`` and the
  temporary names above, ``file_hashes.json``), so a ``cache`` folder set to
  a folder of the user's loses nothing else.
"""

from __future__ import annotations

import json
import logging
import os
import re
import time
from dataclasses import dataclass
from pathlib import Path

from ..processes import owner_is_dead, owner_token

LIMIT_ENV = "GROUPSRC_CACHE_LIMIT"
#: size limit of a cache folder unless set otherwise (bytes)
DEFAULT_LIMIT = 4 * 2 ** 30
LIMIT_FILE = "limit.json"
HASHES_FILE = "file_hashes.json"
#: the files of one entry: ``<key>.f32`` (the data) and ``<key>.json`` (its description)
ENTRY = re.compile(r"^([0-9a-f]{32})\.(f32|json)$")
#: temporary files: the owner-token naming, and the earlier ``.tmp<pid>``
_TMP = re.compile(r"^(?:[0-9a-f]{32}\.(?:f32|json)|file_hashes|limit)"
                  r"\.tmp(?:-(?P<token>[0-9a-f]{8}-\d+-\d+)|(?P<pid>\d+))$")
#: an earlier-style temporary file is left alone while written to this recently (s)
_LEGACY_QUIET = 3600.0
log = logging.getLogger("groupsrc")


def _tmp(cache_dir: Path, name: str) -> Path:
    """A temporary file name of this process in the cache folder."""
    return Path(cache_dir) / f"{name}.tmp-{owner_token()}"


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
    for suffix in (".json", ".f32"):
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


def clear_folder(cache_dir: Path) -> tuple:
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


def upkeep(folder: Path, *, clear: bool = False, new_limit: int | None = None) -> list:
    """``groupsrc cache``: set the limit (``new_limit`` bytes) and/or clear the folder,
    remove temporary files of ended runs, and describe what is left; the lines to print."""
    import datetime

    from ..stats.engine.memory import size_text
    out = [f"loading cache: {folder}"]
    if new_limit is not None:
        set_limit(folder, new_limit)
        removed = enforce_limit(folder)
        out.append(f"  limit set to {size_text(new_limit)}"
                   + (f"; removed {len(removed)} entr{'y' if len(removed) == 1 else 'ies'} "
                      "used least recently" if removed else ""))
    if clear:
        n, freed, live = clear_folder(folder)
        out.append(f"  cleared: {n} entr{'y' if n == 1 else 'ies'} removed, {size_text(freed)} "
                   "freed" + (f"; {len(live)} temporary file(s) of running processes left alone"
                              if live else ""))
    for name in remove_dead_temporaries(folder):
        out.append(f"  removed {name} (a temporary file of an interrupted run)")
    cap, origin = limit(folder)
    found = entries(folder)
    out.append(f"  limit        : {size_text(cap)} ({origin}; change with groupsrc cache "
               "--limit SIZE)")
    out.append(f"  entries      : {len(found)}, {size_text(sum(e.size for e in found))} in all"
               + ("" if folder.is_dir() else " (the folder does not exist yet)"))
    for e in reversed(found):                          # most recently used first
        shape = (f"{e.shape[1]} sources x {e.shape[2]} samples, "
                 if e.shape and len(e.shape) == 3 else "")
        when = datetime.datetime.fromtimestamp(e.last_use).strftime("%Y-%m-%d %H:%M")
        out.append(f"    {e.key[:12]}  {shape}{size_text(e.size)}, last used {when}")
    return out
