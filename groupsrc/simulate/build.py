"""The demo cohort as files: maps, tables, mask, truth, analysis file.

:func:`build_demo_cohort` runs the simulation (:mod:`.model`) and the truth
computation (:mod:`.truth`) and writes their arrays; :func:`demo_truth`
reads a built cohort's truth back.  Data flow one way: this module uses the
model, never the reverse.  NIfTI images are made and read only through
:mod:`groupsrc.formats.nifti`, and every file is written through
:mod:`groupsrc.atomic` (temporary name + rename).

Conventions of a build:

* maps are 4D NIfTI-1 (x, y, z, time), float32 moment amplitude in nA m,
  sform = qform = the template affine (mm), time in s; masks are uint8; the
  anatomical underlay is a synthetic head on a grid of its own (:mod:`.underlay`);
* tables are tab-separated with LF line ends;
* NIfTI files are gzip-compressed without a timestamp and every random
  quantity comes from the seed, so two builds with one seed are
  byte-identical;
* a build writes only into a new or empty folder or one an earlier build
  made (it holds :data:`MARKER`), and a rebuild replaces only the entries
  of :data:`OWN_ENTRIES`.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from ..atomic import write_bytes
from ..formats import nifti
from .model import simulate
from .settings import EFFECTS, packaged_text, scenario_settings, size_settings
from .truth import noise_free_effects, truth_masks
from .underlay import head_image

MARKER = ".groupsrc-demo-cohort"
#: top-level entries a build writes (the only ones a rebuild replaces)
OWN_ENTRIES = ("participants.tsv", "maps.tsv", "mask.nii.gz", "underlay.nii.gz", "maps", "truth",
               "analysis.toml", "scenario.toml", MARKER)


def participants_tsv(df: pd.DataFrame) -> str:
    """The participants table as written (tab-separated, LF line ends)."""
    return df.to_csv(sep="\t", index=False, lineterminator="\n")



def _nifti_gz(data, affine, dt=None, t0=None, descrip="") -> bytes:
    """A gzip-compressed NIfTI-1 image as bytes (no timestamp: reproducible)."""
    return nifti.gz_bytes(nifti.grid_image(data, affine, dt, t0, descrip))


def _write(path: Path, payload) -> None:
    """Write bytes or text atomically (see :mod:`groupsrc.atomic`)."""
    write_bytes(path, payload.encode("utf-8") if isinstance(payload, str) else payload)


def check_cohort_target(out: Path, problems, option: str = "the cohort folder") -> None:
    """Add a problem when ``out`` may not receive a demo build.

    ``out`` must be new, empty or a previous demo build (it holds the build
    marker); a folder of anything else is never written into.
    """
    out = Path(out)
    if out.exists() and not out.is_dir():
        problems.add(out, "exists and is not a folder", f"choose another {option}")
    elif out.is_dir() and any(out.iterdir()) and not (out / MARKER).exists():
        problems.add(out, "the folder is not empty and was not built by 'groupsrc demo'; "
                     "nothing was written", f"choose a new or empty {option}")


def _check_target(out: Path) -> None:
    from ..inputs.problems import InputError, ProblemList
    problems = ProblemList()
    check_cohort_target(out, problems)
    if problems:
        raise InputError(problems)


def _install(staging: Path, out: Path, entries=OWN_ENTRIES) -> None:
    """Move the built entries into ``out``, replacing only a previous build's entries."""
    out.mkdir(parents=True, exist_ok=True)
    for name in entries:
        src, dst = staging / name, out / name
        if not src.exists():
            continue
        if dst.is_dir() and not dst.is_symlink():
            old = out / f".{name}.old-{os.getpid()}"
            os.replace(dst, old)
            os.replace(src, dst)
            shutil.rmtree(old)
        else:
            os.replace(src, dst)


