"""Analysis file (TOML) -> validated :class:`Settings`.

Every key, its type and its default is declared once in ``SCHEMA`` below;
the README's analysis-file reference documents the same keys.  Unknown or
mistyped keys are problems (with the closest known key suggested), never
silently ignored.
"""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass, field
from pathlib import Path

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

from ..sources import SurfaceMesh, VolumeGrid
from ..stats.corrections.scorers import CORRECTIONS as _CORRECTIONS
from ..stats.inference import SEED_LIMIT, TAILS
from .problems import InputError, Problem, ProblemList, closest
from .textfile import TextFileError, read_text


#: the choices come from the parts that implement them (one definition each)
CORRECTIONS = tuple(_CORRECTIONS)
#: neighbour kinds of every source space (each space accepts only its own; checked
#: against the analysis's space by :func:`check_neighbors`)
NEIGHBORS = tuple(dict.fromkeys(VolumeGrid.neighbor_kinds + SurfaceMesh.neighbor_kinds))
#: [cohort] keys of a surface analysis, per hemisphere (see README, "Surfaces")
SURFACE_KEYS = ("mesh_left", "mesh_right", "mask_left", "mask_right", "atlas_left",
                "atlas_right")
#: Most rearrangements accepted: the engine holds the whole set in memory (one row of
#: n indices per rearrangement), and p-values are resolved to 1 / resamples.
MAX_RESAMPLES = 1_000_000
NUMBER = (int, float)


