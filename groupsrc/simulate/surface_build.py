"""The surface demo cohort as files: meshes, masks, atlas, GIfTI maps, truth labels.

:func:`build_surface_demo_cohort` runs the surface simulation
(:mod:`.surface_model`, :mod:`.surface_truth`) and writes, into a new or
empty folder or one an earlier demo build made (the rules of :mod:`.build`):

* ``template/left.surf.gii``, ``template/right.surf.gii`` -- the folded
  hemispheres (coordinates in mm, triangles);
* ``template/<hemi>.mask.shape.gii`` -- 1 at sources, 0 on the medial face;
* ``template/<hemi>.atlas.label.gii`` -- an invented atlas of lobes (label
  table inside);
* ``maps/<participant>_ses-<n>_cond-<tone>.<hemi>.func.gii`` -- float32, one
  data array per sample, signed moment along the outward normal in nA m;
* ``participants.tsv``, ``maps.tsv`` (columns ``path_left``, ``path_right``);
* ``truth/<region>.<hemi>.label.gii`` -- 1 inside the region (label table
  names it), and ``truth/truth.json``;
* ``analysis.toml`` (GIfTI carries no time axis: ``time_start`` and
  ``sampling_interval`` are set) and ``scenario.toml``.

Every file is written through :mod:`groupsrc.atomic`; GIfTI images are made
only through :mod:`groupsrc.formats.gifti`.  Two builds with one seed are
byte-identical.
"""

from __future__ import annotations

import json
import shutil
import tempfile
from pathlib import Path

import numpy as np

from ..formats import gifti
from .build import MARKER, _check_target, _install, _write, contrasts_text, participants_tsv
from .cortex import ATLAS
from .settings import EFFECTS, size_settings
from .surface_model import packaged_text, simulate_surface, surface_settings
from .surface_truth import noise_free_effects, truth_masks

#: top-level entries a surface build writes (the only ones a rebuild replaces)
OWN_ENTRIES = ("participants.tsv", "maps.tsv", "template", "maps", "truth", "analysis.toml",
               "scenario.toml", MARKER)
TRUTH_NAMES = tuple(EFFECTS) + ("no_effect",)


def _gifti(img) -> bytes:
    return gifti.to_bytes(img)


def _per_hemi(space, values):
    """Split a (n_vertices_total, ...) array into {hemisphere: (V, ...)}."""
    out, a = {}, 0
    for h in space.hemispheres:
        out[h.name] = values[a:a + h.n_vertices]
        a += h.n_vertices
    return out


def build_surface_demo_cohort(out_dir, size: str = "default", seed: int | None = None) -> Path:
    """Simulate the surface demo cohort into ``out_dir``; return its analysis.toml path."""
    cfg = surface_settings()
    size_settings(cfg, size)
    seed = int(cfg["seed"] if seed is None else seed)
    out = Path(out_dir).absolute()
    _check_target(out)
    sim = simulate_surface(size, seed, cfg)
    model = sim.model
    effects = noise_free_effects(model)
    masks, info = truth_masks(model, sim.participants, effects)
    out.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(dir=out.parent, prefix=f".{out.name}.building-"))
    try:
        _write_template(staging, model)
        for row, values in sim.maps_iter():
            for name, v in _per_hemi(model.space, values).items():
                img = gifti.map_image(v, name, "NIFTI_INTENT_TIME_SERIES",
                                      name="minimum-norm moment along the normal, nA m")
                _write(staging / getattr(row, f"path_{name}"), _gifti(img))
        _write(staging / "participants.tsv", participants_tsv(sim.participants))
        _write(staging / "maps.tsv", sim.maps.to_csv(sep="\t", index=False, lineterminator="\n"))
        for name, mask in masks.items():
            for hemi, m in _per_hemi(model.space, mask.astype(np.int32)).items():
                img = gifti.label_image(m, hemi, {0: "none", 1: name}, name=f"truth: {name}")
                _write(staging / "truth" / f"{name}.{hemi}.label.gii", _gifti(img))
        _write(staging / "truth" / "truth.json",
               json.dumps(truth_record(cfg, sim, info), indent=2) + "\n")
        _write(staging / "analysis.toml", analysis_text(cfg, size))
        _write(staging / "scenario.toml",
               f"# settings of this build: size = {size!r}, seed = {seed}\n" + packaged_text())
        _write(staging / MARKER, json.dumps({"size": size, "seed": seed, "kind": "surface"})
               + "\n")
        _check_target(out)
        _install(staging, out, OWN_ENTRIES)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return out / "analysis.toml"


