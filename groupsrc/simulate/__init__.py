"""Demo cohort simulation: forward model, minimum-norm inverse, fictional scenario."""

from .scenario import build_demo_cohort, scenario_settings

__all__ = ["build_demo_cohort", "scenario_settings"]
