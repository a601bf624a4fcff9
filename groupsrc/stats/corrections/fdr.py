"""False discovery rate: Benjamini-Hochberg adjusted p-values.

Benjamini & Hochberg 1995 (J R Stat Soc B 57:289-300).  The adjusted value of
the i-th smallest of m p-values is ``min_{j >= i} min(1, p_(j) m / j)``;
rejecting every adjusted p <= q controls the FDR at q for independent or
positively dependent tests.

Examples
--------
>>> fdr_bh([0.01, 0.04, 0.03, 0.5]).round(4).tolist()
[0.04, 0.0533, 0.0533, 0.5]
"""

from __future__ import annotations

import numpy as np


def fdr_bh(p):
    """Benjamini-Hochberg adjusted p-values, same shape as ``p``.

    NaN entries are ignored (not counted in m) and stay NaN.
    """
    p = np.asarray(p, dtype=np.float64)
    flat = p.reshape(-1)
    ok = np.isfinite(flat)
    if np.any((flat[ok] < 0) | (flat[ok] > 1)):
        raise ValueError("p-values must lie in [0, 1]")
    out = np.full(flat.shape, np.nan)
    vals = flat[ok]
    m = vals.size
    if m:
        order = np.argsort(vals, kind="mergesort")
        scaled = vals[order] * m / np.arange(1, m + 1)
        adj = np.minimum.accumulate(scaled[::-1])[::-1]
        res = np.empty(m)
        res[order] = np.minimum(adj, 1.0)
        out[np.nonzero(ok)[0]] = res
    return out.reshape(p.shape)
