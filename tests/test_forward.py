"""The demo's MEG forward model against properties of its published closed formula.

Reference: Sarvas J (1987) Basic mathematical and electromagnetic concepts of the
biomagnetic inverse problem. Phys Med Biol 32:11-22 (eqs. 24-25 for the field of a
current dipole outside a spherically symmetric conductor).
"""

import numpy as np
import pytest

from groupsrc.simulate.forward import (MU0, dipole_field, dipole_fields, helmet_sensors,
                                       lead_field, tangential_basis)


@pytest.fixture(scope="module")
def sensors():
    return helmet_sensors(128, 0.11, -0.02)


def _random_inside(rng, n, lo=0.02, hi=0.065):
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    return d * rng.uniform(lo, hi, (n, 1))


def test_radial_dipole_is_silent(sensors):
    # Sarvas (1987): the field outside depends on q only through q x r0, so a
    # radial dipole (q parallel to r0) produces no external field.
    pos, ori = sensors
    rng = np.random.default_rng(0)
    r0 = _random_inside(rng, 6)
    radial = r0 / np.linalg.norm(r0, axis=1, keepdims=True)
    tangential = np.cross(radial, rng.normal(size=(6, 3)))
    B_rad = dipole_fields(r0, 1e-8 * radial, pos)
    B_tan = dipole_fields(r0, 1e-8 * tangential / np.linalg.norm(tangential, axis=1,
                                                                  keepdims=True), pos)
    assert np.abs(B_rad).max() < 1e-12 * np.abs(B_tan).max()
    # the same seen through the lead field: the radial direction is in the null
    # space of each source's three columns
    L = lead_field(r0, pos, ori).reshape(len(pos), 6, 3)
    assert np.abs(np.einsum("msk,sk->ms", L, radial)).max() < 1e-12 * np.abs(L).max()


def test_dipole_at_the_centre_is_silent(sensors):
    # Sarvas (1987): q x r0 = 0 for r0 = 0, whatever the orientation.
    pos, _ = sensors
    B = dipole_field(np.zeros((3, 3)), 1e-8 * np.eye(3), pos)
    assert np.abs(B).max() == 0.0


def test_superposition_and_linearity(sensors):
    # Fields of simultaneous generators add, and scale with the moment
    # (a linear conductor; common practice).
    pos, ori = sensors
    r0 = np.array([[0.03, -0.02, 0.05], [-0.04, 0.01, 0.02]])
    q = np.array([[1e-8, 2e-8, 0.0], [0.0, -1e-8, 3e-8]])
    both = dipole_field(r0, q, pos)
    each = dipole_field(r0[:1], q[:1], pos) + dipole_field(r0[1:], q[1:], pos)
    np.testing.assert_allclose(both, each, rtol=1e-12, atol=1e-30)
    np.testing.assert_allclose(dipole_field(r0[:1], -2.5 * q[:1], pos),
                               -2.5 * dipole_field(r0[:1], q[:1], pos), rtol=1e-12)
    L = lead_field(r0, pos, ori)
    np.testing.assert_allclose(L @ q.reshape(-1), (both * ori).sum(1), rtol=1e-10, atol=1e-30)


def test_field_is_minus_mu0_gradient_of_the_scalar_potential():
    # Sarvas (1987) eq. 24-25: B = -mu0 grad U with U = -(q x r0) . r / (4 pi F);
    # the closed-form grad F is checked against central differences of U.
    rng = np.random.default_rng(2)
    r0 = _random_inside(rng, 1)
    q = 1e-8 * rng.normal(size=(1, 3))
    pts = _random_inside(rng, 8, 0.09, 0.14)

    def U(r):
        a_vec = r - r0[0]
        a, rn = np.linalg.norm(a_vec), np.linalg.norm(r)
        F = a * (rn * a + rn ** 2 - r0[0] @ r)
        return -np.cross(q[0], r0[0]) @ r / (4 * np.pi * F)

    h = 1e-6
    for r in pts:
        grad = np.array([(U(r + h * e) - U(r - h * e)) / (2 * h) for e in np.eye(3)])
        np.testing.assert_allclose(dipole_field(r0, q, r[None])[0], -MU0 * grad,
                                   rtol=1e-6, atol=1e-6 * np.abs(grad).max() * MU0)


