"""The working-set bound (``--memory``): how big batches and chunks may be, and
whether the per-participant arrays live on disk.

Model of the working set of one run (bytes; ``F`` features, ``n`` participants):

* per-feature results: about ``PER_FEATURE`` x F (the observed statistic,
  estimate, standard error, effect, p-values, labels; float64);
* the batch in hand (one buffer, shared by the threads of the threads backend):
  its resampled maps, ``B x F x 4``, or for cluster mass and extent their
  supra-threshold lists, ``B x F`` (:mod:`..corrections.exceedances`, in blocks of 64
  resamples: one block of lists takes the bytes of 16 maps);
* the scorers' scratch arrays, per scoring thread: ``Correction.scratch_bytes``
  per feature (at most 17 for cluster mass / extent, 84 for TFCE, 0 otherwise);
* the reduced data and their residuals, ``2 x n x F x 4``: in memory while
  they fit half of what is left, else in files (memory-mapped, read chunk by
  chunk with the pages handed back after each chunk, :func:`release`);
* chunk buffers of the reduction and the products.

``--memory`` bounds these; the interpreter and its libraries (about
``FIXED_OVERHEAD`` bytes: numpy, scipy, pandas, numba, matplotlib) come on
top.  The smallest bound that works holds one product block of
``RES_BLOCK`` resampled maps (or of ``LIST_BLOCK`` resamples' lists, the same
bytes) per buffer plus the per-feature results; below
it :class:`MemoryTooSmall` says the minimum.  Without ``--memory`` the
defaults of :mod:`.backends` and :mod:`..models.reduction` apply and every array is
in memory.
"""

from __future__ import annotations

import atexit
import os
import re
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ...processes import owner_is_dead, owner_token
from .backends import worker_count
from ..models.base import LIST_BLOCK, RES_BLOCK
from .pages import release  # noqa: F401  (re-exported)

#: bytes per feature held outside the batches (observed maps, results and their
#: temporaries, float64; measured with tests/benchmarks/bench_memory.py)
PER_FEATURE = 20 * 8
#: the interpreter and its libraries, not counted by --memory (measured, rounded up)
FIXED_OVERHEAD = 350 * 2 ** 20
#: bytes of the maps read per reduction chunk, at most and at least
CHUNK_MAX, CHUNK_MIN = 64 * 2 ** 20, 256 * 2 ** 10
_UNITS = {"": 1, "b": 1, "k": 2 ** 10, "kb": 10 ** 3, "kib": 2 ** 10, "m": 2 ** 20,
          "mb": 10 ** 6, "mib": 2 ** 20, "g": 2 ** 30, "gb": 10 ** 9, "gib": 2 ** 30,
          "t": 2 ** 40, "tb": 10 ** 12, "tib": 2 ** 40}


class MemoryTooSmall(ValueError):
    """``--memory`` below what one batch needs; ``fix`` names the minimum."""

    def __init__(self, what, fix):
        super().__init__(what)
        self.fix = fix


def parse_size(text) -> int:
    """Bytes of a size such as ``512M``, ``4G``, ``2.5GiB``, ``8000000`` (M, G: 2^20, 2^30;
    MB, GB: 10^6, 10^9); ValueError when it is not one."""
    if re.fullmatch(r"\s*-.*", str(text)):
        raise ValueError(f"'{text}' is not a positive size: give one such as 512M or 4G")
    m = re.fullmatch(r"\s*([0-9]+(?:\.[0-9]+)?)\s*([A-Za-z]*)\s*", str(text))
    if not m or m.group(2).lower() not in _UNITS:
        raise ValueError(f"'{text}' is not a size such as 512M, 4G or 2.5GiB")
    value = float(m.group(1)) * _UNITS[m.group(2).lower()]
    if value < 1:
        raise ValueError(f"'{text}' is not a positive size")
    return int(value)


def physical_memory() -> int | None:
    """Bytes of memory this machine has (None where unknown)."""
    try:
        return int(os.sysconf("SC_PAGE_SIZE")) * int(os.sysconf("SC_PHYS_PAGES"))
    except (ValueError, OSError, AttributeError):
        return None


