"""Collecting input problems so that every one is reported at once.

Validation code never raises on the first problem: it appends a
:class:`Problem` (where, what, how to fix) to a :class:`ProblemList` and
carries on.  The command line prints the whole list and exits with code 1.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass


@dataclass(frozen=True)
class Problem:
    where: str   # file, and row / column / key where it applies
    what: str    # what is wrong
    fix: str = ""  # how to fix it

    def __str__(self) -> str:
        text = f"{self.where}: {self.what}"
        if self.fix:
            text += f" -> {self.fix}"
        return text


class ProblemList(list):
    """A list of :class:`Problem` with a convenience ``add``."""

    def add(self, where, what, fix="") -> None:
        self.append(Problem(str(where), what, fix))

    def format(self) -> str:
        n = len(self)
        head = f"{n} problem{'s' if n != 1 else ''} found:"
        return "\n".join([head] + [f"  {i + 1}. {p}" for i, p in enumerate(self)])


class InputError(Exception):
    """Raised with every problem found; the command line exits with code 1."""

    def __init__(self, problems):
        self.problems = ProblemList(problems)
        super().__init__(self.problems.format())


def closest(word: str, options) -> str:
    """A ' did you mean ...?' hint, or '' when nothing is close."""
    match = difflib.get_close_matches(word, list(options), n=1, cutoff=0.6)
    return f"did you mean '{match[0]}'?" if match else ""