def build_demo_cohort(out_dir, size: str = "default", seed: int | None = None) -> Path:
    """Simulate the demo cohort into ``out_dir``; return the path of its analysis.toml.

    Writes participants.tsv, maps.tsv, mask.nii.gz, maps/*.nii.gz (float32 4D,
    x, y, z, time; moment amplitude in nA m), truth/*.nii.gz (uint8 masks, and
    the noise-free effect maps), truth/truth.json, analysis.toml and the
    scenario settings used (scenario.toml).  ``out_dir`` must be new, empty or
    a previous demo build; a rebuild replaces only the entries a build writes
    (a results folder made inside it is kept).  Files are assembled in a
    temporary folder beside ``out_dir`` and renamed into place.
    """
    cfg = scenario_settings()
    size_settings(cfg, size)                      # an unknown size fails before any work
    seed = int(cfg["seed"] if seed is None else seed)
    out = Path(out_dir).absolute()
    _check_target(out)
    sim = simulate(size, seed, cfg)
    effects = noise_free_effects(sim.model)
    masks, info = truth_masks(sim.model, sim.participants, effects)

    out.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(dir=out.parent, prefix=f".{out.name}.building-"))
    try:
        _write_cohort(staging, sim)
        _write_truth(staging, sim, effects, masks)
        _write(staging / "truth" / "truth.json",
               json.dumps(truth_record(cfg, sim, info), indent=2) + "\n")
        _write(staging / "analysis.toml", analysis_text(cfg, size))
        _write(staging / "scenario.toml",
               f"# settings of this build: size = {size!r}, seed = {seed}\n" + packaged_text())
        _write(staging / MARKER, json.dumps({"size": size, "seed": seed}) + "\n")
        _check_target(out)                 # nothing appeared there meanwhile
        _install(staging, out)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return out / "analysis.toml"


def _write_cohort(folder: Path, sim) -> None:
    """The maps, both tables and the source mask of a simulation."""
    grid, t = sim.model.grid, sim.model.time
    for row, m in zip(sim.maps.itertuples(index=False), sim.data):
        _write(folder / row.path, _nifti_gz(grid.to_volume(m), grid.affine, t.dt, t.t0,
                                            "groupsrc demo: minimum-norm amplitude, nA m"))
    _write(folder / "participants.tsv", participants_tsv(sim.participants))
    _write(folder / "maps.tsv", sim.maps.to_csv(sep="\t", index=False, lineterminator="\n"))
    _write(folder / "mask.nii.gz", _nifti_gz(grid.mask.astype(np.uint8), grid.affine,
                                             descrip="groupsrc demo: source mask"))
    head, affine = head_image(float(sim.model.cfg["head"]["brain_radius_mm"]))
    _write(folder / "underlay.nii.gz", _nifti_gz(head, affine,
                                                 descrip="groupsrc demo: synthetic head"))


def _write_truth(folder: Path, sim, effects: dict, masks: dict) -> None:
    """truth/<mask>.nii.gz (uint8) and truth/noise_free_<effect>.nii.gz (float32 4D)."""
    grid, t = sim.model.grid, sim.model.time
    for name, mask in masks.items():
        _write(folder / "truth" / f"{name}.nii.gz",
               _nifti_gz(grid.to_volume(mask.astype(np.uint8)), grid.affine,
                         descrip=f"groupsrc demo truth: {name}"))
    for name in EFFECTS:
        _write(folder / "truth" / f"noise_free_{name}.nii.gz",
               _nifti_gz(grid.to_volume(effects[name].astype(np.float32)), grid.affine, t.dt,
                         t.t0, f"groupsrc demo: noise-free {name}"))


