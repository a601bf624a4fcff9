"""The prefetch hint of groupsrc.stats.engine.prefetch: compiles, changes nothing.

A prefetch is a hint to the processor (LLVM's ``llvm.prefetch`` intrinsic,
LLVM Language Reference Manual): it must not fault, even at the last element,
and must leave every value as it was.  The TFCE tests
(``tests/test_scale_tfce.py``, ``tests/test_tfce.py``) check the values of
the pass that uses it.
"""

import numpy as np
from numba import njit

from groupsrc.stats.engine import prefetch as pf


@njit
def _sum_with_hints(a, ahead):
    total = 0.0
    for i in range(a.size):
        if i + ahead < a.size:
            pf.prefetch(a, i + ahead)
        total += a[i]
    pf.prefetch(a, a.size - 1)
    return total


def test_prefetch_compiles_on_this_numba():
    # the supported numba range builds the hint; the fallback only keeps old ones running
    assert pf.AVAILABLE, "llvm.prefetch did not compile: TFCE runs without the hint (slower)"


def test_prefetch_leaves_values_alone():
    for dtype in (np.float64, np.float32, np.int32, np.int8):
        a = np.arange(1000).astype(dtype)
        before = a.copy()
        assert _sum_with_hints(a, 16) == float(before.astype(np.float64).sum())
        np.testing.assert_array_equal(a, before)
