"""The demo's minimum-norm inverse (Hamalainen & Ilmoniemi 1994)."""

import numpy as np

from groupsrc.simulate.forward import helmet_sensors, lead_field
from groupsrc.simulate.inverse import minimum_norm
from groupsrc.simulate.scenario import template_grid


def test_operator_equals_textbook_formula_without_depth_weighting():
    # W = L^T (L L^T + lambda^2 C)^-1 (Hamalainen & Ilmoniemi 1994) when R = I.
    rng = np.random.default_rng(0)
    L = rng.standard_normal((15, 24))
    A = rng.standard_normal((15, 15))
    C = A @ A.T + 15 * np.eye(15)
    op = minimum_norm(L, C, snr=3.0, depth=0.0)
    W_ref = L.T @ np.linalg.inv(L @ L.T + op.lambda2 * C)
    np.testing.assert_allclose(op.W, W_ref, rtol=1e-8, atol=1e-12)


def test_single_generator_is_recovered_within_15_mm():
    # At high SNR the amplitude map of one tangential dipole peaks within
    # 15 mm (1.5 grid steps of 10 mm) of the true location.
    grid = template_grid(10.0, 72.0)
    pos, ori = helmet_sensors(128, 0.115)
    L = lead_field(grid.coords_mm * 1e-3, pos, ori)
    op = minimum_norm(L, (1e-14) ** 2 * np.eye(len(pos)), snr=10.0, depth=0.5)
    for true_mm, q in (([-54.0, -8.0, 22.0], [0.0, 1.0, 0.3]),
                       ([0.0, 50.0, 34.0], [1.0, 0.0, 0.0]),
                       ([30.0, -40.0, 40.0], [0.0, 0.0, 1.0])):
        true_mm = np.array(true_mm)
        q = np.array(q) / np.linalg.norm(q)
        # remove the silent radial part so the test asks only for what MEG can see
        rad = true_mm / np.linalg.norm(true_mm)
        q = q - (q @ rad) * rad
        b = lead_field(true_mm[None] * 1e-3, pos, ori) @ (2e-8 * q)
        amp = op.apply(b[:, None])[:, 0]
        peak = grid.coords_mm[amp.argmax()]
        assert np.linalg.norm(peak - true_mm) <= 15.0, (true_mm, peak)
