"""Where a run's results go, and the rules that keep the user's files safe.

The README's "Outputs" section states the same rules for users.

1. **Recognising a results folder.**  A folder is a groupsrc results folder
   when it holds a run record ``run.json`` (a JSON object with
   ``groupsrc_version`` and ``output_files``).  Its contents are *ours* when
   every file in it is listed in ``output_files``, or is something
   ``groupsrc report`` rebuilds (``report.html``, ``methods.md``, figures in a
   ``figures/`` folder), or operating-system clutter (``.DS_Store``,
   ``Thumbs.db``, ``desktop.ini``, ``._*``).
2. **Replacing.**  An existing folder that is not empty is replaced only with
   ``--overwrite``, and then only when it is a results folder whose contents
   are all ours.  Anything else is refused (exit 1) and left untouched.
3. **Inputs.**  The results folder may never be, contain, or sit inside an
   input (the analysis file, the tables, any map, the mask, the atlas).
4. **Staging and swap.**  Results are written into a hidden sibling
   ``.OUT.groupsrc-staging-<owner>-<random>``; on success an existing ``OUT``
   is renamed to ``.OUT.groupsrc-previous-<owner>-<random>``, the staging
   folder is renamed to ``OUT`` and the previous results are deleted.  A run
   that fails or is interrupted removes its staging folder and leaves ``OUT``
   as it was.
5. **Stale folders.**  A run killed outright (SIGKILL, power loss) cannot
   clean up.  The next run for the same ``OUT`` removes the hidden folders
   that are provably ours and dead: the name follows the pattern above, the
   owner token names this machine, and that process no longer exists (or the
   process id now belongs to a process started at another time).  A
   previous-results folder whose swap never finished is renamed back to
   ``OUT`` when ``OUT`` is missing; otherwise it is deleted.  Folders of
   other machines (shared file systems) and of live processes are left alone.
6. **Permissions** follow the user's umask, like any other tool.
7. **One run at a time.**  A run holds an exclusive lock on its results
   folder (and so on its checkpoint) for its whole length:
   :mod:`groupsrc.outputs.runlock`.

The owner token is ``<host>-<pid>-<start>`` (:mod:`groupsrc.processes`).
"""

from __future__ import annotations

import json
import os
import secrets
import shutil
import tempfile
from contextlib import contextmanager
from pathlib import Path

from ..atomic import folder_mode
from ..inputs.problems import InputError, ProblemList
from ..processes import owner_is_dead, owner_token

RUN_RECORD = "run.json"
STAGING = "groupsrc-staging"
PREVIOUS = "groupsrc-previous"
#: files groupsrc report rebuilds, so they may differ from the run record's list
REBUILT = {"report.html", "methods.md"}
FIGURE_SUFFIXES = {".png", ".svg"}
OS_CLUTTER = {".DS_Store", "Thumbs.db", "desktop.ini"}
#: files named in a refusal message at most
_LIST_AT_MOST = 5


# ----------------------------------------------------------------------------
# owner tokens (groupsrc/processes.py)
# ----------------------------------------------------------------------------

_owner_is_dead = owner_is_dead


def _hidden_prefix(out: Path, kind: str) -> str:
    return f".{out.name}.{kind}-"


# ----------------------------------------------------------------------------
# what is ours
# ----------------------------------------------------------------------------

