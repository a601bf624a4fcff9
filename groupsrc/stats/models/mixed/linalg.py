"""Batched small linear algebra for the mixed model: one small matrix per feature.

Matrices are arrays whose two *leading* axes are the matrix axes and whose
trailing axes run over participants and/or features, e.g. ``(q, q, N, F)``
or ``(p, p, F)``.  Every operation is a short Python loop over the (small)
matrix indices with element-wise NumPy arithmetic over the trailing axes, so
all features are handled at once and each feature's result depends on that
feature's numbers only (no reduction across features, hence the same bits
whatever the chunk of features it sits in).

The products use ``numpy.einsum`` (fast for small leading axes); the
triangular solves used while resampling (:func:`solve_lower`) use only +, -,
*, / element by element, so a resample's bits do not depend on its batch.
"""

from __future__ import annotations

import numpy as np


def mm(A, B):
    """Matrix product over the leading axes: (a, b, ...) @ (b, c, ...) -> (a, c, ...)."""
    return np.einsum("ab...,bc...->ac...", A, B)


def mv(A, v):
    """Matrix times vector: (a, b, ...) @ (b, ...) -> (a, ...)."""
    return np.einsum("ab...,b...->a...", A, v)


def T(A):
    """Transpose of the leading two axes (a view)."""
    return A.swapaxes(0, 1)


def trace_prod(A, B):
    """tr(A B) over the leading axes: sum_ij A_ij B_ji -> trailing shape."""
    n = A.shape[0]
    if n == 0:
        return np.zeros(np.broadcast_shapes(A.shape[2:], B.shape[2:]))
    s = A[0, 0] * B[0, 0]
    for i in range(n):
        for j in range(n):
            if i or j:
                s = s + A[i, j] * B[j, i]
    return s


def quad(v, A, w):
    """v' A w over the leading axes."""
    return (v * mv(A, w)).sum(axis=0)


def eye_like(n, trail):
    out = np.zeros((n, n) + tuple(trail))
    for i in range(n):
        out[i, i] = 1.0
    return out


def chol(A):
    """Lower Cholesky factor of symmetric matrices (n, n, ...) and a per-element
    success mask (False where a pivot is not positive; that pivot is set to 1)."""
    n = A.shape[0]
    L = np.zeros(A.shape)
    ok = np.ones(A.shape[2:], bool)
    for j in range(n):
        d = A[j, j].copy()
        for k in range(j):
            d -= L[j, k] * L[j, k]
        good = d > 0
        ok &= good
        piv = np.sqrt(np.where(good, d, 1.0))
        L[j, j] = piv
        for i in range(j + 1, n):
            s = A[i, j].copy()
            for k in range(j):
                s -= L[i, k] * L[j, k]
            L[i, j] = s / piv
    return L, ok


def chol_logdet(L):
    """log det A from its Cholesky factor."""
    n = L.shape[0]
    return 2.0 * sum(np.log(L[i, i]) for i in range(n))


def solve_lower(L, b):
    """Forward substitution: x with L x = b; b is (n, ...) broadcasting with L's trailing axes."""
    n = L.shape[0]
    x = np.empty((n,) + np.broadcast_shapes(b.shape[1:], L.shape[2:]))
    for i in range(n):
        s = b[i] + np.zeros(x.shape[1:])
        for k in range(i):
            s -= L[i, k] * x[k]
        x[i] = s / L[i, i]
    return x


def solve_upper_t(L, b):
    """Back substitution with L': x with L' x = b."""
    n = L.shape[0]
    x = np.empty((n,) + np.broadcast_shapes(b.shape[1:], L.shape[2:]))
    for i in range(n - 1, -1, -1):
        s = b[i] + np.zeros(x.shape[1:])
        for k in range(i + 1, n):
            s -= L[k, i] * x[k]
        x[i] = s / L[i, i]
    return x


def chol_solve(L, b):
    """x with (L L') x = b."""
    return solve_upper_t(L, solve_lower(L, b))


def inv_lower(L):
    """Inverse of lower-triangular matrices (n, n, ...)."""
    n = L.shape[0]
    M = np.zeros(L.shape)
    for j in range(n):
        M[j, j] = 1.0 / L[j, j]
        for i in range(j + 1, n):
            s = L[i, j] * M[j, j]
            for k in range(j + 1, i):
                s = s + L[i, k] * M[k, j]
            M[i, j] = -s / L[i, i]
    return M


def chol_inv(L):
    """A^{-1} = L^{-T} L^{-1} from the Cholesky factor L of A."""
    Li = inv_lower(L)
    return mm(T(Li), Li)


def sym_pinv_solve(H, g, rtol=1e-10):
    """x = H^+ g for small symmetric H (d, d, F), g (d, F), by eigen-decomposition
    (pseudo-inverse: eigenvalues below rtol * largest are dropped)."""
    Hf = np.moveaxis(H, (0, 1), (-2, -1))
    w, V = np.linalg.eigh(Hf)                            # (..., d), (..., d, d)
    top = np.max(np.abs(w), axis=-1, keepdims=True)
    keep = np.abs(w) > rtol * np.where(top > 0, top, 1.0)
    winv = np.where(keep, 1.0 / np.where(keep, w, 1.0), 0.0)
    gf = np.moveaxis(g, 0, -1)
    c = np.einsum("...ji,...j->...i", V, gf) * winv
    return np.moveaxis(np.einsum("...ij,...j->...i", V, c), -1, 0)


def orthonormal_columns(A):
    """Gram-Schmidt on the columns of A (p, k, F), per feature."""
    p, k = A.shape[:2]
    Q = np.array(A, dtype=float)
    for j in range(k):
        for i in range(j):
            Q[:, j] -= (Q[:, i] * Q[:, j]).sum(axis=0) * Q[:, i]
        nrm = np.sqrt((Q[:, j] * Q[:, j]).sum(axis=0))
        Q[:, j] /= np.where(nrm > 0, nrm, 1.0)
    return Q
