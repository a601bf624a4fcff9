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

from ..formats import nifti
from ..sources import VolumeGrid
from ..inputs.problems import InputError, Problem, ProblemList

RUN_RECORD = "run.json"
#: BIDS derivatives description (BIDS specification, "Derivatives": dataset_description.json)
DATASET_DESCRIPTION = "dataset_description.json"
SUMMARY_FILE = "analysis_summary.json"
MASK_FILE = "source_mask.nii.gz"
REPORT_FILE = "report.html"
METHODS_FILE = "methods.md"
ALL_CLUSTERS = "clusters.tsv"
FIGURES = "figures"
#: files of each contrast folder that the report reads (the writer always writes them)
CONTRAST_FILES = ("summary.json", "statistic.nii.gz", "clusters.nii.gz", "clusters.tsv",
                  "peaks.tsv", "null_distribution.tsv", "cluster_timecourses.tsv",
                  "design.tsv")
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


def read_map(path: Path, dtype=np.float64):
    """(data, affine) of a NIfTI map of the results folder; a clear error when damaged."""
    try:
        data, affine = nifti.read_image(path)
        return np.asarray(data, dtype=dtype), affine
    except FileNotFoundError:
        raise _damaged(path, "missing from the results folder") from None
    except Exception as exc:   # nibabel and gzip raise many types for damaged files
        raise _damaged(path, f"cannot be read as NIfTI ({type(exc).__name__}: {exc})") from None


def read_grid(results: Path) -> VolumeGrid:
    data, affine = read_map(Path(results) / MASK_FILE)
    return VolumeGrid.from_mask(data > 0, affine)


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
    for name in (SUMMARY_FILE, MASK_FILE):
        if not (results / name).is_file():
            problems.add(results / name, "missing from the results folder", _FIX_DAMAGED)
    if not problems:
        summary = read_json(results / SUMMARY_FILE)
        for c in summary.get("contrasts", []):
            for name in CONTRAST_FILES:
                if not (results / c / name).is_file():
                    problems.add(results / c / name, "missing from the results folder",
                                 _FIX_DAMAGED)
    if problems:
        raise InputError(problems)


def times_ms(window: dict) -> np.ndarray:
    """Sample times (ms) of the analysed window recorded in the summary."""
    return np.round((window["t0_s"] + window["dt_s"] * np.arange(window["n"])) * 1e3, 3)
