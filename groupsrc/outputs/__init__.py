"""Output stage: NIfTI maps, tidy tables, figures, methods text and the HTML report.

Public API
----------
write_results(analysis, out_dir, run_record)
    Write a whole results folder from an :class:`~groupsrc.stats.results.AnalysisResult`.
build_report(results_dir) -> Path
    Rebuild figures, methods.md and report.html from a saved folder.
"""

from .report import build_report
from .tables import COLUMNS
from .writer import write_results

__all__ = ["write_results", "build_report", "COLUMNS"]
