"""The time axis checked for an event-related response, and the window analysed.

A map saved without a time axis reads as one sample per second from 0 s (NIfTI
``pixdim[4]`` of 1 and no time unit), and an interval written in milliseconds
where seconds are expected is a thousand times too long; both once ran to the end
as "0 to 30000 ms every 1000 ms".  So before anything is fitted:

* the sampling interval of maps with more than one sample must lie in
  ``PLAUSIBLE_INTERVAL`` (0.01 ms to 100 ms, i.e.
  100 kHz to 10 Hz: event-related responses are sampled at hundreds of Hz to a few
  kHz, and down-sampled source estimates rarely below 50 Hz -- common practice);
* the first sample must lie within ``PLAUSIBLE_START`` seconds of the event (epochs
  span a second or two around it -- common practice);
* ``[inference] time_window`` must hold at least ``MIN_WINDOW_SAMPLES`` samples
  (cluster inference over time needs neighbours in time);

each a problem naming where the value came from (the maps, or the analysis file)
and how to state it.  A window that reaches beyond the maps' samples by more than
one sampling interval is analysed where it overlaps them; that is said as a note,
and the window actually analysed is returned for ``check`` and ``run`` to print.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..sources import TimeAxis
from .problems import ProblemList

#: sampling intervals (s) plausible for an event-related response
PLAUSIBLE_INTERVAL = (1e-5, 0.1)
#: first sample times (s) plausible: within this distance of the event
PLAUSIBLE_START = 10.0
#: a time window holds at least this many samples
MIN_WINDOW_SAMPLES = 3


@dataclass
class Window:
    """The samples analysed: their indices, first and last time (s), and notes."""

    index: np.ndarray
    start: float | None = None
    stop: float | None = None
    notes: list = field(default_factory=list)

    def summary(self) -> dict:
        if self.start is None:
            return {}
        return {"window_ms": [round(self.start * 1e3, 3), round(self.stop * 1e3, 3)],
                "window_samples": int(self.index.size)}


def _ms(seconds) -> str:
    if abs(seconds) >= 10:
        return f"{seconds:.4g} s"
    return f"{seconds * 1e3:.4g} ms"


def check_time_axis(settings, axis: TimeAxis, problems: ProblemList) -> bool:
    """Problems for an implausible sampling interval or first sample; True when fine."""
    lo, hi = PLAUSIBLE_INTERVAL
    n_before = len(problems)
    stated_dt = settings.cohort.get("sampling_interval") is not None
    stated_t0 = settings.cohort.get("time_start") is not None
    from_maps = ("the maps' time axis (read from their files; a NIfTI header without one "
                 "reads as 1 s per sample from 0 s)")
    how = ("write the time axis into the maps (NIfTI: pixdim[4] = the interval and toffset = "
           "the first sample, in the unit of xyzt_units; README, 'Writing your own maps'), or "
           "state it in seconds under [cohort], e.g. sampling_interval = 0.004 and "
           "time_start = -0.1")
    if axis.n > 1 and not lo <= axis.dt <= hi:          # one sample: no interval is used
        rate = f"{1 / axis.dt:.4g} Hz" if axis.dt > 0 else "no rate"
        what = (f"sampling interval {_ms(axis.dt)} ({rate}) is implausible for an "
                f"event-related response (expected {_ms(lo)} to {_ms(hi)})")
        if stated_dt:
            problems.add(f"{settings.path} [cohort] sampling_interval", what,
                         "sampling_interval is in seconds: 4 ms is sampling_interval = 0.004")
        else:
            problems.add(f"{settings.path} [cohort]", f"{from_maps}: {what}", how)
    if abs(axis.t0) > PLAUSIBLE_START:
        what = (f"the first sample at {_ms(axis.t0)} is implausible for an event-related "
                f"response (expected within {PLAUSIBLE_START:g} s of the event)")
        if stated_t0:
            problems.add(f"{settings.path} [cohort] time_start", what,
                         "time_start is in seconds: -100 ms is time_start = -0.1")
        else:
            problems.add(f"{settings.path} [cohort]", f"{from_maps}: {what}", how)
    return len(problems) == n_before


def analysed_window(settings, axis: TimeAxis, problems: ProblemList) -> Window:
    """The samples ``[inference] time_window`` selects (all without one), with problems
    for a window holding no sample or too few, and a note for one reaching beyond the
    maps' samples."""
    tw = settings.inference.get("time_window")
    index = axis.window(*(tw or (None, None)))
    t = axis.times
    where = f"{settings.path} [inference] time_window"
    span = f"the maps run from {t[0]:.4g} s to {t[-1]:.4g} s"
    if index.size == 0:
        problems.add(where, f"{tw} holds no sample; {span}", "choose a window inside that range")
        return Window(index)
    window = Window(index, float(t[index[0]]), float(t[index[-1]]))
    if tw is None:
        return window
    if index.size < MIN_WINDOW_SAMPLES <= axis.n:
        problems.add(where, f"{tw} holds {index.size} sample{'s' if index.size != 1 else ''} "
                     f"({', '.join(_ms(x) for x in t[index])}); at least {MIN_WINDOW_SAMPLES} "
                     "are needed for an analysis over time",
                     f"widen the window (the maps are sampled every {_ms(axis.dt)}; {span})")
    beyond = max(t[0] - tw[0], tw[1] - t[-1])
    if beyond > axis.dt * (1 + 1e-6):
        window.notes.append(f"time_window {tw} s reaches beyond the maps' samples ({span}); "
                            f"analysed: {_ms(window.start)} to {_ms(window.stop)}, "
                            f"{index.size} samples")
    return window