def _write_template(folder: Path, model) -> None:
    atlas = _per_hemi(model.space, model.cortex.atlas)
    source = _per_hemi(model.space, model.source.astype(np.uint8))
    for h in model.space.hemispheres:
        _write(folder / "template" / f"{h.name}.surf.gii",
               _gifti(gifti.mesh_image(h.vertices, h.triangles, h.name)))
        _write(folder / "template" / f"{h.name}.mask.shape.gii",
               _gifti(gifti.map_image(source[h.name], h.name, "NIFTI_INTENT_NONE",
                                      name="source mask (0: medial face)", dtype=np.uint8)))
        _write(folder / "template" / f"{h.name}.atlas.label.gii",
               _gifti(gifti.label_image(atlas[h.name], h.name, ATLAS,
                                        name="demo atlas (invented lobes)")))


def truth_record(cfg, sim, info) -> dict:
    rule, model, t = cfg["truth"], sim.model, sim.model.time
    return {"study": cfg["study"], "size": sim.size, "seed": sim.seed,
            "rule": ("effect region: sources whose noise-free |effect| over time reaches "
                     f"{rule['effect_fraction']:g} of its maximum; no-effect region: every "
                     f"effect below {rule['quiet_fraction']:g} of its maximum, its expected t "
                     f"below {rule['quiet_expected_t']:g} at every time, and at least "
                     f"{rule['quiet_distance_mm']:g} mm from every effect generator's centre"),
            "physics": ("sources are oriented along the outward cortex normal; in a spherical "
                        "conductor a radial source gives no external magnetic field (Sarvas "
                        "1987), so gyral crowns on the outer face are nearly silent in MEG and "
                        "every generator sits on a sulcal wall (radiality below)"),
            "mesh": {h.name: {"vertices": h.n_vertices, "sources": int(h.sources.size)}
                     for h in model.space.hemispheres},
            "time": {"t0_s": t.t0, "dt_s": t.dt, "n": t.n},
            "effects": {k: info[k] for k in EFFECTS}, "no_effect": info["no_effect"]}


def surface_demo_truth(cohort_dir) -> dict:
    """{"masks": {name: {hemisphere: bool (V,)}}, "info": truth.json} of a built cohort."""
    root = Path(cohort_dir)
    if root.suffix == ".toml":
        root = root.parent
    info = json.loads((root / "truth" / "truth.json").read_text(encoding="utf-8"))
    masks = {name: {h: gifti.read_label_file(root / "truth" / f"{name}.{h}.label.gii")[0] > 0
                    for h in ("left", "right")} for name in TRUTH_NAMES}
    return {"masks": masks, "info": info}


def analysis_text(cfg: dict, size: str) -> str:
    """The surface cohort's analysis file (every key is described in the README)."""
    sz = size_settings(cfg, size)
    head = cfg["head"]
    return f'''# Analysis of the groupsrc surface demo cohort ({size} size): {cfg["study"]}.
# Every key is described in the groupsrc README.
title = "Velmora Listening Lab: rare versus frequent tones on the cortical surface (demo)"

[cohort]
participants = "participants.tsv"
maps = "maps.tsv"                         # path_left / path_right: one GIfTI file per hemisphere
mesh_left = "template/left.surf.gii"
mesh_right = "template/right.surf.gii"
mask_left = "template/left.mask.shape.gii"       # the medial face is not a source
mask_right = "template/right.mask.shape.gii"
unit = "nA m"                                     # moment along the outward normal
atlas_left = "template/left.atlas.label.gii"
atlas_right = "template/right.atlas.label.gii"
time_start = {float(head["t_start"])}                        # GIfTI maps carry no time axis
sampling_interval = {1.0 / float(sz["sfreq"])}

[model]
between = "group + age"
within = "condition"

{contrasts_text()}
[inference]
correction = "cluster-mass"
resamples = {int(sz["resamples"])}
seed = 20261201
forming_p = {float(sz["forming_p"])}
alpha = 0.05
tails = "two"
time_window = [0.0, 0.6]
neighbors = "edge"                        # vertices joined by a triangle edge
'''