def _finite(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _window_ok(v) -> bool:
    return len(v) == 2 and all(_finite(x) for x in v) and v[0] < v[1]


def _positive(v) -> bool:
    return _finite(v) and v > 0


def _probability(v) -> bool:
    return _finite(v) and 0 < v < 1


def _names(v) -> bool:
    """A list of distinct, non-empty column names."""
    return (all(isinstance(x, str) and x.strip() for x in v)
            and len({x.strip() for x in v}) == len(v))


#: how the mixed model's variance components are estimated
ESTIMATIONS = ("reml", "ml")
#: random_slopes = "auto": a slope of the within column where the maps identify it
AUTO = "auto"


def _slopes(v) -> bool:
    return v == AUTO if isinstance(v, str) else _names(v)
#: the model a contrast is tested with
MODELS = ("glm", "mixed")


def _nifti_name(v) -> bool:
    return v.strip().lower().endswith((".nii", ".nii.gz"))


def _unit_text(v) -> bool:
    return 0 < len(v.strip()) <= 24 and v.isprintable()


def _gifti_name(v) -> bool:
    return v.strip().lower().endswith(".gii")


@dataclass(frozen=True)
class Key:
    """One analysis-file key: its type(s), default, meaning, and the rule its value obeys.

    ``check`` is applied after the type check; ``rule`` says what is required
    and ``fix`` how to mend it.  ``choices`` is a shorthand for a check
    against a list.  Every value the engine would refuse is refused here
    first, so that ``check`` accepts nothing that ``run`` rejects; a bad
    value is reported and replaced by its default so that checking goes on.
    """

    types: type | tuple
    default: object
    doc: str
    check: object = None
    rule: str = ""
    fix: str = ""
    choices: tuple | None = None

    def problem(self, value):
        """(what, fix) when ``value`` breaks the rule, else None."""
        if self.choices is not None and value not in self.choices:
            hint = closest(str(value), self.choices)
            return (f"'{value}' is not one of {', '.join(self.choices)}",
                    hint or f"choose one of {', '.join(self.choices)}")
        if self.check is not None and not self.check(value):
            return f"{self.rule}, got {value!r}", self.fix
        return None


#: Every key of the analysis file, by section ("" = top level; "inference.tfce" is the
#: [inference.tfce] table).  The README's analysis-file reference documents the same keys.
SCHEMA = {
    "": {
        "title": Key(str, "Untitled analysis", "title shown in the report"),
    },
    "cohort": {
        "participants": Key(str, None, "participants table (TSV), required"),
        "maps": Key(str, None, "maps table (TSV), required"),
        "mask": Key(str, None, "source mask NIfTI; default: sources finite in every map"),
        "time_start": Key(NUMBER, None, "first sample time (s), overrides the NIfTI header",
                          _finite, "must be a finite number of seconds", "e.g. time_start = -0.1"),
        "sampling_interval": Key(NUMBER, None, "sampling interval (s), overrides the header",
                                 _positive, "must be a positive number of seconds",
                                 "e.g. sampling_interval = 0.004 for 250 Hz"),
        "cache": Key(str, None, "folder for the loading cache; default ~/.cache/groupsrc"),
        "atlas": Key(str, None, "labelled atlas NIfTI on the template grid (integer labels)"),
        "atlas_labels": Key(str, None, "TSV with columns index and name for the atlas labels"),
        "mesh_left": Key(str, None, "template mesh of the left hemisphere (GIfTI surface, mm); "
                         "a mesh makes the analysis a surface analysis", _gifti_name,
                         "must name a GIfTI surface file (.gii)",
                         'e.g. mesh_left = "template/left.surf.gii"'),
        "mesh_right": Key(str, None, "template mesh of the right hemisphere (GIfTI surface, mm)",
                          _gifti_name, "must name a GIfTI surface file (.gii)",
                          'e.g. mesh_right = "template/right.surf.gii"'),
        "mesh_closed": Key(bool, True, "the template meshes are closed surfaces (every edge in "
                           "two triangles); false for meshes with a cut"),
        "mask_left": Key(str, None, "per-vertex source mask of the left hemisphere (GIfTI, "
                         "nonzero = source)", _gifti_name, "must name a GIfTI file (.gii)",
                         'e.g. mask_left = "template/left.mask.shape.gii"'),
        "mask_right": Key(str, None, "per-vertex source mask of the right hemisphere (GIfTI)",
                          _gifti_name, "must name a GIfTI file (.gii)",
                          'e.g. mask_right = "template/right.mask.shape.gii"'),
        "atlas_left": Key(str, None, "GIfTI label file of the left hemisphere as atlas",
                          _gifti_name, "must name a GIfTI label file (.gii)",
                          'e.g. atlas_left = "template/left.label.gii"'),
        "atlas_right": Key(str, None, "GIfTI label file of the right hemisphere as atlas",
                           _gifti_name, "must name a GIfTI label file (.gii)",
                           'e.g. atlas_right = "template/right.label.gii"'),
        "underlay": Key(str, None, "anatomical NIfTI drawn under the volume figures (any grid "
                        "with an affine; resampled)", _nifti_name,
                        "must name a NIfTI file (.nii or .nii.gz)",
                        'e.g. underlay = "template/t1.nii.gz"'),
        "unit": Key(str, None, "unit of the map values, e.g. \"nA m\"; shown in axis labels, "
                    "table headers and the methods text", _unit_text,
                    "must be a short unit name (1 to 24 printable characters, no tab or "
                    "line break)", 'e.g. unit = "nA m"'),
    },
    "model": {
        "between": Key(str, "1", "Wilkinson right-hand side over participants columns"),
        "within": Key(str, None, "maps-table column holding the condition, optional"),
        "mixed": Key(bool, False, "mass-univariate mixed model on all maps (REML)"),
        "map_covariates": Key(list, [], "mixed model: numeric maps-table columns as map-level "
                              "fixed effects", _names, "must be a list of distinct column names",
                              'e.g. map_covariates = ["trials"]'),
        "random_slopes": Key((list, str), AUTO, "mixed model: within terms (the within column "
                             "or map covariates) whose effect varies by participant; \"auto\" "
                             "(default): the within column when the maps identify its "
                             "variance (repeated maps of a condition), else none",
                             _slopes, "must be \"auto\" or a list of distinct names",
                             'e.g. random_slopes = ["condition"], or [] for none'),
        "estimation": Key(str, "reml", "mixed model: " + " | ".join(ESTIMATIONS),
                          choices=ESTIMATIONS),
    },
    "contrasts": {
        "name": Key(str, None, "contrast name (letters, digits, _ and -)"),
        "description": Key(str, "", "free text for the report"),
        "within": Key(dict, None, "weights over conditions, e.g. {rare = 1, frequent = -1}"),
        "compare": Key(dict, None, "{factor = [level_a, level_b, ...]}"),
        "slope": Key(str, None, "numeric participants column"),
        "weights": Key(dict, None, "raw weights over design-matrix coefficient names"),
        "model": Key(str, None, "glm | mixed: the model testing this contrast; default: "
                     "mixed when [model] mixed = true", choices=MODELS),
    },
    "inference": {
        "correction": Key(str, "cluster-mass", " | ".join(CORRECTIONS), choices=CORRECTIONS),
        "resamples": Key(int, 5000, "number of rearrangements, identity included",
                         lambda v: 1 <= v <= MAX_RESAMPLES, f"must be from 1 to {MAX_RESAMPLES:,}",
                         "use e.g. 5000 (fewer gives coarse p-values)"),
        "seed": Key(int, 20261201, "random seed for the rearrangements",
                    lambda v: 0 <= v < SEED_LIMIT, "must be a whole number from 0 to 2^63 - 1",
                    "use a non-negative integer such as 20261201"),
        "forming_p": Key(NUMBER, 0.001, "cluster-forming threshold as a p-value",
                         _probability, "must be between 0 and 1", "give a p-value such as 0.001"),
        "alpha": Key(NUMBER, 0.05, "family-wise (or FDR) level",
                     _probability, "must be between 0 and 1", "give a level such as 0.05"),
        "tails": Key(str, "two", " | ".join(TAILS), choices=TAILS),
        "time_window": Key(list, None, "[start, stop] in seconds; default: all samples",
                           _window_ok, "expected [start, stop], two numbers of seconds with "
                           "start < stop", "e.g. time_window = [0.0, 0.6]"),
        "neighbors": Key(str, None, " | ".join(NEIGHBORS) + "; default: the source space's "
                         "first kind (face on a volume, edge on a surface)", choices=NEIGHBORS),
        "blocks": Key(str, None, "participants column defining exchangeability blocks"),
        "variance_groups": Key(str, "auto", "auto | none | a participants column: groups whose "
                               "residual variance may differ (auto: the between factor, when "
                               "its groups differ in size)", lambda v: bool(v.strip()),
                               "must name a column, or be auto or none",
                               "write variance_groups = \"auto\" (or \"none\", or a column)"),
        "tfce": Key(dict, None, "the [inference.tfce] table"),
    },
    "inference.tfce": {
        "extent_power": Key(NUMBER, 0.5, "TFCE extent exponent (E in Smith & Nichols 2009)",
                            _positive, "the TFCE extent exponent must be a positive number",
                            "use the usual 0.5 (Smith & Nichols 2009)"),
        "height_power": Key(NUMBER, 2.0, "TFCE height exponent (H in Smith & Nichols 2009)",
                            _positive, "the TFCE height exponent must be a positive number",
                            "use the usual 2 (Smith & Nichols 2009)"),
        "steps": Key(int, None, "TFCE height steps per map for the stepped sum; "
                     "default: the exact integral at the data values",
                     lambda v: v >= 10, "must be at least 10",
                     "use 100, or leave it out for the exact integral"),
    },
}


@dataclass
class ContrastSpec:
    name: str
    description: str = ""
    within: dict | None = None
    compare: dict | None = None
    slope: str | None = None
    weights: dict | None = None
    model: str | None = None


@dataclass
class Settings:
    path: Path
    title: str
    cohort: dict
    model: dict
    contrasts: list
    inference: dict
    raw: dict = field(default_factory=dict, repr=False)

    @property
    def base(self) -> Path:
        """Folder that relative paths in the analysis file are relative to."""
        return self.path.parent

    def resolve(self, rel: str | None) -> Path | None:
        if rel is None:
            return None
        p = Path(rel).expanduser()
        return p if p.is_absolute() else (self.base / p)

    def as_dict(self) -> dict:
        """Every setting after defaults, for the run record."""
        return {
            "title": self.title,
            "cohort": dict(self.cohort),
            "model": dict(self.model),
            "contrasts": [{k: v for k, v in c.__dict__.items() if v not in (None, "")}
                          for c in self.contrasts],
            "inference": dict(self.inference),
        }


def _type_name(t):
    if t == NUMBER:
        return "number"
    if isinstance(t, tuple):
        return " or ".join(_type_name(x) for x in t)
    return {str: "text", int: "integer", bool: "true/false", dict: "table",
            list: "list"}.get(t, t.__name__)


def _check_type(value, typ):
    if typ is bool:
        return isinstance(value, bool)
    if isinstance(value, bool):
        return False
    return isinstance(value, typ)


def _where(where, name, key):
    if name == "":
        return f"{where}: {key}"
    return f"{where} [{name}] {key}"


def _section(raw, name, where, problems):
    """One table of the analysis file against its schema: unknown keys, types and
    value rules are problems; every key comes back, bad or missing ones as defaults."""
    schema = SCHEMA[name]
    out = {}
    for key, value in raw.items():
        if key not in schema:
            hint = closest(key, schema)
            problems.add(f"{where}: key '{key}'" if name == "" else f"{where} [{name}]: key '{key}'",
                         "unknown key", hint or f"known keys: {', '.join(schema)}")
            continue
        spec = schema[key]
        if not _check_type(value, spec.types):
            problems.add(_where(where, name, key), f"expected {_type_name(spec.types)}, got {value!r}",
                         f"write {key} as a {_type_name(spec.types)}")
            continue
        bad = spec.problem(value)
        if bad is not None:
            problems.add(_where(where, name, key), *bad)
            continue                       # go on with the default
        out[key] = value
    for key, spec in schema.items():
        out.setdefault(key, spec.default)
    return out


def parse_settings(path) -> Settings:
    """Read and validate an analysis file; raise InputError listing every problem."""
    settings, problems = read_settings(path)
    if problems:
        raise InputError(problems)
    return settings


def read_settings(path):
    """Read an analysis file leniently: (settings, problems).

    Unknown keys and bad values are listed in ``problems`` and replaced by
    their defaults, so that ``groupsrc check`` can go on to check the cohort
    and report everything at once.  Raises InputError only when the file
    cannot be read or parsed at all.
    """
    path = Path(path)
    problems = ProblemList()
    where = str(path)
    try:
        text = read_text(path)
    except FileNotFoundError:
        raise InputError([Problem(where, "analysis file not found", "check the path")])
    except TextFileError as exc:
        raise InputError([Problem(where, exc.what, exc.fix)])
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError([Problem(where, f"not valid TOML: {exc}",
                             "fix the syntax at the line and column given")])
    settings = settings_from_dict(raw, path, problems)
    return settings, problems


def settings_from_dict(raw: dict, path: Path, problems: ProblemList) -> Settings:
    where = str(path)
    top_known = {"title", "cohort", "model", "contrasts", "inference"}
    top = {}
    for key, value in raw.items():
        if key not in top_known:
            hint = closest(key, top_known)
            problems.add(f"{where}: key '{key}'", "unknown key or section",
                         hint or f"known: {', '.join(sorted(top_known))}")
        elif key == "title":
            if isinstance(value, str):
                top["title"] = value
            else:
                problems.add(f"{where}: title", f"expected text, got {value!r}", "quote it")
    for sec in ("cohort", "model", "inference"):
        if sec in raw and not isinstance(raw[sec], dict):
            problems.add(f"{where} [{sec}]", "must be a table", f"write it as [{sec}]")
            raw = {**raw, sec: {}}
    cohort = _section(raw.get("cohort", {}), "cohort", where, problems)
    model = _section(raw.get("model", {}), "model", where, problems)
    inference = _section(raw.get("inference", {}), "inference", where, problems)

    for key in ("participants", "maps"):
        if cohort.get(key) is None:
            problems.add(f"{where} [cohort]", f"'{key}' is required",
                         f"add {key} = \"{key}.tsv\" (path relative to the analysis file)")

    inference["tfce"] = _section(inference.get("tfce") or {}, "inference.tfce", where, problems)
    tw = inference.get("time_window")
    if tw is not None:
        inference["time_window"] = [float(tw[0]), float(tw[1])]
    if (cohort.get("atlas") is None) != (cohort.get("atlas_labels") is None):
        problems.add(f"{where} [cohort]", "'atlas' and 'atlas_labels' go together",
                     "give both the atlas image and its lookup table, or neither")
    _check_surface_keys(cohort, where, problems)

    _check_mixed_keys(model, where, problems)
    contrasts = []
    raw_contrasts = raw.get("contrasts", [])
    if not isinstance(raw_contrasts, list):
        problems.add(f"{where} contrasts", "must be an array of tables",
                     "write each contrast as a [[contrasts]] block")
        raw_contrasts = []
    if not raw_contrasts:
        problems.add(f"{where}", "no contrasts defined",
                     "add at least one [[contrasts]] block with a name and within / compare / slope / weights")
    names = {}
    for i, rc in enumerate(raw_contrasts):
        spec = _contrast(rc, i, where, model, names, problems)
        if spec is not None:
            contrasts.append(spec)
    return Settings(path=Path(path), title=top.get("title", SCHEMA[""]["title"].default),
                    cohort=cohort, model=model, contrasts=contrasts, inference=inference,
                    raw=raw)


def is_surface(cohort: dict) -> bool:
    """A surface analysis: the analysis file names a template mesh."""
    return any(cohort.get(k) is not None for k in ("mesh_left", "mesh_right"))


def _check_surface_keys(cohort, where, problems):
    """Surface keys go with their hemisphere's mesh; volume-only keys are not for surfaces."""
    for hemi in ("left", "right"):
        for key in (f"mask_{hemi}", f"atlas_{hemi}"):
            if cohort.get(key) is not None and cohort.get(f"mesh_{hemi}") is None:
                problems.add(f"{where} [cohort] {key}", f"is given without mesh_{hemi}",
                             f"add mesh_{hemi} (the template mesh the {hemi} maps lie on), "
                             f"or remove {key}")
    if is_surface(cohort):
        for key, alt in (("mask", "mask_left / mask_right"), ("atlas", "atlas_left / "
                         "atlas_right"), ("atlas_labels", "atlas_left / atlas_right")):
            if cohort.get(key) is not None:
                problems.add(f"{where} [cohort] {key}", "is a volume key; this analysis is on "
                             "a surface (it names a template mesh)",
                             f"give {alt} (GIfTI files per hemisphere) instead")


def space_class(settings: "Settings"):
    """The kind of source space the analysis file describes (a mesh: a surface)."""
    return SurfaceMesh if is_surface(settings.cohort) else VolumeGrid


def check_neighbors(settings: "Settings", problems: ProblemList) -> None:
    """[inference] neighbors against the analysis's source space; fills in its default.

    The analysis file may name any kind some source space knows (``NEIGHBORS``);
    the value must be one of the kinds of its own space (a volume unless it
    names a template mesh).  Unset, it becomes that space's first kind.
    """
    space = space_class(settings)
    value = settings.inference.get("neighbors")
    kinds = tuple(space.neighbor_kinds)
    if value is None:
        settings.inference["neighbors"] = kinds[0]
    elif value not in kinds:
        problems.add(f"{settings.path} [inference] neighbors",
                     f"'{value}' is not a neighbour kind of a {space.kind} source space "
                     f"(those are: {', '.join(kinds)})",
                     f"use neighbors = \"{kinds[0]}\" or leave it out")


#: Names Windows reserves for devices; a results folder cannot carry them.
_RESERVED = {"con", "prn", "aux", "nul"} | {f"{p}{i}" for p in ("com", "lpt") for i in range(1, 10)}
#: folders of the results folder that are not contrasts (outputs/layout.py: MODEL_DIR; kept
#: in step by tests/test_input_plausibility.py)
RESULT_FOLDERS = ("model",)
#: longest contrast name: it names a folder, and paths inside it (file systems allow 255
#: bytes per name, and some systems 260 characters per path)
MAX_NAME_LENGTH = 64


def _contrast(rc, i, where, model, names, problems):
    """One [[contrasts]] block -> ContrastSpec, or None when its content is unusable.

    A contrast whose content has a problem is reported and left out of the
    returned settings, so that later checks never see malformed weights.
    """
    cwhere = f"{where} [[contrasts]] #{i + 1}"
    if not isinstance(rc, dict):
        problems.add(cwhere, "must be a table", "write each contrast as a [[contrasts]] block")
        return None
    n_before = len(problems)
    c = _section(rc, "contrasts", cwhere, problems)
    type_ok = len(problems) == n_before
    name = c.get("name")
    if not name:
        problems.add(cwhere, "missing 'name'", "add name = \"my_contrast\"")
        name = f"contrast_{i + 1}"
    else:
        shown = name if len(name) <= MAX_NAME_LENGTH else f"{name[:40]}..."
        cwhere = f"{where} contrast '{shown}'"
        _check_name(name, cwhere, names, problems)
    n_before = len(problems)
    _check_contrast_content(c, cwhere, model, problems)
    if len(problems) > n_before or not type_ok:
        return None
    return ContrastSpec(name=name, description=c.get("description") or "",
                        within=c.get("within"), compare=c.get("compare"),
                        slope=c.get("slope"), weights=c.get("weights"), model=c.get("model"))


def _check_name(name, cwhere, names, problems):
    """Contrast names become results folders: portable, and distinct ignoring case."""
    if not all(ch.isalnum() or ch in "_-" for ch in name):
        problems.add(cwhere, "name may hold only letters, digits, '_' and '-'",
                     "it becomes a folder name in the results")
    if name.casefold() in _RESERVED:
        problems.add(cwhere, f"'{name}' is a reserved device name on Windows",
                     "choose another name (it becomes a folder name in the results)")
    if name.casefold() in RESULT_FOLDERS:
        problems.add(cwhere, f"'{name}' is the name of a folder every results folder of a "
                     "mixed model holds (its variance components)",
                     "choose another name (it becomes a folder name in the results)")
    if len(name) > MAX_NAME_LENGTH:
        problems.add(cwhere, f"name is {len(name)} characters long; at most {MAX_NAME_LENGTH}",
                     "shorten it (it becomes a folder name in the results); the description "
                     "can hold the long form")
    key = name.casefold()
    if key in names:
        other = names[key]
        if other == name:
            problems.add(cwhere, "duplicate contrast name", "give each contrast its own name")
        else:
            problems.add(cwhere, f"name differs from contrast '{other}' only by upper/lower "
                         "case; on case-insensitive file systems (Windows, macOS) both would "
                         "write the same results folder", "rename one of them")
    else:
        names[key] = name


def _check_mixed_keys(model, where, problems):
    """The mixed model's keys: what needs ``mixed = true``, and what a slope may name."""
    covs = [x.strip() for x in model.get("map_covariates") or []]
    chosen = model.get("random_slopes", AUTO)
    slopes = [] if chosen == AUTO else [x.strip() for x in chosen or []]
    model["map_covariates"] = covs
    model["random_slopes"] = AUTO if chosen == AUTO else slopes
    if not model.get("mixed"):
        why = ("the summary-statistic GLM averages each participant's maps of a condition "
               "into one before the model, so ")
        if covs:
            problems.add(f"{where} [model] map_covariates",
                         "needs mixed = true: " + why + "a covariate that differs between "
                         "maps of one participant has nothing left to act on",
                         "set mixed = true under [model], or remove map_covariates")
        if slopes:
            problems.add(f"{where} [model] random_slopes",
                         "needs mixed = true: " + why + "an effect that varies by "
                         "participant cannot be separated from the residual",
                         "set mixed = true under [model], or remove random_slopes")
        if model.get("estimation") != "reml":
            problems.add(f"{where} [model] estimation", "applies to the mixed model only",
                         "set mixed = true under [model], or remove estimation")
        return
    terms = ([model["within"]] if model.get("within") else []) + covs
    for term in slopes:
        if term not in terms:
            problems.add(f"{where} [model] random_slopes",
                         f"'{term}' is neither the within column nor a map covariate",
                         closest(term, terms) or (f"choose among {', '.join(terms)}" if terms
                                                  else "set [model] within or map_covariates"))
    for term in covs:
        if term == model.get("within"):
            problems.add(f"{where} [model] map_covariates",
                         f"'{term}' is the within column", "list it in one place only")


def _check_contrast_content(c, cwhere, model, problems):
    if not any(c.get(k) for k in ("within", "compare", "slope", "weights")):
        problems.add(cwhere, "says nothing to test",
                     "give within = {...}, compare = {...}, slope = \"column\" or weights = {...}")
    if c.get("weights") and (c.get("compare") or c.get("slope")):
        problems.add(cwhere, "'weights' cannot be combined with 'compare' or 'slope'",
                     "use weights alone (raw coefficients) or the named forms")
    if c.get("compare") and c.get("slope"):
        problems.add(cwhere, "'compare' and 'slope' cannot be combined", "write two contrasts")
    for key in ("within", "weights"):
        d = c.get(key)
        if d:
            bad = [k for k, v in d.items() if not _finite(v)]
            if bad:
                problems.add(f"{cwhere} {key}",
                             f"weights must be numbers: {', '.join(f'{k} = {d[k]!r}' for k in bad)}",
                             "e.g. {rare = 1, frequent = -1}")
            elif key == "within" and not any(d.values()):
                problems.add(f"{cwhere} within", "weights over conditions are all zero",
                             "e.g. {rare = 1, frequent = -1}")
            elif key == "within" and abs(sum(d.values())) > 1e-9:
                problems.add(f"{cwhere} within", "weights over conditions must sum to 0",
                             "a within contrast compares conditions, e.g. {rare = 1, frequent = -1}; "
                             "to average conditions leave 'within' out")
    if c.get("slope") is not None and not c["slope"].strip():
        problems.add(f"{cwhere} slope", "is empty", "name a numeric participants column")
    cmp_ = c.get("compare")
    if cmp_:
        if len(cmp_) != 1:
            problems.add(f"{cwhere} compare", "name exactly one factor",
                         "e.g. compare = {group = [\"patient\", \"control\"]}")
        for fac, levels in cmp_.items():
            if (not isinstance(levels, list) or len(levels) < 2
                    or not all(isinstance(x, (str, int)) and not isinstance(x, bool)
                               for x in levels)):
                problems.add(f"{cwhere} compare.{fac}", "needs a list of at least two levels",
                             "e.g. [\"patient\", \"control\"]")
            elif len(set(map(str, levels))) != len(levels):
                problems.add(f"{cwhere} compare.{fac}", "a level is listed twice",
                             "list each level once")
    if c.get("within") and not model.get("within"):
        problems.add(cwhere, "has within weights but [model] within is not set",
                     "add within = \"condition\" under [model]")
    chosen = c.get("model") or ("mixed" if model.get("mixed") else "glm")
    if c.get("model") == "mixed" and not model.get("mixed"):
        problems.add(f"{cwhere} model", "'mixed' needs mixed = true under [model]",
                     "set mixed = true under [model], or remove model from the contrast")
    covs = model.get("map_covariates") or []
    if c.get("slope") in covs and chosen == "glm":
        problems.add(f"{cwhere} slope", f"'{c['slope']}' is a map covariate, which only the "
                     "mixed model has", "remove model = \"glm\" from the contrast")
    if c.get("slope") in covs and c.get("within"):
        problems.add(cwhere, f"a slope of the map covariate '{c['slope']}' cannot have within "
                     "weights: map covariates enter the mixed model as main effects",
                     "remove within from this contrast")
