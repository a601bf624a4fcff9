"""The demo's forward model against known properties of its published formula."""

import numpy as np
import pytest

from groupsrc.simulate.forward import MU0, dipole_field, helmet_sensors, lead_field


@pytest.fixture(scope="module")
def sensors():
    return helmet_sensors(96, 0.11)


def test_radial_dipole_is_silent(sensors):
    # Sarvas (1987) Phys Med Biol 32:11-22: q parallel to r0 gives q x r0 = 0, so
    # a radial dipole in a spherically symmetric conductor has no external field.
    pos, _ = sensors
    rng = np.random.default_rng(0)
    r0 = rng.normal(size=(5, 3))
    r0 = 0.06 * r0 / np.linalg.norm(r0, axis=1, keepdims=True)
    B_rad = dipole_field(r0, 1e-8 * r0 / 0.06, pos)
    B_tan = dipole_field(r0, 1e-8 * np.cross(r0, [0, 0, 1.0]) / 0.06, pos)
    assert np.abs(B_rad).max() < 1e-12 * np.abs(B_tan).max()


def test_superposition(sensors):
    # Potentials and fields of simultaneous generators add (linear conductor,
    # common practice).
    pos, _ = sensors
    r0 = np.array([[0.03, -0.02, 0.05], [-0.04, 0.01, 0.02]])
    q = np.array([[1e-8, 2e-8, 0.0], [0.0, -1e-8, 3e-8]])
    both = dipole_field(r0, q, pos)
    each = dipole_field(r0[:1], q[:1], pos) + dipole_field(r0[1:], q[1:], pos)
    np.testing.assert_allclose(both, each, rtol=1e-12, atol=1e-30)
    # and the field is linear in the moment
    np.testing.assert_allclose(dipole_field(r0[:1], 3 * q[:1], pos),
                               3 * dipole_field(r0[:1], q[:1], pos), rtol=1e-12)


def test_radial_component_equals_primary_current_field():
    # Outside a spherically symmetric conductor the radial field component is
    # produced by the primary current alone (Sarvas 1987), so it equals the
    # radial component of the free-space dipole field mu0/(4 pi) q x (r - r0)/|r - r0|^3.
    r0 = np.array([[0.0, 0.0, 0.02]])
    q = np.array([[1e-8, 0.0, 0.0]])
    rng = np.random.default_rng(1)
    pts = rng.normal(size=(20, 3))
    pts = 0.12 * pts / np.linalg.norm(pts, axis=1, keepdims=True)
    B = dipole_field(r0, q, pts)
    a = pts - r0
    free = MU0 / (4 * np.pi) * np.cross(q, a) / np.linalg.norm(a, axis=1, keepdims=True) ** 3
    radial = pts / np.linalg.norm(pts, axis=1, keepdims=True)
    np.testing.assert_allclose((B * radial).sum(1), (free * radial).sum(1), rtol=1e-9)


def test_lead_field_columns_are_unit_moment_fields(sensors):
    pos, ori = sensors
    r0 = np.array([[0.01, 0.02, 0.05], [0.0, -0.03, 0.04]])
    L = lead_field(r0, pos, ori)
    assert L.shape == (pos.shape[0], 6)
    for j in range(2):
        for k in range(3):
            q = np.zeros((1, 3))
            q[0, k] = 1.0
            np.testing.assert_allclose(L[:, 3 * j + k],
                                       (dipole_field(r0[j:j + 1], q, pos) * ori).sum(1), rtol=1e-12)
