"""Regularised minimum-norm inverse (Hamalainen & Ilmoniemi 1994).

For a gain matrix ``L`` (sensors x 3 sources), noise covariance ``C`` and
source covariance ``R`` the minimum-norm estimate is

    W = R L^T (L R L^T + lambda^2 C)^-1,     j_hat = W b

(Hamalainen & Ilmoniemi 1994, Med Biol Eng Comput 32:35-42).  Here ``R`` is
diagonal with a depth weighting ``(||L_j||^2)^-depth`` per source (the three
components of a source share the weight; a common practice that counters the
minimum-norm bias towards superficial sources), and ``lambda^2`` is set from
an assumed signal-to-noise ratio as ``trace(L_w R L_w^T) / (n_sensors snr^2)``
after whitening with ``C``, which makes ``1 / snr^2`` the regulariser of the
whitened, trace-normalised problem.

The map value at a source is the amplitude (Euclidean norm) of its three
estimated moment components, in nA m: a non-negative map, as inverse
solutions with free orientation are usually reported.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class InverseOperator:
    W: np.ndarray          # (3 n_sources, n_sensors)
    lambda2: float
    snr: float
    depth: float

    def apply(self, data):
        """Source amplitudes (n_sources, n_times) in the units of the moment (A m)."""
        data = np.asarray(data, float)
        J = self.W @ data                               # (3 S, T)
        J = J.reshape(-1, 3, data.shape[1])
        return np.sqrt((J ** 2).sum(axis=1))

    def apply_components(self, data):
        return (self.W @ np.asarray(data, float)).reshape(-1, 3, np.shape(data)[1])


def minimum_norm(L, noise_cov, *, snr=3.0, depth=0.8) -> InverseOperator:
    """Build the minimum-norm inverse operator.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> L = rng.standard_normal((20, 30))
    >>> op = minimum_norm(L, np.eye(20))
    >>> op.W.shape
    (30, 20)
    """
    L = np.asarray(L, float)
    C = np.asarray(noise_cov, float)
    m, n3 = L.shape
    if n3 % 3:
        raise ValueError("L must have 3 columns per source")
    # whitening C^-1/2 from the eigen-decomposition of the noise covariance
    evals, evecs = np.linalg.eigh(C)
    evals = np.maximum(evals, evals.max() * 1e-12)
    Wh = (evecs / np.sqrt(evals)) @ evecs.T
    Lw = Wh @ L
    col = (Lw ** 2).reshape(m, -1, 3).sum(axis=(0, 2))          # per-source gain
    rdiag = np.repeat(np.maximum(col, col.max() * 1e-12) ** (-depth), 3)
    G = (Lw * rdiag) @ Lw.T                                       # Lw R Lw^T
    lambda2 = np.trace(G) / (m * snr ** 2)
    K = np.linalg.solve(G + lambda2 * np.eye(m), np.eye(m))
    W = (rdiag[:, None] * Lw.T) @ K @ Wh
    return InverseOperator(W=W, lambda2=float(lambda2), snr=float(snr), depth=float(depth))
