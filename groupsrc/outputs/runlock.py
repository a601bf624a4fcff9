"""One run at a time per results folder: the folder's lock.

A run holds an exclusive lock on its results folder ``OUT`` for its whole
length (:func:`results_lock`, taken by ``pipeline.run`` before it reads,
replaces or removes anything; also by ``groupsrc demo`` and ``groupsrc
report``).  The lock is the hidden sibling ``.OUT.groupsrc-lock``, locked with
``flock`` -- the kernel releases it when the process ends, however it ends,
so a stale lock never blocks a run and a live one is never stolen -- and
holding the owner's token (:mod:`groupsrc.processes`), process id, start time
and command, for the messages.  It covers the checkpoint too, which belongs to
the same ``OUT``: a second run (with or without ``--overwrite`` or
``--resume``) is refused, naming the process that holds it, before it reads,
replaces or deletes anything of the first's.  A lock file left by a run killed
outright is taken over by the next run, which says so once (its record is
then its own); the file is removed when the run ends.  Where the file system
cannot ``flock``, the owner token decides: a lock of a process that is not
provably dead is respected.
"""

from __future__ import annotations

import json
import os
import socket
from contextlib import contextmanager
from pathlib import Path

from ..inputs.problems import InputError, ProblemList
from ..processes import host_tag, owner_is_dead, owner_token
from .folder import _resolved

# ----------------------------------------------------------------------------

LOCK = "groupsrc-lock"
#: locks this process holds: lock path -> [file descriptor, depth]
_HELD: dict = {}


def lock_path(out) -> Path:
    """The lock file of results folder ``out``: ``.OUT.groupsrc-lock`` beside it."""
    out = _resolved(out)
    return out.parent / f".{out.name}.{LOCK}"


def _read_lock(fd) -> dict:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        data = json.loads(os.read(fd, 1 << 16).decode("utf-8") or "{}")
        return data if isinstance(data, dict) else {}
    except (OSError, ValueError):
        return {}


def _holder_text(record: dict) -> str:
    pid = record.get("pid", "?")
    where = "this machine" if record.get("host") == host_tag() else \
        f"host {record.get('hostname', '?')}"
    text = f"groupsrc process {pid} on {where}"
    if record.get("started"):
        text += f", started {record['started']}"
    if record.get("command"):
        text += f" ({' '.join(map(str, record['command']))[:200]})"
    return text


def _busy(out, path, record, option) -> InputError:
    problems = ProblemList()
    problems.add(str(out), "the results folder is in use by another run: "
                 + (_holder_text(record) if record else f"the lock {path.name} is held"),
                 "wait until that run ends, or choose another " + option + "; nothing was "
                 "changed (a lock whose process has ended is taken over by the next run)")
    return InputError(problems)


def _flock(fd) -> bool | None:
    """True: locked; False: held by another process; None: the file system cannot lock."""
    import errno
    try:
        import fcntl
    except ImportError:           # pragma: no cover - systems without flock (Windows)
        return None
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        return True
    except BlockingIOError:
        return False
    except OSError as exc:
        if exc.errno in (errno.ENOLCK, errno.EOPNOTSUPP, errno.ENOSYS, errno.EINVAL):
            return None
        raise


def _acquire(out, path, option):
    """An open, locked descriptor of ``path`` and the record it held before."""
    for _ in range(5):
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o666)
        try:
            got = _flock(fd)
            previous = _read_lock(fd)
            if got is False:
                raise _busy(out, path, previous, option)
            if got is None and previous.get("owner") and not owner_is_dead(previous["owner"]) \
                    and previous["owner"] != owner_token():
                raise _busy(out, path, previous, option)
            try:
                same = os.fstat(fd).st_ino == os.stat(path).st_ino
            except FileNotFoundError:
                same = False
            if same:             # not a file its previous holder removed meanwhile
                return fd, previous
        except BaseException:
            os.close(fd)
            raise
        os.close(fd)
    raise _busy(out, path, {}, option)


def _missing_parents(folder: Path) -> list:
    missing = []
    while not folder.exists() and folder != folder.parent:
        missing.append(folder)
        folder = folder.parent
    return missing


@contextmanager
def results_lock(out, *, command=None, option: str = "--out", log=None):
    """Hold the exclusive lock of results folder ``out`` (and of its checkpoint) for
    the body; :class:`InputError` naming the holder when another run has it.

    Re-entrant within one process (``groupsrc demo`` holds it around the run it
    starts).  Folders created to hold the lock are removed again when the body
    leaves them empty.  ``log(text)`` receives the one notice that a lock left by
    an ended run was taken over.
    """
    import datetime
    import time as _time
    out = _resolved(out)
    path = lock_path(out)
    key = str(path)
    if key in _HELD:
        _HELD[key][1] += 1
        try:
            yield path
        finally:
            _HELD[key][1] -= 1
        return
    created = _missing_parents(out.parent)
    out.parent.mkdir(parents=True, exist_ok=True)
    fd = None
    try:
        fd, previous = _acquire(out, path, option)
        mine = owner_token()
        if previous.get("owner") and previous.get("owner") != mine and log is not None:
            log(f"took over the lock {path.name} of {_holder_text(previous)}, which ended "
                "without releasing it")
        record = {"owner": mine, "pid": os.getpid(), "host": host_tag(),
                  "hostname": socket.gethostname(),
                  "started": datetime.datetime.now().astimezone().isoformat(timespec="seconds"),
                  "command": list(command) if command else None,
                  "since": _time.time()}
        os.ftruncate(fd, 0)
        os.lseek(fd, 0, os.SEEK_SET)
        os.write(fd, json.dumps(record).encode("utf-8"))
        _HELD[key] = [fd, 1]
        yield path
    finally:
        _HELD.pop(key, None)
        if fd is not None:
            try:
                if os.fstat(fd).st_ino == os.stat(path).st_ino:
                    path.unlink()
            except OSError:
                pass
            os.close(fd)
        for folder in created:          # deepest first; only while empty
            try:
                folder.rmdir()
            except OSError:
                break


def holds_lock(out) -> bool:
    """Whether this process holds the lock of results folder ``out``."""
    return str(lock_path(out)) in _HELD
