"""Checkpoints: the resampling progress of a run, saved as batches finish.

A run's checkpoint is one folder (the pipeline decides where; see
``groupsrc.pipeline.checkpoint_folder``) holding

* ``manifest.json`` -- checkpoint format, groupsrc version, and the run's
  *fingerprint*: the sha256 of every input, every setting after the
  command-line overrides (resamples, seed), and the contrasts;
* per contrast ``<name>.json`` -- the :class:`~..results.ResamplingRecord`
  fields fixed before resampling starts (seed, kind, resamples, exact,
  batch size, Freedman-Lane), and ``<name>.npz`` -- the finished resamples'
  ``max_pos`` / ``max_neg`` and which resamples are done.

Every file is written atomically (:mod:`groupsrc.atomic`), the arrays first
and at most every ``FLUSH_SECONDS`` (and always when a contrast finishes),
so a kill at any instant leaves a consistent checkpoint that is at most a
few batches behind.  Resuming reruns only the missing batches with the
recorded batch size; because a resample's arithmetic never depends on its
batch, worker or backend (:mod:`..models.ols`), the resumed null distribution --
and so every output -- is the uninterrupted run's, bit for bit.

A resume is refused (:class:`CheckpointError`, naming what differs) when the
fingerprint differs, when the checkpoint was written by another groupsrc
version or format, or when there is none.
"""

from __future__ import annotations

import dataclasses
import json
import shutil
import time
from pathlib import Path

import numpy as np

from ...atomic import atomic_path, write_text

#: layout version of the checkpoint files
FORMAT = 1
MANIFEST = "manifest.json"
#: least seconds between two saves of one contrast's progress (the last batch always saves)
FLUSH_SECONDS = 1.0
#: record fields fixed before resampling (critical_value comes after)
FIXED_FIELDS = ("seed", "kind", "n_resamples", "exact", "batch_size", "freedman_lane")


class CheckpointError(Exception):
    """A checkpoint cannot be used; ``what`` and ``fix`` say why and how to go on."""

    def __init__(self, what, fix):
        super().__init__(f"{what} -> {fix}")
        self.what, self.fix = what, fix


def _flatten(obj, prefix=""):
    if isinstance(obj, dict):
        out = {}
        for k, v in obj.items():
            out.update(_flatten(v, f"{prefix}{k}."))
        return out
    return {prefix.rstrip("."): obj}


def differences(old: dict, new: dict, limit: int = 6) -> list:
    """Human-readable list of what differs between two fingerprints."""
    out = []
    a, b = old.get("inputs", {}), new.get("inputs", {})
    for path in sorted(set(a) | set(b)):
        if path not in a:
            out.append(f"input {path} is new")
        elif path not in b:
            out.append(f"input {path} is no longer used")
        elif a[path] != b[path]:
            out.append(f"input {path} changed (its content differs)")
    fa = _flatten({k: v for k, v in old.items() if k != "inputs"})
    fb = _flatten({k: v for k, v in new.items() if k != "inputs"})
    for key in sorted(set(fa) | set(fb)):
        if fa.get(key) != fb.get(key):
            out.append(f"{key}: {fa.get(key, 'unset')!r} -> {fb.get(key, 'unset')!r}")
    if len(out) > limit:
        out = out[:limit] + [f"and {len(out) - limit} more"]
    return out


def _jsonable(obj):
    return json.loads(json.dumps(obj, default=str))


