"""Atomic writing: the one helper every part of groupsrc writes files through.

A file is written to a temporary name in its destination folder and moved
over the final name with :func:`os.replace` (atomic on POSIX and Windows
within one file system), so a reader -- or a run interrupted half-way --
never sees a half-written file.  The file then gets the mode a plain
``open`` would give under the user's umask (``tempfile.mkstemp`` alone would
make it owner-only).

Examples
--------
>>> import tempfile, pathlib
>>> d = pathlib.Path(tempfile.mkdtemp())
>>> write_text(d / "a.txt", "hello\\n").read_text()
'hello\\n'
"""

from __future__ import annotations

import os
import tempfile
from contextlib import contextmanager
from pathlib import Path


def current_umask() -> int:
    """The process umask, read without changing it where the system allows."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)       # fallback: set and restore (not thread safe)
    os.umask(mask)
    return mask


def file_mode() -> int:
    """Mode of a new file under the user's umask (as ``open`` would give)."""
    return 0o666 & ~current_umask()


def folder_mode() -> int:
    """Mode of a new folder under the user's umask (as ``mkdir`` would give)."""
    return 0o777 & ~current_umask()


@contextmanager
def atomic_path(path, suffix=None):
    """Yield a temporary path beside ``path``; move it over ``path`` on success.

    ``suffix`` defaults to the final name's full suffix (e.g. ``.nii.gz``) so
    that writers which choose a format from the extension still work.  On an
    exception (or interruption) the temporary file is removed and ``path`` is
    left as it was.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    if suffix is None:
        suffix = "".join(path.suffixes) or ".part"
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=suffix, dir=path.parent)
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        os.chmod(tmp, file_mode())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def write_bytes(path, data: bytes) -> Path:
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return Path(path)


def write_text(path, text: str) -> Path:
    """UTF-8 text with the line ends given (no platform translation)."""
    return write_bytes(path, text.encode("utf-8"))
