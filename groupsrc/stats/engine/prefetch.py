"""A memory prefetch hint for compiled loops (numba).

``prefetch(array, i)`` asks the processor to bring the cache line holding
``array[i]`` (1-D, C-contiguous) into cache and returns at once; it never
faults and changes no value.  Loops whose order of visits is known ahead
(TFCE's pass in height order, :mod:`..corrections.unionfind`) issue it a few iterations
early, so the random reads that dominate them overlap instead of waiting one
after another.

Built on LLVM's ``llvm.prefetch`` intrinsic through numba's extension API.  If
the installed numba / LLVM cannot compile it, :data:`AVAILABLE` is False and
``prefetch`` is a compiled no-op: same results, only slower.
"""

from __future__ import annotations

import llvmlite.binding as _llvm
import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.core import cgutils
from numba.extending import intrinsic

# the intrinsic's name carries its pointer type: "p0" with opaque pointers (LLVM 15+)
_NAME = "llvm.prefetch.p0" if _llvm.llvm_version_info[0] >= 15 else "llvm.prefetch.p0i8"


@intrinsic
def _llvm_prefetch(typingctx, arr, idx):
    if not isinstance(arr, types.Array) or arr.ndim != 1:
        return None
    sig = types.void(arr, types.intp)

    def codegen(context, builder, signature, args):
        arrty = signature.args[0]
        ary = context.make_array(arrty)(context, builder, args[0])
        ptr = cgutils.get_item_pointer(context, builder, arrty, ary, [args[1]],
                                       wraparound=False)
        i8p = ir.IntType(8).as_pointer()
        i32 = ir.IntType(32)
        fnty = ir.FunctionType(ir.VoidType(), [i8p, i32, i32, i32])
        fn = cgutils.get_or_insert_function(builder.module, fnty, _NAME)
        # read access (0), keep in all cache levels (3), data cache (1)
        builder.call(fn, [builder.bitcast(ptr, i8p), i32(0), i32(3), i32(1)])
        return context.get_dummy_value()

    return sig, codegen


@njit(nogil=True, cache=True)
def _probe(a):
    _llvm_prefetch(a, 0)
    return a[0]


@njit(nogil=True, cache=True)
def _no_prefetch(arr, i):
    pass


try:
    _probe(np.zeros(1))
    AVAILABLE = True
    prefetch = _llvm_prefetch
except Exception:  # noqa: BLE001 -- any compile failure: fall back to the no-op
    AVAILABLE = False
    prefetch = _no_prefetch