def read_run_record(folder: Path) -> dict | None:
    """The folder's run record, or None when it is missing or not ours."""
    try:
        record = json.loads((Path(folder) / RUN_RECORD).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(record, dict) or "groupsrc_version" not in record \
            or not isinstance(record.get("output_files"), list):
        return None
    return record


def foreign_files(folder: Path, record: dict) -> list:
    """Files in ``folder`` that groupsrc did not write (relative paths)."""
    folder = Path(folder)
    listed = {str(f) for f in record.get("output_files", [])} | {RUN_RECORD}
    out = []
    for p in sorted(folder.rglob("*")):
        if p.is_dir() and not p.is_symlink():
            continue
        rel = p.relative_to(folder).as_posix()
        if rel in listed or rel in REBUILT or p.name in OS_CLUTTER or p.name.startswith("._"):
            continue
        if p.parent.name == "figures" and p.suffix in FIGURE_SUFFIXES and not p.is_symlink():
            continue
        out.append(rel)
    return out


# ----------------------------------------------------------------------------
# checks before a run
# ----------------------------------------------------------------------------

def _resolved(path) -> Path:
    return Path(os.path.abspath(Path(path).expanduser())).resolve()


def check_target(out, *, overwrite: bool, inputs=(), problems: ProblemList | None = None,
                 option: str = "--out") -> Path:
    """Check that ``out`` may receive results; return it resolved.

    Raises :class:`InputError` listing every reason it may not (see the module
    docstring for the rules); nothing is created or changed.
    """
    problems = ProblemList() if problems is None else problems
    out = _resolved(out)
    where = str(out)
    n_before = len(problems)
    hits_in, hits_around = [], []
    for p in sorted({_resolved(p) for p in inputs if p is not None}):
        if p == out or p.is_relative_to(out):
            hits_in.append(p)
        elif out.is_relative_to(p):
            hits_around.append(p)
    if hits_in:
        shown = ", ".join("(the folder itself)" if p == out else p.relative_to(out).as_posix()
                          for p in hits_in[:3])
        more = f", and {len(hits_in) - 3} more" if len(hits_in) > 3 else ""
        problems.add(where, f"the results folder would be or contain {len(hits_in)} input "
                     f"file(s) of this analysis ({shown}{more})",
                     f"choose an {option} folder that holds none of the inputs, e.g. a new "
                     "folder 'results' beside the analysis file")
    for p in hits_around[:_LIST_AT_MOST]:
        problems.add(where, f"the results folder would sit inside the input {p}",
                     f"choose an {option} folder outside it")
    if out.exists() and not out.is_dir():
        problems.add(where, "exists and is not a folder", f"choose another {option}")
    elif out.is_dir() and any(out.iterdir()):
        record = read_run_record(out)
        if not overwrite:
            what = ("a results folder already exists here" if record is not None
                    else "the folder exists, is not empty and is not a groupsrc results folder")
            fix = (f"pass --overwrite to replace it, or choose another {option}"
                   if record is not None else f"choose a new or empty {option} folder")
            problems.add(where, what, fix)
        elif record is None:
            problems.add(where, "--overwrite refused: this folder was not written by groupsrc "
                         f"(it has no valid {RUN_RECORD}), so it is not replaced",
                         f"choose a new or empty {option} folder; nothing was changed")
        else:
            alien = foreign_files(out, record)
            if alien:
                shown = ", ".join(alien[:_LIST_AT_MOST])
                more = f" and {len(alien) - _LIST_AT_MOST} more" if len(alien) > _LIST_AT_MOST else ""
                problems.add(where, f"--overwrite refused: the results folder holds "
                             f"{len(alien)} file(s) groupsrc did not write ({shown}{more})",
                             "move them out of the folder, or choose another "
                             f"{option}; nothing was changed")
    if len(problems) > n_before:
        raise InputError(problems)
    return out


# ----------------------------------------------------------------------------
# stale hidden folders of killed runs
# ----------------------------------------------------------------------------

def sweep_stale(out) -> list:
    """Remove (or restore) hidden folders of dead runs for ``out``; return actions taken."""
    out = _resolved(out)
    parent = out.parent
    if not parent.is_dir():
        return []
    actions = []
    staging, previous = _hidden_prefix(out, STAGING), _hidden_prefix(out, PREVIOUS)
    try:
        entries = sorted(parent.iterdir())
    except OSError:
        return []
    for p in entries:
        name = p.name
        if not p.is_dir() or p.is_symlink():
            continue
        if name.startswith(staging) and _owner_is_dead(name[len(staging):]):
            shutil.rmtree(p, ignore_errors=True)
            actions.append(f"removed the partial results {p.name} of an interrupted run")
        elif name.startswith(previous) and _owner_is_dead(name[len(previous):]):
            if not out.exists() and read_run_record(p) is not None:
                os.replace(p, out)
                actions.append(f"restored the previous results from {p.name} "
                               "(a run was interrupted while replacing them)")
            else:
                shutil.rmtree(p, ignore_errors=True)
                actions.append(f"removed the superseded results {p.name} of an interrupted run")
    return actions


# ----------------------------------------------------------------------------
# staging and swap
# ----------------------------------------------------------------------------

@contextmanager
def staged(out):
    """Yield a fresh hidden staging folder beside ``out``; swap it in on success.

    The staging folder is removed when the body raises (or is interrupted).
    """
    out = _resolved(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    token = owner_token()
    tmp = Path(tempfile.mkdtemp(prefix=_hidden_prefix(out, STAGING) + token + "-",
                                dir=out.parent))
    try:
        os.chmod(tmp, folder_mode())           # mkdtemp makes 0700
        yield tmp
        if out.exists():
            old = out.with_name(_hidden_prefix(out, PREVIOUS) + token + "-"
                                + secrets.token_hex(4))
            os.replace(out, old)
            try:
                os.replace(tmp, out)
            except BaseException:
                os.replace(old, out)            # put the previous results back
                raise
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, out)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
