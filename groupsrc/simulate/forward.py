"""MEG forward model: a current dipole in a spherically symmetric conductor.

The magnetic field outside a spherically symmetric conductor depends on the
primary current only, and has the closed form of Sarvas (1987), Phys Med Biol
32:11-22, eq. (25):

    B(r) = mu0 / (4 pi F^2) * (F q x r0 - ((q x r0) . r) grad F)

with ``a = r - r0``, ``a = |a|``, ``r = |r|``,
``F = a (r a + r^2 - r0 . r)`` and
``grad F = (a^2 / r + a.r / a + 2 a + 2 r) r - (a + 2 r + a.r / a) r0``.

A consequence checked in the tests: a radial dipole (q parallel to r0)
produces no field outside the sphere.  Units are SI: positions in metres,
moments in A m, fields in T.  The sphere is centred at the origin.
"""

from __future__ import annotations

import numpy as np

MU0 = 4e-7 * np.pi  # vacuum permeability, T m / A


def dipole_field(r0, q, sensors):
    """Summed field (n_sensors, 3) of the dipoles; see :func:`dipole_fields`."""
    return dipole_fields(r0, q, sensors).sum(axis=1)


def dipole_fields(r0, q, sensors):
    """Field vector B (n_sensors, 3) of one or many dipoles at the sensors.

    Parameters
    ----------
    r0 : (n_dipoles, 3) dipole positions (m), inside the sphere
    q : (n_dipoles, 3) dipole moments (A m)
    sensors : (n_sensors, 3) field points (m), outside the sphere

    The fields of the dipoles are summed (the conductor is linear).

    Examples
    --------
    >>> b = dipole_field([[0, 0, 0.07]], [[0, 0, 1e-8]], [[0, 0, 0.11]])
    >>> float(abs(b).max()) < 1e-25   # a radial dipole is silent
    True
    """
    r0 = np.atleast_2d(np.asarray(r0, float))
    q = np.atleast_2d(np.asarray(q, float))
    r = np.atleast_2d(np.asarray(sensors, float))
    if r0.shape != q.shape or r0.shape[1] != 3 or r.shape[1] != 3:
        raise ValueError("r0 and q must both be (n, 3); sensors (m, 3)")
    rr = r[:, None, :]                         # (m, 1, 3)
    a_vec = rr - r0[None, :, :]                # (m, n, 3)
    a = np.linalg.norm(a_vec, axis=2)          # (m, n)
    rn = np.linalg.norm(r, axis=1)[:, None]    # (m, 1)
    a_dot_r = np.einsum("mnk,mk->mn", a_vec, r)
    r0_dot_r = np.einsum("nk,mk->mn", r0, r)
    F = a * (rn * a + rn ** 2 - r0_dot_r)
    c_r = a ** 2 / rn + a_dot_r / a + 2 * a + 2 * rn       # coefficient of r
    c_r0 = a + 2 * rn + a_dot_r / a                        # coefficient of r0
    gradF = c_r[..., None] * rr - c_r0[..., None] * r0[None, :, :]
    qxr0 = np.cross(q, r0)                                 # (n, 3)
    qxr0_dot_r = np.einsum("nk,mk->mn", qxr0, r)
    B = (F[..., None] * qxr0[None, :, :] - qxr0_dot_r[..., None] * gradF) / (F ** 2)[..., None]
    return MU0 / (4 * np.pi) * B                           # (m, n, 3) per dipole


def lead_field(source_pos, sensor_pos, sensor_ori):
    """Gain matrix (n_sensors, 3 n_sources): columns x, y, z moment of each source.

    Each sensor measures the field component along its orientation (a
    magnetometer); a unit moment (1 A m) gives the column.
    """
    src = np.atleast_2d(np.asarray(source_pos, float))
    pos = np.asarray(sensor_pos, float)
    ori = np.asarray(sensor_ori, float)
    ori = ori / np.linalg.norm(ori, axis=1, keepdims=True)
    n = src.shape[0]
    L = np.empty((pos.shape[0], n, 3))
    for k in range(3):
        q = np.zeros((n, 3))
        q[:, k] = 1.0
        L[:, :, k] = np.einsum("mnk,mk->mn", dipole_fields(src, q, pos), ori)
    return L.reshape(pos.shape[0], 3 * n)


def helmet_sensors(n=128, radius=0.11, min_z=-0.01):
    """Radial magnetometers spread evenly over the upper part of a sphere.

    Points of a Fibonacci lattice on the sphere, kept where z >= min_z.
    """
    pts = []
    k = 0
    total = int(n * 2.2)
    golden = np.pi * (3 - np.sqrt(5))
    while len(pts) < n and k < 10 * total:
        z = 1 - 2 * (k + 0.5) / total
        rad = np.sqrt(max(0.0, 1 - z * z))
        th = golden * k
        p = np.array([rad * np.cos(th), rad * np.sin(th), z]) * radius
        if p[2] >= min_z:
            pts.append(p)
        k += 1
    pos = np.array(pts)
    return pos, pos / np.linalg.norm(pos, axis=1, keepdims=True)
