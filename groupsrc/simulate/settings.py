"""Settings of the demo scenario: the packaged TOML file, read and checked.

The generator settings live in ``groupsrc/data/demo_scenario.toml`` (a test
keeps ``demo_cohort/scenario.toml`` identical to it).  This module is the
only part of :mod:`groupsrc.simulate` that reads them; :mod:`.model` and
:mod:`.truth` take the resulting dict and compute arrays, :mod:`.build`
writes files.

Conventions of the settings (units as in the TOML file's header): positions
in template mm (sphere centred at the origin, x to the right, y to the
front, z to the vertex), times in s, dipole moments in nA m, fields in fT.
"""

from __future__ import annotations

import sys
from importlib import resources
from pathlib import Path

import numpy as np

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

CONDITIONS = ("rare", "frequent")
GROUPS = ("control", "patient")
SIZES = ("default", "small")
ROLES = ("common", "condition", "group_by_condition", "age")
#: truth mask name -> (generator role, analysis contrast)
EFFECTS = {"condition_effect": ("condition", "rare_minus_frequent"),
           "group_by_condition": ("group_by_condition", "group_by_tone"),
           "age_effect": ("age", "age_slope")}
#: top-level sections every settings file has
SECTIONS = ("seed", "sizes", "head", "participants", "noise", "inverse", "generators",
            "truth")


def packaged_text() -> str:
    """The text of the packaged settings file (UTF-8)."""
    return resources.files("groupsrc").joinpath("data/demo_scenario.toml").read_text(
        encoding="utf-8")


def scenario_settings(path=None) -> dict:
    """Generator settings: the packaged file, or the TOML file at ``path``."""
    text = packaged_text() if path is None else Path(path).read_text(encoding="utf-8")
    cfg = tomllib.loads(text)
    check_settings(cfg)
    return cfg


def check_settings(cfg: dict) -> None:
    """Raise ValueError when the settings lack a section or break a generator rule."""
    for key in SECTIONS:
        if key not in cfg:
            raise ValueError(f"scenario settings lack '{key}'")
    roles = [g.get("role") for g in cfg["generators"]]
    bad = sorted({r for r in roles if r not in ROLES}, key=str)
    if bad:
        raise ValueError(f"unknown generator role(s) {bad}; use one of {list(ROLES)}")
    for role, _ in EFFECTS.values():
        if role not in roles:
            raise ValueError(f"no generator has role '{role}'")
    radius = cfg["head"]["brain_radius_mm"]
    for g in cfg["generators"]:
        if np.linalg.norm(g["position_mm"]) >= radius:
            raise ValueError(f"generator {g['name']} lies outside the brain radius")


def size_settings(cfg: dict, size: str) -> dict:
    """The ``[sizes.<size>]`` table; ValueError naming the sizes for an unknown one."""
    if size not in cfg["sizes"]:
        raise ValueError(f"size must be one of {sorted(cfg['sizes'])}, got {size!r}")
    return cfg["sizes"][size]