def test_radial_component_is_that_of_the_primary_current():
    # Outside a spherically symmetric conductor the radial component of B comes
    # from the primary current alone (Sarvas 1987), i.e. equals the radial part of
    # the free-space dipole field mu0/(4 pi) q x (r - r0) / |r - r0|^3.
    rng = np.random.default_rng(1)
    r0 = np.array([[0.01, -0.02, 0.04]])
    q = np.array([[1e-8, 0.5e-8, -0.3e-8]])
    pts = _random_inside(rng, 20, 0.1, 0.13)
    a = pts - r0
    free = MU0 / (4 * np.pi) * np.cross(q, a) / np.linalg.norm(a, axis=1, keepdims=True) ** 3
    radial = pts / np.linalg.norm(pts, axis=1, keepdims=True)
    B = dipole_field(r0, q, pts)
    np.testing.assert_allclose((B * radial).sum(1), (free * radial).sum(1), rtol=1e-9)


def test_far_field_is_a_magnetic_dipole():
    # Far away, any bounded current distribution looks like a magnetic dipole of
    # moment m = 1/2 int r x J dV (Jackson, Classical Electrodynamics, 3rd ed.,
    # eq. 5.54 and 5.56).  For a current dipole in a spherically symmetric
    # conductor the volume currents add nothing to m (r x grad V integrates to a
    # surface term n x r V, zero on spheres), so m = 1/2 r0 x q.
    r0 = np.array([[0.02, -0.01, 0.05]])
    q = np.array([[1e-8, 2e-8, 0.5e-8]])
    m = 0.5 * np.cross(r0[0], q[0])
    rng = np.random.default_rng(3)
    d = rng.normal(size=(10, 3))
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    pts = 200.0 * d
    want = MU0 / (4 * np.pi) * (3 * d * (d @ m)[:, None] - m) / 200.0 ** 3
    got = dipole_field(r0, q, pts)
    np.testing.assert_allclose(got, want, rtol=2e-3, atol=2e-3 * np.abs(want).max())


def test_lead_field_columns_are_unit_moment_fields(sensors):
    # a lead-field column is the sensor reading (field projected on the sensor
    # normal) of a unit dipole along one axis (definition; common practice)
    pos, ori = sensors
    r0 = np.array([[0.01, 0.02, 0.05], [0.0, -0.03, 0.04]])
    L = lead_field(r0, pos, ori)
    assert L.shape == (pos.shape[0], 6)
    for j in range(2):
        for k in range(3):
            q = np.zeros((1, 3))
            q[0, k] = 1.0
            np.testing.assert_allclose(L[:, 3 * j + k],
                                       (dipole_field(r0[j:j + 1], q, pos) * ori).sum(1),
                                       rtol=1e-10, atol=1e-30)


def test_points_inside_the_conductor_are_refused(sensors):
    # Sarvas (1987)'s formula holds outside the conductor only
    pos, ori = sensors
    with pytest.raises(ValueError, match="outside"):
        lead_field([[0.0, 0.0, 0.12]], pos, ori)


def test_helmet_is_an_even_radial_cap():
    # the demo's own sensor layout as documented in groupsrc.simulate.forward
    # (radius, lowest height, radial magnetometers); no outside value
    pos, ori = helmet_sensors(128, 0.11, -0.02)
    assert pos.shape == (128, 3)
    np.testing.assert_allclose(np.linalg.norm(pos, axis=1), 0.11)
    np.testing.assert_allclose(ori, pos / 0.11)
    assert pos[:, 2].min() >= -0.02 and pos[:, 2].max() > 0.105
    d = np.linalg.norm(pos[:, None] - pos[None], axis=2) + np.eye(128)
    nearest = d.min(axis=1)
    assert nearest.min() > 0.5 * nearest.mean()   # no clumps


def test_tangential_basis_is_orthonormal_and_tangential():
    # orthonormal and perpendicular to the radius (geometry fact); the
    # tangential plane is where a sphere's external field lives (Sarvas 1987)
    rng = np.random.default_rng(4)
    r0 = np.vstack([_random_inside(rng, 10), [[0.0, 0.0, 0.05]], [[0.0, 0.0, 0.0]]])
    E = tangential_basis(r0)
    np.testing.assert_allclose(np.einsum("nik,njk->nij", E, E), np.broadcast_to(np.eye(2), (12, 2, 2)),
                               atol=1e-12)
    assert np.abs(np.einsum("nik,nk->ni", E[:-1], r0[:-1])).max() < 1e-15
