"""Regularised minimum-norm weights with depth weighting (Hamalainen & Ilmoniemi 1994).

For a gain matrix ``L`` (sensors x 3 sources), a noise covariance ``C`` and a
diagonal prior source covariance ``R``, the regularised minimum-norm estimate
of the source moments from sensor data ``b`` is (Hamalainen & Ilmoniemi 1994,
Med Biol Eng Comput 32:35-42)

    j_hat = M b,        M = R L^T (L R L^T + ridge * C)^-1,

which is ``M = L^T (L L^T + ridge * C)^-1`` when ``R = I``.  ``M`` is the
*weight matrix* of :class:`MinimumNormWeights`: row ``3 j + k`` holds the
sensor weights that give moment component ``k`` (x, y, z) of source ``j``.
How the pieces are chosen here (each a common practice, stated so the demo's
maps can be interpreted):

* **Whitening.**  The weights are computed in whitened units,
  ``L_w = C^-1/2 L`` (symmetric inverse square root), where the noise has
  unit variance on every sensor and ``M = R L_w^T (G + ridge I)^-1 C^-1/2``
  with ``G = L_w R L_w^T`` -- algebraically the same ``M``.
* **Regularisation, stated as a share.**  ``ridge = regularisation * P`` with
  ``P = trace(G) / m`` for ``m`` sensors: the mean whitened signal power per
  sensor when every source has the prior variance ``R`` (equally, the mean
  eigenvalue of ``G``).  ``regularisation`` is therefore the share of that
  mean power added to the diagonal of ``G``.  Two readings of it:

  - *filter*: in the eigenvectors of ``G`` (eigenvalues ``s_k``) the data
    are passed on with factors ``s_k / (s_k + ridge)`` (the eigenvalues of
    ``L M``); a spatial pattern keeps more than half its weight exactly when
    its power exceeds ``regularisation`` times the mean, and weaker patterns,
    where noise dominates, are damped (Tikhonov regularisation; common
    practice);
  - *prior*: ``M b`` is the conditional mean of the moments given ``b`` when
    the moments are Gaussian with covariance ``R / ridge`` and the noise
    Gaussian with covariance ``C`` (Gaussian conditioning; common practice);
    under that prior the whitened signal carries ``1 / regularisation`` times
    the noise power on an average sensor.

  Default 0.1: patterns down to a tenth of the mean power are kept at half
  weight or more, which favours sharp maps over quiet single maps; it suits
  data that are later averaged over many maps, as in a group analysis (the
  demo sets its own value in its settings).
* **Depth weighting.**  ``R = diag(w_j)`` (the three components of a source
  share the weight) with ``w_j = max(g_j, gain_floor * max(g))^-depth_exponent``
  for the whitened gain ``g_j = ||L_w[:, 3j:3j+3]||_F^2`` of source ``j``,
  scaled so the largest ``w_j`` is 1; ``depth_exponent = 0`` switches it
  off.  It counters the minimum-norm bias towards sources near the sensors
  (common practice; the gain-power form is described, for instance, by Lin
  et al. 2006, NeuroImage 31:160-171 -- reference from memory).  The floor
  keeps nearly silent deep sources (the centre of a sphere is exactly silent
  in MEG) from unbounded weights.  Default exponent 0.5: the prior standard
  deviation of a source then scales as ``g_j^-1/4``, a middle course between
  no weighting (0) and equalising every source's whitened gain power (1).
* **Map value.**  The amplitude (Euclidean norm) of the three estimated
  moment components of each source: non-negative maps, as free-orientation
  minimum-norm estimates are usually reported (common practice).  The radial
  component is always estimated as 0 (radial dipoles are silent in a sphere,
  Sarvas 1987, so the radial direction lies in the null space of each
  source's gain columns and ``R L^T`` maps nothing onto it); the amplitude is
  therefore the norm of the two tangential components.

Units follow the inputs: with ``L`` in T per A m and data in T, moments are
in A m.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class MinimumNormWeights:
    """Minimum-norm weights and the settings they were built with.

    ``matrix`` is ``(3 n_sources, n_sensors)``; ``ridge`` is the amount added to
    the diagonal in whitened units (``regularisation`` times the mean whitened
    signal power); ``prior_variance`` is the diagonal of ``R``, one value per
    source, largest 1.
    """

    matrix: np.ndarray
    regularisation: float
    ridge: float
    depth_exponent: float
    prior_variance: np.ndarray

    @property
    def n_sources(self) -> int:
        return self.matrix.shape[0] // 3

    def moments(self, data) -> np.ndarray:
        """Estimated moments (n_sources, 3, ...) for data (n_sensors, ...)."""
        data = np.asarray(data, float)
        J = np.tensordot(self.matrix, data, axes=(1, 0))
        return J.reshape((self.n_sources, 3) + data.shape[1:])

    def amplitude(self, data) -> np.ndarray:
        """Moment amplitude per source (n_sources, ...) in the units of the moments."""
        J = self.moments(data)
        return np.sqrt(np.einsum("sk...,sk...->s...", J, J))


def _check(gain_matrix, noise_covariance, regularisation, depth_exponent, gain_floor):
    m, n3 = gain_matrix.shape
    if n3 % 3:
        raise ValueError("the gain matrix must have three columns per source")
    if noise_covariance.shape != (m, m):
        raise ValueError(f"noise covariance must be {m} x {m}, got {noise_covariance.shape}")
    if not (regularisation > 0 and depth_exponent >= 0 and 0 < gain_floor <= 1):
        raise ValueError("need regularisation > 0, depth_exponent >= 0 and "
                         "0 < gain_floor <= 1")


def _inverse_square_root(C: np.ndarray) -> np.ndarray:
    """Symmetric ``C^-1/2`` of a positive definite matrix (ValueError otherwise)."""
    evals, evecs = np.linalg.eigh((C + C.T) / 2)
    if evals.min() <= evals.max() * 1e-12:
        raise ValueError("the noise covariance must be positive definite")
    return (evecs / np.sqrt(evals)) @ evecs.T


def _prior_variance(whitened_gain: np.ndarray, depth_exponent: float,
                    gain_floor: float) -> np.ndarray:
    """Depth weights ``w_j`` (n_sources,), largest 1 (see the module docstring)."""
    m = whitened_gain.shape[0]
    g = (whitened_gain ** 2).reshape(m, -1, 3).sum(axis=(0, 2))
    if depth_exponent == 0:
        return np.ones_like(g)
    w = np.maximum(g, g.max() * gain_floor) ** (-depth_exponent)
    return w / w.max()


def minimum_norm_weights(gain_matrix, noise_covariance, *, regularisation: float = 0.1,
                         depth_exponent: float = 0.5,
                         gain_floor: float = 0.01) -> MinimumNormWeights:
    """Build regularised minimum-norm weights (see the module docstring).

    Parameters
    ----------
    gain_matrix : (m, 3 n) array
        Sensor readings of unit moments, three columns (x, y, z) per source.
    noise_covariance : (m, m) array
        Noise covariance of the data the weights will be applied to
        (symmetric positive definite).
    regularisation : float
        Share of the mean whitened signal power added to the diagonal
        (> 0; default 0.1).
    depth_exponent : float
        Exponent of the depth weighting (0 = none; default 0.5).
    gain_floor : float
        Whitened source gains below this share of the largest are raised to
        it before the depth weights are taken (0 < gain_floor <= 1).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> mn = minimum_norm_weights(rng.standard_normal((20, 30)), np.eye(20))
    >>> mn.matrix.shape, mn.n_sources
    ((30, 20), 10)
    """
    L = np.asarray(gain_matrix, float)
    C = np.asarray(noise_covariance, float)
    _check(L, C, regularisation, depth_exponent, gain_floor)
    m = L.shape[0]
    white = _inverse_square_root(C)
    Lw = white @ L
    w = _prior_variance(Lw, depth_exponent, gain_floor)
    r = np.repeat(w, 3)
    G = (Lw * r) @ Lw.T                                        # L_w R L_w^T
    ridge = float(regularisation * np.trace(G) / m)
    K = np.linalg.inv(G + ridge * np.eye(m))
    K = (K + K.T) / 2
    matrix = (r[:, None] * Lw.T) @ (K @ white)
    return MinimumNormWeights(matrix=matrix, regularisation=float(regularisation), ridge=ridge,
                              depth_exponent=float(depth_exponent), prior_variance=w)
