"""BLAS threads: every product of the resampling runs on one BLAS thread, so that a
product's rounding never depends on how many threads the library would pick."""

from __future__ import annotations

_BLAS_CONTROLLER = None


def one_blas_thread():
    """Context that holds BLAS to one thread (threadpoolctl); see the module docstring."""
    global _BLAS_CONTROLLER
    if _BLAS_CONTROLLER is None:
        from threadpoolctl import ThreadpoolController
        _BLAS_CONTROLLER = ThreadpoolController()
    return _BLAS_CONTROLLER.limit(limits=1, user_api="blas")
