"""MEG forward model: current dipoles in a spherically symmetric conductor.

The magnetic field outside a spherically symmetric conductor depends only on
the primary current and has the closed form of Sarvas (1987), Phys Med Biol
32:11-22 (his eq. 25).  For a current dipole of moment ``q`` at ``r0`` and a
field point ``r`` outside the conductor, with ``a = r - r0``, ``a = |a|``,
``r = |r|``:

    B(r) = mu0 / (4 pi F^2) * (F q x r0 - ((q x r0) . r) grad F)
    F      = a (r a + r^2 - r0 . r)
    grad F = (a^2 / r + a.r / a + 2 a + 2 r) r - (a + 2 r + a.r / a) r0

The formula needs neither the conductor's radius nor its conductivity
profile, only its centre, which is the origin here.  Consequences checked in
``tests/test_forward.py``: a radial dipole (``q`` parallel to ``r0``) and a
dipole at the centre are silent; fields of simultaneous dipoles add.

Units are SI throughout this module: positions in metres, moments in A m,
fields in tesla.  (Template-grid coordinates elsewhere in groupsrc are mm.)

A magnetometer measures the field component along its orientation ``n``.
Since ``n . (q x r0) = q . (r0 x n)`` and ``(q x r0) . r = q . (r0 x r)``,
the gain of one sensor for the three moment components of one dipole is the
vector

    mu0 / (4 pi F^2) * (F r0 x n - (grad F . n) r0 x r),

which :func:`lead_field` evaluates for all sensors and sources at once.
"""

from __future__ import annotations

import numpy as np

#: Vacuum permeability (T m / A), the classical value 4 pi 1e-7.
MU0 = 4e-7 * np.pi


def _geometry(r0, r):
    """F (m, n) and grad F (m, n, 3) for field points r (m, 3), dipoles r0 (n, 3)."""
    a_vec = r[:, None, :] - r0[None, :, :]                 # (m, n, 3)
    a = np.linalg.norm(a_vec, axis=2)                      # (m, n)
    rn = np.linalg.norm(r, axis=1)[:, None]                # (m, 1)
    a_dot_r = np.einsum("mnk,mk->mn", a_vec, r)
    r0_dot_r = r @ r0.T                                    # (m, n)
    F = a * (rn * a + rn ** 2 - r0_dot_r)
    c_r = a ** 2 / rn + a_dot_r / a + 2 * a + 2 * rn       # coefficient of r
    c_r0 = a + 2 * rn + a_dot_r / a                        # coefficient of r0
    gradF = c_r[..., None] * r[:, None, :] - c_r0[..., None] * r0[None, :, :]
    return F, gradF


def _check_outside(r0, r):
    if np.any(np.linalg.norm(r, axis=1) <= np.linalg.norm(r0, axis=1).max(initial=0.0)):
        raise ValueError("every field point must lie farther from the sphere centre "
                         "than every dipole (the formula holds outside the conductor)")


def dipole_fields(r0, q, points) -> np.ndarray:
    """Field vector of each dipole at each point, shape (n_points, n_dipoles, 3).

    Parameters
    ----------
    r0 : (n_dipoles, 3) array
        Dipole positions (m) inside the conductor (sphere centred at 0).
    q : (n_dipoles, 3) array
        Dipole moments (A m).
    points : (n_points, 3) array
        Field points (m) outside the conductor.

    Examples
    --------
    >>> b = dipole_fields([[0, 0, 0.07]], [[0, 0, 1e-8]], [[0, 0, 0.11]])
    >>> float(abs(b).max())   # a radial dipole is silent
    0.0
    """
    r0 = np.atleast_2d(np.asarray(r0, float))
    q = np.atleast_2d(np.asarray(q, float))
    r = np.atleast_2d(np.asarray(points, float))
    if r0.shape != q.shape or r0.shape[1] != 3 or r.shape[1] != 3:
        raise ValueError("r0 and q must both be (n, 3) and points (m, 3)")
    _check_outside(r0, r)
    F, gradF = _geometry(r0, r)
    qxr0 = np.cross(q, r0)                                 # (n, 3)
    qxr0_dot_r = r @ qxr0.T                                # (m, n)
    B = (F[..., None] * qxr0[None] - qxr0_dot_r[..., None] * gradF) / (F ** 2)[..., None]
    return MU0 / (4 * np.pi) * B


