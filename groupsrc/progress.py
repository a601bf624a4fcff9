"""Progress of the long stages (loading, reduction, resampling) on stderr.

Three modes, chosen once per run by :func:`reporter`:

* ``bar`` -- stderr is a terminal: a bar with the rate and the time left
  (tqdm), one per stage;
* ``lines`` -- stderr is not a terminal (a batch job's log): one line at
  every ~10% with the rate and the time left (timed from the first step's end,
  so the one-off costs of the first step -- compiled code loaded, caches
  warmed -- do not inflate it), so a log file stays short;
* ``quiet`` -- ``--quiet``: nothing.

A reporter is a callable ``new(desc, total, unit)`` returning a
:class:`Progress`; the statistics see only ``progress(done, total)``.
Like :mod:`groupsrc.atomic` this module imports nothing from the package.
"""

from __future__ import annotations

import sys
import time

#: the lines mode prints when the work has advanced this share of the total since
#: its last line
LINE_STEP = 0.10
#: ... or this much less when the work comes in large steps (at least half a
#: ``LINE_STEP``): batches of whole product blocks often fall just short of a tenth
#: (96 of 1000), which would otherwise print first at 19%
LINE_SLACK = 0.025


class Progress:
    """One stage's progress: ``update(done)``, ``close()``; also ``progress(done, total)``."""

    def __init__(self, desc, total, unit, mode, stream=None):
        self.desc, self.total, self.unit, self.mode = desc, max(0, int(total)), unit, mode
        self.stream = stream
        self.t0 = time.monotonic()
        self.start = None          # done count when this process began (resumed runs)
        #: (time, done) at the first step of work: the rate is timed from there, since
        #: the first step also pays one-off costs (compiled code loaded or compiled,
        #: caches warmed) that would make the time left far too long
        self.first = None
        self.printed = 0.0         # share at the last line printed
        self.last = 0              # done count at the previous update
        self.bar = None
        if mode == "bar":
            from tqdm import tqdm
            # the rate and time left are ours (timed from the first step's end), as in
            # the lines mode; tqdm's would include the first step's one-off costs
            self.bar = tqdm(total=self.total, desc=desc, unit=unit, file=self._out(),
                            leave=False, dynamic_ncols=True,
                            bar_format="{l_bar}{bar}| {n_fmt}/{total_fmt} [{elapsed}{postfix}]")

    def _out(self):
        return self.stream if self.stream is not None else sys.stderr

    def __call__(self, done, total=None):
        self.update(done)

    def update(self, done):
        done = int(done)
        if self.start is None:
            self.start = done if done < self.total else 0
        if self.first is None and done > self.start:
            self.first = (time.monotonic(), done)
        if self.bar is not None:
            self.bar.n = done
            self.bar.postfix = self._rate(done)[2:] or None
            self.bar.refresh()
        elif self.mode == "lines" and self.total:
            share = done / self.total
            big = (done - self.last) / self.total >= LINE_STEP / 2
            self.last = done
            step = LINE_STEP - (LINE_SLACK if big else 0.0)
            if share - self.printed >= step - 1e-12 or done >= self.total:
                self.printed = share
                print(f"groupsrc: {self.desc}: {share:4.0%} ({done}/{self.total} {self.unit}s)"
                      f"{self._rate(done)}", file=self._out(), flush=True)
        if done >= self.total:
            self.close()

    def _rate(self, done):
        """', 12.5 resamples/s, 3 min left' from the work after the first step ('' before)."""
        if self.first is None:
            return ""
        spent = time.monotonic() - self.first[0]
        work = done - self.first[1]
        if spent <= 0 or work <= 0:
            return ""
        rate = work / spent
        left = (self.total - done) / rate
        return f", {rate:.3g} {self.unit}s/s, {_duration(left)} left"

    def close(self):
        if self.bar is not None:
            self.bar.close()
            self.bar = None


def _duration(seconds):
    seconds = max(0.0, float(seconds))
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def reporter(quiet=False, stream=None):
    """``new(desc, total, unit) -> Progress`` for this run (see the module docstring)."""
    out = stream if stream is not None else sys.stderr
    mode = "quiet" if quiet else ("bar" if getattr(out, "isatty", lambda: False)() else "lines")

    def new(desc, total, unit="item"):
        return Progress(desc, total, unit, mode, stream)
    new.mode = mode
    return new


def track(iterable, new, desc, total, unit="item"):
    """Iterate while reporting through ``new`` (a :func:`reporter`); ``new`` may be None."""
    if new is None:
        yield from iterable
        return
    p = new(desc, total, unit)
    try:
        for i, item in enumerate(iterable):
            yield item
            p.update(i + 1)
    finally:
        p.close()


def per_item(progress):
    """``each(items, desc, unit)``: iterate over a sequence while showing progress.

    ``progress`` is a :func:`reporter` (silent when quiet), or True/False/None for a
    tqdm bar (None: a bar when stderr is a terminal) -- the two ways the loaders are
    called.
    """
    if callable(progress):
        new = None if getattr(progress, "mode", "") == "quiet" else progress
        return lambda items, desc, unit: track(items, new, desc, len(items), unit)
    from tqdm.auto import tqdm
    show = sys.stderr.isatty() if progress is None else bool(progress)
    return lambda items, desc, unit: tqdm(items, desc=desc, unit=unit, disable=not show)
