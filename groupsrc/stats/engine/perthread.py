"""Arrays a thread reuses from call to call: the kernels' work buffers and the
corrections' scratch arrays.

Large arrays allocated per call page-fault every time, and those faults
serialise threads; one per thread, kept for a contrast, avoids both.  A
:class:`PerThread` is not pickled: a copy sent to another process starts
empty and makes its own.
"""

from __future__ import annotations

import threading


class PerThread:
    """One value per calling thread, made on first use and kept until :meth:`clear`."""

    def __init__(self):
        self._local = threading.local()

    def get(self, make, fits=None):
        """The calling thread's value; ``make()`` when it has none yet or when
        ``fits(value)`` says the one it has will not do."""
        value = getattr(self._local, "value", None)
        if value is None or (fits is not None and not fits(value)):
            value = self._local.value = make()
        return value

    def clear(self):
        """Drop every thread's value."""
        self._local = threading.local()

    def __getstate__(self):
        return {}

    def __setstate__(self, state):
        self._local = threading.local()
