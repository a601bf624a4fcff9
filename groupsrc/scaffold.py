"""``groupsrc init MAPS_FOLDER``: a maps table, a participants skeleton and an analysis
file from BIDS-like file names.

A map file's name is read as BIDS entities, ``key-label`` parts joined by ``_``
(BIDS specification, "File name structure"; ``cond`` is ours, BIDS has no
condition entity): ``sub-<label>`` (required) names the participant,
``ses-<label>`` the session, ``cond-<label>`` the condition, and ``hemi-L`` /
``hemi-R`` (or a ``.left.`` / ``.right.`` part before the suffix) the
hemisphere of a GIfTI map; other entities (``task``, ``run``, ``desc``, ...)
are allowed but must not tell two maps of one participant, session and
condition apart.  Map files are ``.nii`` / ``.nii.gz`` (volumes), ``.func.gii``
(one file per hemisphere) and ``.dtseries.nii`` (CIFTI-2); other files (JSON
sidecars, notes) are skipped and counted.  The folder is searched recursively.

Written, beside the maps folder unless ``--out`` says otherwise, and only when
none of them exists (nothing is ever overwritten; all three or none):

* ``maps.tsv`` -- one row per map: ``participant_id``, ``condition`` and
  ``session`` when the names carry them, the path(s) relative to the table;
* ``participants.tsv`` -- one row per participant with an empty (``n/a``)
  ``group`` column to fill in;
* ``analysis.toml`` -- a commented analysis file: the cohort, a contrast of the
  first two conditions (or of the mean response with one condition), the
  usual inference settings, and what to fill in (unit, meshes, time axis).

Every problem (a map without ``sub-``, two maps for one cell, formats mixed, a
hemisphere missing) is listed at once, naming the file.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

from .atomic import write_text
from .inputs.problems import InputError, ProblemList

#: suffixes of map files, longest first (".dtseries.nii" also ends in ".nii")
MAP_SUFFIXES = ((".dtseries.nii", "cifti"), (".func.gii", "gifti"), (".nii.gz", "nifti"),
                (".nii", "nifti"))
OUTPUTS = ("maps.tsv", "participants.tsv", "analysis.toml")
_ENTITY = re.compile(r"^([A-Za-z]+)-([A-Za-z0-9]+)$")
_HEMI = {"l": "left", "left": "left", "r": "right", "right": "right"}


@dataclass
class MapFile:
    path: Path
    kind: str
    participant: str
    session: str | None
    condition: str | None
    hemisphere: str | None
    others: tuple


def _suffix(name):
    low = name.lower()
    for suffix, kind in MAP_SUFFIXES:
        if low.endswith(suffix):
            return suffix, kind
    return None, None


def parse_name(path: Path):
    """A :class:`MapFile` from a file name, or (None, why) when it cannot be one."""
    suffix, kind = _suffix(path.name)
    stem = path.name[: len(path.name) - len(suffix)]
    hemi = None
    parts = stem.split(".")
    if len(parts) > 1 and parts[-1].lower() in ("left", "right"):
        hemi, stem = parts[-1].lower(), ".".join(parts[:-1])
    entities, others = {}, []
    for part in stem.split("_"):
        m = _ENTITY.match(part)
        if not m:
            others.append(part)
            continue
        key, label = m.group(1).lower(), m.group(2)
        if key in entities:
            return None, f"names '{key}-' twice"
        entities[key] = label
    if "sub" not in entities:
        return None, "has no sub-<label> part naming the participant"
    if "hemi" in entities:
        h = _HEMI.get(entities.pop("hemi").lower())
        if h is None or (hemi and hemi != h):
            return None, "names no clear hemisphere (hemi-L or hemi-R)"
        hemi = h
    if kind == "gifti" and hemi is None:
        return None, "is a GIfTI map without a hemisphere (hemi-L / hemi-R, or .left. / .right.)"
    rest = tuple(sorted((k, v) for k, v in entities.items() if k not in ("sub", "ses", "cond")))
    return MapFile(path, kind, f"sub-{entities['sub']}", entities.get("ses"),
                   entities.get("cond"), hemi, rest + tuple(others)), None


def scan(folder: Path, problems: ProblemList):
    """(map files, number of other files skipped) under ``folder``."""
    found, skipped = [], 0
    for path in sorted(p for p in folder.rglob("*") if p.is_file()):
        rel = path.relative_to(folder)
        if any(part.startswith(".") for part in rel.parts):
            continue
        if _suffix(path.name)[0] is None:
            skipped += 1
            continue
        got, why = parse_name(path)
        if got is None:
            problems.add(str(path), f"the file name {why}",
                         "name map files like sub-01_ses-1_cond-rare_desc-source.nii.gz "
                         "(sub- required; ses- and cond- when there are sessions and "
                         "conditions), or move other files out of the folder")
        else:
            found.append(got)
    return found, skipped


def _rows(files, problems):
    """{(participant, session, condition): {hemisphere or None: path}} and the kind."""
    kinds = sorted({f.kind for f in files})
    if len(kinds) > 1:
        shown = {k: next(f.path.name for f in files if f.kind == k) for k in kinds}
        problems.add(str(files[0].path.parent), "the folder mixes map formats: "
                     + ", ".join(f"{k} (e.g. {n})" for k, n in shown.items()),
                     "keep one format per analysis (NIfTI volumes, GIfTI per hemisphere or "
                     "CIFTI-2)")
        return {}, None
    cells = {}
    for f in files:
        key = (f.participant, f.session, f.condition)
        slot = cells.setdefault(key, {})
        if f.hemisphere in slot:
            other = slot[f.hemisphere]
            problems.add(str(f.path), f"is a second map for {_cell_text(key, f.hemisphere)} "
                         f"(the first: {other})",
                         "give the two maps different ses- or cond- parts, or move one out "
                         "of the folder")
            continue
        slot[f.hemisphere] = f.path
    return cells, kinds[0] if kinds else None


def _cell_text(key, hemi=None):
    pid, ses, cond = key
    text = f"participant {pid}"
    if ses is not None:
        text += f" session {ses}"
    if cond is not None:
        text += f" condition {cond}"
    return text + (f" ({hemi} hemisphere)" if hemi else "")


def _tsv(rows, columns):
    lines = ["\t".join(columns)] + ["\t".join(str(r[c]) for c in columns) for r in rows]
    return "\n".join(lines) + "\n"


def _rel(path: Path, base: Path) -> str:
    import os
    return Path(os.path.relpath(path, base)).as_posix()


@dataclass
class Scaffold:
    """What ``groupsrc init`` wrote (or would write)."""

    folder: Path
    maps: int
    participants: list
    conditions: list
    sessions: list
    kind: str
    hemispheres: list
    skipped: int

    def lines(self) -> list:
        """What was written, and what to do next (printed by ``groupsrc init``)."""
        kind = {"nifti": "NIfTI volumes", "gifti": "GIfTI maps per hemisphere",
                "cifti": "CIFTI-2 dense time series"}[self.kind]
        n = len(self.participants)
        out = [f"wrote to {self.folder}:",
               f"  maps.tsv         : {self.maps} maps ({kind}) of {n} participants"
               + (f"; conditions {', '.join(self.conditions)}" if self.conditions else "")
               + (f"; sessions {', '.join(self.sessions)}" if self.sessions else ""),
               f"  participants.tsv : {n} participants, an empty 'group' column to fill in "
               "(add columns for other attributes, e.g. age)",
               "  analysis.toml    : a commented analysis file"
               + (f" (contrast {self.conditions[0]} minus {self.conditions[1]})"
                  if len(self.conditions) > 1 else " (the mean response against zero)")]
        if self.skipped:
            out.append(f"  skipped {self.skipped} file(s) that are not maps (.nii, .nii.gz, "
                       ".func.gii, .dtseries.nii)")
        todo = ['state the maps\' unit, e.g. unit = "nA m"']
        if self.kind in ("gifti", "cifti"):
            todo.append("give the template meshes (mesh_left / mesh_right)")
        todo.append("set the model and contrasts")
        out.append(f"next: edit analysis.toml ({'; '.join(todo)}), then run "
                   f"groupsrc check {self.folder / 'analysis.toml'}")
        return out


def build(maps_folder, out=None) -> Scaffold:
    """Write the three files (see the module docstring); InputError lists every problem."""
    problems = ProblemList()
    folder = Path(maps_folder).expanduser()
    if not folder.is_dir():
        problems.add(str(folder), "is not a folder", "give the folder that holds the map files")
        raise InputError(problems)
    folder = folder.resolve()
    out = (Path(out).expanduser() if out is not None else folder.parent).resolve()
    for name in OUTPUTS:
        if (out / name).exists():
            problems.add(str(out / name), "exists already; groupsrc init never overwrites a file",
                         "move it away, or give another folder with --out")
    files, skipped = scan(folder, problems)
    if not files and not problems:
        problems.add(str(folder), "holds no map file (.nii, .nii.gz, .func.gii, .dtseries.nii)",
                     "give the folder that holds the map files")
    cells, kind = _rows(files, problems) if files else ({}, None)
    hemis = sorted({h for slot in cells.values() for h in slot if h is not None})
    if kind == "gifti":
        for key, slot in cells.items():
            for h in hemis:
                if h not in slot:
                    present = next(iter(slot.values()))
                    problems.add(str(present), f"has no {h}-hemisphere partner for "
                                 f"{_cell_text(key)}",
                                 f"add its {h} hemisphere's file (hemi-{h[0].upper()})")
    if problems:
        raise InputError(problems)
    conditions = sorted({k[2] for k in cells if k[2] is not None})
    sessions = sorted({k[1] for k in cells if k[1] is not None})
    if conditions and any(k[2] is None for k in cells):
        problems.add(str(folder), "some map names carry cond- and others do not, e.g. "
                     + next(str(p) for k, s in cells.items() if k[2] is None
                            for p in s.values()),
                     "give every map a cond- part, or none")
    if sessions and any(k[1] is None for k in cells):
        problems.add(str(folder), "some map names carry ses- and others do not, e.g. "
                     + next(str(p) for k, s in cells.items() if k[1] is None
                            for p in s.values()),
                     "give every map a ses- part, or none")
    if problems:
        raise InputError(problems)
    participants = sorted({k[0] for k in cells})
    columns = (["participant_id"] + (["condition"] if conditions else [])
               + (["session"] if sessions else [])
               + ([f"path_{h}" for h in hemis] if kind == "gifti" else ["path"]))
    rows = []
    for key in sorted(cells, key=lambda k: (k[0], k[2] or "", k[1] or "")):
        pid, ses, cond = key
        row = {"participant_id": pid, "condition": cond, "session": ses}
        for h, p in cells[key].items():
            row["path" if h is None else f"path_{h}"] = _rel(p, out)
        rows.append(row)
    found = Scaffold(out, len(rows), participants, conditions, sessions, kind, hemis, skipped)
    texts = {"maps.tsv": _tsv(rows, columns),
             "participants.tsv": _tsv([{"participant_id": p, "group": "n/a"}
                                       for p in participants], ["participant_id", "group"]),
             "analysis.toml": analysis_text(found, files)}
    out.mkdir(parents=True, exist_ok=True)
    written = []
    try:
        for name, text in texts.items():
            if (out / name).exists():           # appeared meanwhile: still never overwritten
                raise FileExistsError(str(out / name))
            write_text(out / name, text)
            written.append(out / name)
    except BaseException:
        for p in written:
            p.unlink(missing_ok=True)
        raise
    return found


def _time_text(files) -> str:
    """What the first map's file says of its time axis, for the analysis file's comment."""
    from . import formats
    try:
        h = formats.read_header(files[0].path)
        t = getattr(h, "time_axis", None)
    except (OSError, ValueError):
        return "could not be read"
    if t is None:
        return "none (GIfTI files without time_start_s / sampling_interval_s metadata)"
    return (f"{t.n} samples from {t.t0 * 1e3:.4g} ms every {t.dt * 1e3:.4g} ms "
            f"(check that these are right)")


def analysis_text(s: Scaffold, files) -> str:
    """The commented analysis file for what was found."""
    lines = ["# Written by groupsrc init from the map file names; edit it, then run",
             "#   groupsrc check analysis.toml",
             "# Every key is described in the README (Analysis file reference).",
             'title = "Untitled analysis"', "",
             "[cohort]",
             'participants = "participants.tsv"   # fill in each participant\'s group (and '
             "other attributes)",
             'maps = "maps.tsv"',
             '# unit = "nA m"                      # the unit of the map values: state it']
    time_text = _time_text(files)
    if s.kind == "gifti":
        for h in s.hemispheres:
            lines.append(f'# mesh_{h} = "template/{h}.surf.gii"   # REQUIRED: the template '
                         f"mesh of the {h} hemisphere (GIfTI, mm)")
    elif s.kind == "cifti":
        for h in ("left", "right"):
            lines.append(f'# mesh_{h} = "template/{h}.surf.gii"   # REQUIRED: the template '
                         f"mesh of the {h} hemisphere (GIfTI, mm)")
    else:
        lines.append('# mask = "mask.nii.gz"               # optional: the sources; default: '
                     "finite in every map")
    lines.append(f"# the first map's time axis: {time_text}")
    lines.append("# time_start = -0.1                  # seconds; overrides the files' time "
                 "axis (required when they carry none)")
    lines.append("# sampling_interval = 0.004          # seconds")
    lines += ["", "[model]", 'between = "1"                        # e.g. "group" once '
              "participants.tsv holds the groups"]
    if len(s.conditions) > 1:
        lines.append('within = "condition"')
    lines.append("")
    lines.append("[[contrasts]]")
    if len(s.conditions) > 1:
        a, b = s.conditions[:2]
        lines += [f'name = "{_name(a)}_minus_{_name(b)}"',
                  f"within = {{ {_key(a)} = 1, {_key(b)} = -1 }}   # conditions found: "
                  + ", ".join(s.conditions)]
    else:
        lines += ['name = "mean_response"',
                  'description = "the response against zero, over all participants"',
                  "weights = { Intercept = 1 }"]
    lines += ["", "[inference]",
              'correction = "cluster-mass"         # cluster-mass | cluster-extent | tfce | '
              "max-stat | fdr | none",
              "resamples = 5000",
              "forming_p = 0.001",
              "alpha = 0.05",
              "# time_window = [0.0, 0.6]          # seconds; default: all samples", ""]
    return "\n".join(lines)


def _name(label: str) -> str:
    return re.sub(r"[^A-Za-z0-9_-]", "_", label)


def _key(label: str) -> str:
    """A TOML key for a condition label (quoted unless bare)."""
    return label if re.fullmatch(r"[A-Za-z0-9_-]+", label) else f'"{label}"'
