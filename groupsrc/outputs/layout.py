"""The results folder's names and readers.

Everything that knows what a results folder holds -- file names, which files
the report needs, how to read them back -- lives here, so the writer and the
report both depend on this module and not on each other
(``writer -> report -> layout``).  Reading errors become
:class:`~groupsrc.inputs.problems.InputError` problems naming the file.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from .. import formats
from ..inputs.problems import InputError, Problem, ProblemList

RUN_RECORD = "run.json"
#: BIDS derivatives description (BIDS specification, "Derivatives": dataset_description.json)
DATASET_DESCRIPTION = "dataset_description.json"
SUMMARY_FILE = "analysis_summary.json"
REPORT_FILE = "report.html"
METHODS_FILE = "methods.md"
ALL_CLUSTERS = "clusters.tsv"
FIGURES = "figures"
#: the mixed model's folder: variance components, ICC, fit codes (mixed = true)
MODEL_DIR = "model"
MODEL_SUMMARY = "summary.json"
#: the anatomical underlay on its display grid (volume analyses with [cohort] underlay)
UNDERLAY_FILE = "underlay.nii.gz"
#: tables of each contrast folder that the report reads (the writer always writes them)
CONTRAST_TABLES = ("summary.json", "clusters.tsv", "peaks.tsv", "null_distribution.tsv",
                   "cluster_timecourses.tsv", "design.tsv")
#: maps of each contrast folder that the report reads (file names from the map format)
CONTRAST_MAPS = ("statistic", "clusters")
_FIX_DAMAGED = ("run 'groupsrc run' again to rewrite the results folder "
                "(the report cannot be rebuilt without it)")


def _damaged(path, what) -> InputError:
    return InputError([Problem(str(path), what, _FIX_DAMAGED)])


def read_tsv(path: Path) -> pd.DataFrame:
    """A results table ('n/a' = missing)."""
    try:
        return pd.read_csv(path, sep="\t", na_values=["n/a"], keep_default_na=False)
    except FileNotFoundError:
        raise _damaged(path, "missing from the results folder") from None
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        raise _damaged(path, f"cannot be read as a table ({exc})") from None


def read_json(path: Path) -> dict:
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise _damaged(path, "missing from the results folder") from None
    except (OSError, ValueError) as exc:
        raise _damaged(path, f"cannot be read as JSON ({exc})") from None


def space_kind(summary: dict) -> str:
    return summary.get("space", {}).get("kind", "volume")


def open_maps(results: Path, summary: dict):
    """The result maps (format and source space) of a saved folder."""
    try:
        return formats.result_maps_in(Path(results), space_kind(summary))
    except FileNotFoundError as exc:
        raise _damaged(exc.filename or results, "missing from the results folder") from None
    except ValueError as exc:
        raise _damaged(results, str(exc)) from None
    except Exception as exc:   # the format's reader raises many types for damaged files
        raise _damaged(results, f"the source space cannot be read ({type(exc).__name__}: "
                       f"{exc})") from None


def read_values(maps, folder: Path, stem: str) -> np.ndarray:
    """Per-source values of a written map; a clear error naming the file when damaged."""
    path = Path(folder) / maps.files(stem)[0]
    try:
        return np.asarray(maps.read(folder, stem), dtype=np.float64)
    except FileNotFoundError:
        raise _damaged(path, "missing from the results folder") from None
    except Exception as exc:   # nibabel and gzip raise many types for damaged files
        raise _damaged(path, f"cannot be read ({type(exc).__name__}: {exc})") from None


def read_underlay(results: Path):
    """The saved underlay (an :class:`~groupsrc.sources.underlay.Underlay`), or None
    when the folder has none; a damaged file is a problem naming it."""
    from ..sources.underlay import Underlay
    path = Path(results) / UNDERLAY_FILE
    if not path.is_file():
        return None
    try:
        values, affine = formats.nifti.read_image(path)
    except Exception as exc:   # nibabel and gzip raise many types for damaged files
        raise _damaged(path, f"cannot be read ({type(exc).__name__}: {exc})") from None
    return Underlay(np.asarray(values, np.float32), np.asarray(affine, float))


def check_results_folder(results: Path) -> None:
    """List every file the report needs that is missing; raise InputError if any."""
    results = Path(results)
    problems = ProblemList()
    if not results.is_dir():
        problems.add(results, "not a folder", "give the folder 'groupsrc run' wrote")
        raise InputError(problems)
    if not (results / RUN_RECORD).is_file():
        problems.add(results, f"not a groupsrc results folder (no {RUN_RECORD})",
                     "give the folder 'groupsrc run' wrote")
        raise InputError(problems)
    if not (results / SUMMARY_FILE).is_file():
        problems.add(results / SUMMARY_FILE, "missing from the results folder", _FIX_DAMAGED)
    else:
        summary = read_json(results / SUMMARY_FILE)
        maps = formats.RESULT_MAPS.get(space_kind(summary))
        if maps is None:
            problems.add(results / SUMMARY_FILE, f"unknown source space "
                         f"'{space_kind(summary)}'", "use the groupsrc version that wrote it")
            raise InputError(problems)
        space_files, files_of = formats.expected_result_files(maps, summary)
        for name in space_files:
            if not (results / name).is_file():
                problems.add(results / name, "missing from the results folder", _FIX_DAMAGED)
        for c in summary.get("contrasts", []):
            names = list(CONTRAST_TABLES) + [f for stem in CONTRAST_MAPS
                                             for f in files_of(stem)]
            for name in names:
                if not (results / c / name).is_file():
                    problems.add(results / c / name, "missing from the results folder",
                                 _FIX_DAMAGED)
    if problems:
        raise InputError(problems)


def times_ms(window: dict) -> np.ndarray:
    """Sample times (ms) of the analysed window recorded in the summary."""
    return np.round((window["t0_s"] + window["dt_s"] * np.arange(window["n"])) * 1e3, 3)
