"""Regularised minimum-norm inverse (Hamalainen & Ilmoniemi 1994).

For a gain matrix ``L`` (sensors x 3 sources), a noise covariance ``C`` and a
diagonal source covariance ``R`` the regularised minimum-norm estimate of the
source currents from data ``b`` is (Hamalainen & Ilmoniemi 1994, Med Biol Eng
Comput 32:35-42)

    j_hat = W b,        W = R L^T (L R L^T + lambda^2 C)^-1,

which is ``W = L^T (L L^T + lambda^2 C)^-1`` when ``R = I``.  Choices made here
(each a common practice, documented so the demo's maps can be interpreted):

* **Whitening.**  The operator is computed in whitened units,
  ``L_w = C^-1/2 L``, where it reads ``R L_w^T (L_w R L_w^T + lambda^2 I)^-1
  C^-1/2`` -- algebraically the same ``W``.
* **Regularisation from an SNR.**  ``lambda^2 = trace(L_w R L_w^T) / (m snr^2)``
  for ``m`` sensors: the whitened signal covariance is scaled to unit mean
  sensor variance and ``lambda^2 = 1 / snr^2`` (common practice)
  (here ``snr = 3`` by default).
* **Depth weighting.**  ``R = diag(w_j)`` with ``w_j = g_j^-p`` for the
  whitened gain ``g_j = ||L_w[:, 3j:3j+3]||_F^2`` of source ``j`` (the three
  components of a source share the weight); ``p = 0`` switches it off.  It
  counters the minimum-norm bias towards sources near the sensors.  Gains are
  floored at ``max(g) / depth_limit`` before the power, so nearly silent deep
  sources (the centre of a sphere is exactly silent in MEG) do not get
  unbounded weights.
* **Map value.**  The amplitude (Euclidean norm) of the three estimated
  moment components of each source: non-negative maps, as free-orientation
  inverse solutions are usually reported.  The radial component is always
  estimated as 0 (radial dipoles are silent in a sphere, so the radial
  direction lies in the null space of each source's gain columns and
  ``R L^T`` maps nothing onto it); the amplitude is therefore the norm of the
  two tangential components.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class InverseOperator:
    """A minimum-norm operator: ``W`` (3 n_sources, n_sensors) and its settings."""

    W: np.ndarray
    lambda2: float
    snr: float
    depth: float
    depth_weights: np.ndarray    # (n_sources,) the diagonal of R, one per source

    @property
    def n_sources(self) -> int:
        return self.W.shape[0] // 3

    def components(self, data) -> np.ndarray:
        """Estimated moments (n_sources, 3, ...) for data (n_sensors, ...)."""
        data = np.asarray(data, float)
        J = np.tensordot(self.W, data, axes=(1, 0))
        return J.reshape((self.n_sources, 3) + data.shape[1:])

    def amplitude(self, data) -> np.ndarray:
        """Moment amplitude per source (n_sources, ...) in the units of the moments."""
        J = self.components(data)
        return np.sqrt(np.einsum("sk...,sk...->s...", J, J))


def minimum_norm(L, noise_cov, *, snr: float = 3.0, depth: float = 0.8,
                 depth_limit: float = 100.0) -> InverseOperator:
    """Build the regularised minimum-norm operator (see the module docstring).

    Parameters
    ----------
    L : (m, 3 n) array
        Gain matrix, three columns (x, y, z) per source.
    noise_cov : (m, m) array
        Noise covariance of the data the operator will be applied to
        (symmetric positive definite).
    snr : float
        Assumed amplitude signal-to-noise ratio; ``lambda^2`` follows from it.
    depth : float
        Depth-weighting exponent ``p`` (0 = no weighting).
    depth_limit : float
        Largest ratio of source gains considered for the weights.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> op = minimum_norm(rng.standard_normal((20, 30)), np.eye(20))
    >>> op.W.shape, op.n_sources
    ((30, 20), 10)
    """
    L = np.asarray(L, float)
    C = np.asarray(noise_cov, float)
    m, n3 = L.shape
    if n3 % 3:
        raise ValueError("L must have three columns per source")
    if C.shape != (m, m):
        raise ValueError(f"noise covariance must be {m} x {m}, got {C.shape}")
    if snr <= 0 or depth < 0 or depth_limit < 1:
        raise ValueError("need snr > 0, depth >= 0 and depth_limit >= 1")
    evals, evecs = np.linalg.eigh((C + C.T) / 2)
    if evals.min() <= evals.max() * 1e-12:
        raise ValueError("the noise covariance must be positive definite")
    white = (evecs / np.sqrt(evals)) @ evecs.T                 # C^-1/2, symmetric
    Lw = white @ L
    gain = (Lw ** 2).reshape(m, -1, 3).sum(axis=(0, 2))        # (n,)
    if depth > 0:
        w = np.maximum(gain, gain.max() / depth_limit) ** (-depth)
        w = w / w.max()
    else:
        w = np.ones_like(gain)
    r = np.repeat(w, 3)
    G = (Lw * r) @ Lw.T                                        # L_w R L_w^T
    lambda2 = float(np.trace(G) / (m * snr ** 2))
    K = np.linalg.inv(G + lambda2 * np.eye(m))
    K = (K + K.T) / 2
    W = (r[:, None] * Lw.T) @ (K @ white)
    return InverseOperator(W=W, lambda2=lambda2, snr=float(snr), depth=float(depth),
                           depth_weights=w)
