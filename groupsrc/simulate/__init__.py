"""The demo cohort generator: dipoles in a spherical head -> MEG sensors -> minimum norm.

Modules, in the order data flow through them (a later one uses earlier
ones, never the reverse):

* :mod:`.settings` -- the scenario settings (packaged TOML), read and checked.
* :mod:`.forward` -- Sarvas (1987) field of current dipoles in a spherical
  conductor; magnetometer lead fields; a helmet-like sensor cap.
* :mod:`.inverse` -- regularised minimum-norm weights (Hamalainen &
  Ilmoniemi 1994) with depth weighting; moment amplitudes.
* :mod:`.model` -- the fictional Velmora Listening Lab oddball study as
  arrays: template grid, participants, generators, noise, simulated maps.
* :mod:`.truth` -- noise-free effects, expected t and ground-truth masks.
* :mod:`.build` -- the files: writing a cohort and reading its truth back
  (NIfTI through :mod:`groupsrc.formats.nifti`, writes through
  :mod:`groupsrc.atomic`).
"""

from .build import build_demo_cohort, check_cohort_target, demo_truth
from .model import participants_table, simulate, template_grid
from .settings import scenario_settings

__all__ = ["build_demo_cohort", "check_cohort_target", "demo_truth", "participants_table",
           "scenario_settings", "simulate", "template_grid"]