class Checkpoint:
    """One run's checkpoint folder (see the module docstring)."""

    def __init__(self, folder, fingerprint: dict, version: str):
        self.folder = Path(folder)
        self.fingerprint = _jsonable(fingerprint)
        self.version = str(version)

    # -- opening ----------------------------------------------------------------
    @classmethod
    def start(cls, folder, fingerprint, version) -> "Checkpoint":
        """A fresh checkpoint (an older one in ``folder`` is replaced)."""
        cp = cls(folder, fingerprint, version)
        if cp.folder.exists():
            shutil.rmtree(cp.folder)
        cp.folder.mkdir(parents=True)
        write_text(cp.folder / MANIFEST, json.dumps(
            {"format": FORMAT, "groupsrc_version": cp.version,
             "fingerprint": cp.fingerprint}, indent=1, sort_keys=True))
        return cp

    @classmethod
    def resume(cls, folder, fingerprint, version) -> "Checkpoint":
        """The checkpoint in ``folder`` after checking it belongs to this run."""
        cp = cls(folder, fingerprint, version)
        try:
            manifest = json.loads((cp.folder / MANIFEST).read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise CheckpointError("--resume: there is nothing to resume (no checkpoint of an "
                                  "interrupted run for this results folder)",
                                  "run the same command without --resume") from None
        except (OSError, ValueError):
            raise CheckpointError(f"--resume: the checkpoint {cp.folder} cannot be read",
                                  "run without --resume to start afresh") from None
        if not isinstance(manifest, dict) or manifest.get("format") != FORMAT \
                or manifest.get("groupsrc_version") != cp.version:
            got = manifest.get("groupsrc_version", "?") if isinstance(manifest, dict) else "?"
            raise CheckpointError(
                f"--resume: the checkpoint was written by another version of groupsrc "
                f"({got}, checkpoint format {manifest.get('format', '?') if isinstance(manifest, dict) else '?'}); "
                f"this is {cp.version} (format {FORMAT})",
                "run without --resume to start afresh")
        changed = differences(manifest.get("fingerprint", {}), cp.fingerprint)
        if changed:
            raise CheckpointError("--resume refused: since the interrupted run, "
                                  + "; ".join(changed),
                                  "put the inputs and settings back as they were, or run "
                                  "without --resume to start afresh")
        damaged = cp.damaged()
        if damaged:
            raise CheckpointError(
                f"--resume: the checkpoint {cp.folder} is damaged ("
                + "; ".join(damaged) + "), so the run cannot continue from it",
                "run the same command without --resume to start afresh (the damaged "
                "checkpoint is then replaced)")
        return cp

    def damaged(self) -> list:
        """What cannot be read among the saved contrasts' files (empty when all can):
        a file cut short by a full disk or copied in part, or edited by hand."""
        found = []
        for path in sorted(self.folder.glob("*.json")):
            if path.name == MANIFEST:
                continue
            try:
                record = json.loads(path.read_text(encoding="utf-8"))
                if not isinstance(record, dict) or not all(k in record for k in FIXED_FIELDS):
                    raise ValueError("fields missing")
            except (OSError, ValueError, UnicodeDecodeError) as exc:
                found.append(f"{path.name}: {type(exc).__name__}")
        for path in sorted(self.folder.glob("*.npz")):
            why = _npz_problem(path)
            if why:
                found.append(f"{path.name}: {why}")
        return found

    def contrast(self, name) -> "ContrastProgress":
        return ContrastProgress(self.folder, name)

    def has_progress(self) -> bool:
        """True when some finished resamples are saved."""
        return any(self.folder.glob("*.npz"))

    def remove(self):
        shutil.rmtree(self.folder, ignore_errors=True)


class ContrastProgress:
    """Resampling progress of one contrast: restore, add batches, save."""

    def __init__(self, folder: Path, name: str):
        self.json = Path(folder) / f"{name}.json"
        self.npz = Path(folder) / f"{name}.npz"
        self.pos = self.neg = self.done = None
        self._last = 0.0
        self._dirty = False

    def begin(self, record_fields: dict, m: int) -> int:
        """Restore the finished resamples (or start); returns the batch size to use.

        ``record_fields``: the ResamplingRecord fields of :data:`FIXED_FIELDS`
        as this run would choose them; a recorded batch size wins (the batch
        size never changes a result, but it is part of the record).
        """
        record = {k: record_fields[k] for k in FIXED_FIELDS}
        saved = None
        try:
            saved = json.loads(self.json.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            pass
        if isinstance(saved, dict) and all(saved.get(k) == record[k] for k in FIXED_FIELDS
                                           if k != "batch_size"):
            record["batch_size"] = int(saved["batch_size"])
            if self.npz.exists() and _npz_problem(self.npz) is None:
                with np.load(self.npz) as z:
                    pos, neg, done = z["pos"], z["neg"], z["done"]
                if pos.shape == neg.shape == done.shape == (m,):
                    self.pos, self.neg, self.done = pos.copy(), neg.copy(), done.copy()
        if self.done is None:
            self.pos, self.neg = np.zeros(m), np.zeros(m)
            self.done = np.zeros(m, bool)
            write_text(self.json, json.dumps(_jsonable(record), indent=1, sort_keys=True))
        return int(record["batch_size"])

    def add(self, lo, pos, neg):
        self.pos[lo:lo + pos.size] = pos
        self.neg[lo:lo + neg.size] = neg
        self.done[lo:lo + pos.size] = True
        self._dirty = True
        self.flush(force=bool(self.done.all()))

    def flush(self, force=False):
        """Save the progress atomically (at most every FLUSH_SECONDS unless forced)."""
        now = time.monotonic()
        if not self._dirty or (not force and now - self._last < FLUSH_SECONDS):
            return
        with atomic_path(self.npz) as tmp:
            with open(tmp, "wb") as fh:
                np.savez(fh, pos=self.pos, neg=self.neg, done=self.done)
        self._last = now
        self._dirty = False


def _npz_problem(path) -> str | None:
    """Why a saved progress file cannot be read, or None when it can."""
    import zipfile
    try:
        with np.load(path) as z:
            arrays = [np.asarray(z[k]) for k in ("pos", "neg", "done")]
        if len({a.shape for a in arrays}) != 1 or arrays[0].ndim != 1:
            return "its arrays differ in length"
    except KeyError as exc:
        return f"array {exc} missing"
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as exc:
        return f"cut short or damaged ({type(exc).__name__})"
    return None


def record_fields(record) -> dict:
    """The fixed fields of a ResamplingRecord-like object or dict."""
    d = dataclasses.asdict(record) if dataclasses.is_dataclass(record) else dict(record)
    return {k: d[k] for k in FIXED_FIELDS}


__all__ = ["Checkpoint", "CheckpointError", "ContrastProgress", "FLUSH_SECONDS", "differences"]
