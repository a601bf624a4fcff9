"""The demo cohort generator: dipoles in a spherical head -> MEG sensors -> minimum norm.

* :mod:`.forward` -- Sarvas (1987) field of current dipoles in a spherical
  conductor; magnetometer lead fields; a helmet-like sensor cap.
* :mod:`.inverse` -- regularised minimum-norm inverse (Hamalainen & Ilmoniemi
  1994) with depth weighting; moment amplitudes.
* :mod:`.scenario` -- the fictional Velmora Listening Lab oddball study:
  participants, generators with known effects, noise, NIfTI maps and truth.
"""

from .scenario import (build_demo_cohort, check_cohort_target, demo_truth, participants_table,
                       scenario_settings, simulate, template_grid)

__all__ = ["build_demo_cohort", "check_cohort_target", "demo_truth", "participants_table", "scenario_settings",
           "simulate", "template_grid"]