def truth_record(cfg: dict, sim, info: dict) -> dict:
    """The content of truth/truth.json: study, seed, the rules, grid, time, regions."""
    rule, grid, t = cfg["truth"], sim.model.grid, sim.model.time
    return {"study": cfg["study"], "size": sim.size, "seed": sim.seed,
            "rule": ("effect region: sources whose noise-free |effect| over time "
                     f"reaches {rule['effect_fraction']:g} of its maximum; "
                     "no-effect region: every effect below "
                     f"{rule['quiet_fraction']:g} of its maximum, its expected "
                     f"t below {rule['quiet_expected_t']:g} at every time, and "
                     f"at least {rule['quiet_distance_mm']:g} mm from every "
                     "effect generator"),
            "grid": {"spacing_mm": float(size_settings(cfg, sim.size)["spacing_mm"]),
                     "n_sources": grid.n_sources},
            "time": {"t0_s": t.t0, "dt_s": t.dt, "n": t.n},
            "effects": {k: info[k] for k in EFFECTS},
            "no_effect": info["no_effect"]}


def demo_truth(cohort_dir) -> dict:
    """Read a built cohort's truth: ``{"masks": {name: bool (x, y, z)}, "info": dict}``."""
    root = Path(cohort_dir)
    if root.suffix == ".toml":
        root = root.parent
    info = json.loads((root / "truth" / "truth.json").read_text(encoding="utf-8"))
    masks = {}
    for name in list(EFFECTS) + ["no_effect"]:
        masks[name] = nifti.read_volume(root / "truth" / f"{name}.nii.gz") > 0
    return {"masks": masks, "info": info}


#: the mixed-model part of the demo's analysis file (sizes with ``mixed = true``)
MIXED_MODEL = '''mixed = true               # a linear mixed model on every map (the patient who missed
                           # the frequent tone and the third sessions included); the
                           # contrasts marked model = "glm" use the summary-statistic GLM
'''
#: the demo's three questions: name, description, the lines that define the contrast
CONTRASTS = (
    ("rare_minus_frequent", "rare minus frequent tones, the two groups weighted equally",
     'within = { rare = 1, frequent = -1 }\n'),
    ("group_by_tone", "rare-minus-frequent difference, patients minus controls",
     'within = { rare = 1, frequent = -1 }\ncompare = { group = ["patient", "control"] }\n'),
    ("age_slope", "change per year of age of the response averaged over tones",
     'slope = "age"\n'),
)


def contrasts_text(tail: str = "", name_suffix: str = "", description_suffix: str = "") -> str:
    """The ``[[contrasts]]`` tables of the demo's analysis file, each followed by ``tail``."""
    return "\n".join(f'[[contrasts]]\nname = "{name}{name_suffix}"\n'
                     f'description = "{text}{description_suffix}"\n{lines}{tail}'
                     for name, text, lines in CONTRASTS)


MIXED_CONTRASTS = ("\n# the same three questions, answered by the mixed model from every map\n"
                   + contrasts_text(name_suffix="_mixed", description_suffix=" (mixed model)"))


def analysis_text(cfg: dict, size: str) -> str:
    """The analysis file of a build (TOML; every key is described in the README).

    Sizes with ``mixed = true`` run the mixed model next to the GLM: the three
    GLM contrasts (``model = "glm"``; they leave out the participant lacking a
    condition) and the same three by the mixed model (``*_mixed``)."""
    sz = size_settings(cfg, size)
    mixed = bool(sz.get("mixed", False))
    glm = 'model = "glm"\n' if mixed else ""
    return f'''# Analysis of the groupsrc demo cohort ({size} size): {cfg["study"]}.
# Every key is described in the groupsrc README.
title = "Velmora Listening Lab: rare versus frequent tones in patients and controls (demo)"

[cohort]
participants = "participants.tsv"
maps = "maps.tsv"
mask = "mask.nii.gz"
underlay = "underlay.nii.gz"      # a synthetic head of the demo's own, on its own grid
unit = "nA m"                     # minimum-norm moment amplitude

[model]
between = "group + age"
within = "condition"
{MIXED_MODEL if mixed else ""}
{contrasts_text(glm)}{MIXED_CONTRASTS if mixed else ""}
[inference]
correction = "cluster-mass"
resamples = {int(sz["resamples"])}
seed = 20261201
forming_p = {float(sz["forming_p"])}
alpha = 0.05
tails = "two"
time_window = [0.0, 0.6]
neighbors = "face"
'''