def dipole_field(r0, q, points) -> np.ndarray:
    """Summed field (n_points, 3) of all the dipoles (the conductor is linear)."""
    return dipole_fields(r0, q, points).sum(axis=1)


def lead_field(source_pos_m, sensor_pos, sensor_ori) -> np.ndarray:
    """Gain matrix of magnetometers for free-orientation dipoles.

    Parameters
    ----------
    source_pos_m : (n, 3) array
        Source positions (m).
    sensor_pos : (m, 3) array
        Sensor positions (m), outside the conductor.
    sensor_ori : (m, 3) array
        Sensor orientations (normalised here).

    Returns
    -------
    (m, 3 n) array
        Column ``3 j + k`` is the measured field (T) of a 1 A m dipole at source
        ``j`` pointing along axis ``k`` (x, y, z).  The radial direction of each
        source is in the null space of its three columns (a radial dipole is
        silent), so an inverse solution built on this matrix puts nothing there.
    """
    src = np.atleast_2d(np.asarray(source_pos_m, float))
    pos = np.atleast_2d(np.asarray(sensor_pos, float))
    ori = np.atleast_2d(np.asarray(sensor_ori, float))
    if pos.shape != ori.shape or src.shape[1] != 3 or pos.shape[1] != 3:
        raise ValueError("sources (n, 3); sensor positions and orientations both (m, 3)")
    _check_outside(src, pos)
    ori = ori / np.linalg.norm(ori, axis=1, keepdims=True)
    F, gradF = _geometry(src, pos)                         # (m, n), (m, n, 3)
    gradF_n = np.einsum("mnk,mk->mn", gradF, ori)
    r0_x_n = np.cross(src[None, :, :], ori[:, None, :])    # (m, n, 3)
    r0_x_r = np.cross(src[None, :, :], pos[:, None, :])    # (m, n, 3)
    G = (F[..., None] * r0_x_n - gradF_n[..., None] * r0_x_r) / (F ** 2)[..., None]
    return (MU0 / (4 * np.pi) * G).reshape(pos.shape[0], 3 * src.shape[0])


def tangential_basis(source_pos_m) -> np.ndarray:
    """Two orthonormal directions perpendicular to each source's radius, (n, 2, 3).

    MEG in a spherical conductor sees only these two components; projecting a
    moment on them discards exactly the silent part.  A source at the centre
    gets the x and y axes (every direction is silent there).
    """
    src = np.atleast_2d(np.asarray(source_pos_m, float))
    norm = np.linalg.norm(src, axis=1, keepdims=True)
    radial = np.where(norm > 0, src / np.where(norm > 0, norm, 1.0), [0.0, 0.0, 1.0])
    helper = np.where(np.abs(radial[:, 2:3]) < 0.9, [[0.0, 0.0, 1.0]], [[1.0, 0.0, 0.0]])
    e1 = np.cross(helper, radial)
    e1 /= np.linalg.norm(e1, axis=1, keepdims=True)
    e2 = np.cross(radial, e1)
    return np.stack([e1, e2], axis=1)


def helmet_sensors(n: int = 128, radius: float = 0.11, lowest_z: float = -0.02):
    """Radial magnetometers spread evenly over a helmet-like spherical cap.

    ``n`` points of a Fibonacci (golden-angle) lattice on the part of the
    sphere of ``radius`` (m) above ``z = lowest_z`` (m); z points to the
    vertex.  Returns positions (n, 3) and unit radial orientations (n, 3).

    Examples
    --------
    >>> pos, ori = helmet_sensors(100, 0.11)
    >>> pos.shape, bool(np.allclose(np.linalg.norm(pos, axis=1), 0.11))
    ((100, 3), True)
    """
    if n < 1 or radius <= 0 or not -radius < lowest_z < radius:
        raise ValueError("need n >= 1, radius > 0 and -radius < lowest_z < radius")
    k = np.arange(n) + 0.5
    z_lo = lowest_z / radius
    z = 1.0 - (1.0 - z_lo) * k / n            # equal-area steps in z over the cap
    rho = np.sqrt(1.0 - z ** 2)
    phi = np.pi * (3.0 - np.sqrt(5.0)) * np.arange(n)
    ori = np.column_stack([rho * np.cos(phi), rho * np.sin(phi), z])
    return radius * ori, ori