def size_text(n) -> str:
    for unit, div in (("TiB", 2 ** 40), ("GiB", 2 ** 30), ("MiB", 2 ** 20), ("KiB", 2 ** 10)):
        if n >= div:
            return f"{n / div:.4g} {unit}"
    return f"{int(n)} bytes"


@dataclass
class Plan:
    """Sizes for one run: ``chunk_bytes`` per reduction chunk, ``map_budget`` for
    the resampled maps, and ``array(shape)`` that allocates a float32 array in
    memory or on disk."""

    chunk_bytes: float | None = None
    map_budget: float | None = None
    on_disk: bool = False

    def array(self, shape):
        if not self.on_disk:
            return np.empty(shape, np.float32)
        return _disk_array(shape)


def minimum(n_features, scratch=0) -> int:
    """The smallest working set that runs: one product block of maps, the
    per-feature results, the scorers' scratch (``scratch`` bytes per feature, all
    threads together) and the smallest chunks."""
    return int((PER_FEATURE + scratch) * n_features + RES_BLOCK * 4 * n_features
               + 2 * CHUNK_MIN)


def plan(memory, n_units, n_features, *, workers=1, distributed=False,
         scratch_per_thread=0) -> Plan:
    """The sizes that keep the working set within ``memory`` bytes (None: defaults).

    One map buffer lives in this process (the threads backend shares one batch
    between its threads; Dask workers hold theirs in their own processes).
    ``scratch_per_thread``: the correction's scratch bytes per feature
    (``Correction.scratch_bytes``), held by each of the ``workers`` threads that
    score maps here (none when ``distributed``).
    """
    if memory is None:
        return Plan()
    scratch = 0 if distributed else scratch_per_thread * worker_count(workers)
    low = minimum(n_features, scratch)
    if memory < low:
        raise MemoryTooSmall(
            f"{size_text(memory)} is below what one batch needs: {RES_BLOCK} resampled maps "
            f"of {n_features:,} source x sample points (or, for cluster mass and extent, the "
            f"supra-threshold points of {LIST_BLOCK} resamples in the same bytes), the "
            f"scorers' work arrays and the result maps take at least {size_text(low)}",
            f"give --memory {size_text(low)} or more")
    chunk = float(min(CHUNK_MAX, max(CHUNK_MIN, memory / 32)))
    left = memory - (PER_FEATURE + scratch) * n_features - 2 * chunk
    data = 2 * 4.0 * n_units * n_features
    on_disk = data > left / 2
    budget = left - (0 if on_disk else data)
    return Plan(chunk_bytes=chunk, map_budget=max(budget, RES_BLOCK * 4.0 * n_features),
                on_disk=on_disk)


# ----------------------------------------------------------------------------
# arrays on disk
# ----------------------------------------------------------------------------

_WORK: list = []
#: work folders in the system's temporary folder: ``groupsrc-work-<owner token>-<random>``
WORK_PREFIX = "groupsrc-work-"


def _work_dir() -> Path:
    if not _WORK:
        _WORK.append(Path(tempfile.mkdtemp(prefix=f"{WORK_PREFIX}{owner_token()}-")))
        atexit.register(shutil.rmtree, _WORK[0], True)
    return _WORK[0]


def remove_dead_work_dirs(base=None) -> list:
    """Remove the work folders of runs that were killed outright (their owner token's
    process is provably gone, :mod:`groupsrc.processes`); return their names.  Folders
    of live runs and of other hosts are left alone, as are earlier unnamed ones."""
    base = Path(base or tempfile.gettempdir())
    removed = []
    try:
        names = sorted(os.listdir(base))
    except OSError:
        return []
    for name in names:
        if not name.startswith(WORK_PREFIX):
            continue
        token = "-".join(name[len(WORK_PREFIX):].split("-")[:3])
        path = base / name
        if path.is_dir() and not path.is_symlink() and owner_is_dead(token):
            shutil.rmtree(path, ignore_errors=True)
            removed.append(name)
    return removed


def _disk_array(shape):
    fd, path = tempfile.mkstemp(suffix=".f32", dir=_work_dir())
    os.close(fd)
    return np.memmap(path, dtype=np.float32, mode="w+", shape=tuple(shape))
