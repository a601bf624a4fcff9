"""The surface demo: folded cortex, its physics, the build, and what the analysis finds.

Outside references, named beside each check:
- Sarvas (1987) Phys Med Biol 32:11-22: the field outside a spherically
  symmetric conductor depends on a dipole's moment only through q x r0, so a
  radial dipole gives no external field; hence a source normal to the cortex
  is seen only through its tangential part;
- Hamalainen & Ilmoniemi (1994) Med Biol Eng Comput 32:35-42: minimum-norm
  weights M = R L^T (L R L^T + lambda C)^-1, written out directly below for
  sources of fixed orientation;
- Euler's formula V - E + F = 2 for each closed hemisphere (geometry fact).
The demo's numbers are invented; nothing here uses them as reference values.
Thresholds on them (how tangential a wall is, overlaps) are this project's
acceptance rules, stated beside each.
"""

from __future__ import annotations

import hashlib
import json

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from groupsrc.cli import main
from groupsrc.simulate import model as volume_model
from groupsrc.simulate.surface_build import build_surface_demo_cohort, surface_demo_truth
from groupsrc.simulate.surface_model import (SurfaceDemoModel, normal_gain, normal_minimum_norm,
                                             surface_settings)
from groupsrc.sources.surface import euler_characteristic, mesh_defects

TRUTH = {"rare_minus_frequent": "condition_effect", "group_by_tone": "group_by_condition",
         "age_slope": "age_effect"}


@pytest.fixture(scope="module")
def small_model():
    return SurfaceDemoModel(surface_settings(), "small")


@pytest.fixture(scope="module")
def small_cohort(tmp_path_factory):
    return build_surface_demo_cohort(tmp_path_factory.mktemp("ssmall") / "cohort", size="small")


@pytest.fixture(scope="module")
def demo_results(tmp_path_factory):
    """The default-size surface demo, built and run through the command line."""
    root = tmp_path_factory.mktemp("sdemo")
    out = root / "results"
    assert main(["demo", "--surface", "--out", str(out), "--resamples", "200"]) == 0
    return root / "results_cohort", out


# ----------------------------------------------------------------------------
# geometry and physics
# ----------------------------------------------------------------------------

def test_hemispheres_are_closed_apart_and_masked(small_model):
    space = small_model.space
    for h in space.hemispheres:
        assert euler_characteristic(h.n_vertices, h.triangles) == 2     # Euler's formula
        assert mesh_defects(h.n_vertices, h.triangles, closed=True) == []
        assert 0 < h.sources.size < h.n_vertices                      # the medial wall is out
    left, right = space.hemispheres
    assert left.vertices[:, 0].max() < 0 < right.vertices[:, 0].min()  # never intersect


def test_a_radial_source_is_silent(small_model):
    """Sarvas (1987): only the tangential part of a moment makes an external field."""
    m = small_model
    pos, n = m.cortex.positions, m.cortex.normals
    radial = pos / np.linalg.norm(pos, axis=1, keepdims=True)
    tangential = n - (n * radial).sum(axis=1, keepdims=True) * radial
    g_normal = normal_gain(pos, n, m.sensor_pos, m.sensor_ori)
    g_tangential = normal_gain(pos, tangential, m.sensor_pos, m.sensor_ori)
    g_radial = normal_gain(pos, radial, m.sensor_pos, m.sensor_ori)
    scale = np.abs(g_normal).max()
    assert np.abs(g_radial).max() < 1e-9 * scale
    np.testing.assert_allclose(g_normal, g_tangential, atol=1e-9 * scale)


def test_gyral_crowns_are_seen_least(small_model):
    """A crown's normal is nearly radial: by Sarvas (1987) its gain is that of a moment of
    at most sqrt(1 - 0.98^2) = 0.2 of a wall's, and crowns lie at most about 10 mm nearer
    the 110 mm sensors than walls, a factor of about (42 / 37)^2 = 1.3 (fields of
    tangential dipoles fall roughly with the square of the distance; approximate, common
    practice): the median crown gain must stay below 0.3 of the median wall gain."""
    m = small_model
    gain = np.linalg.norm(m.gain, axis=0)
    rad = m.cortex.radiality
    crowns, walls = m.source & (rad > 0.98), m.source & (rad < 0.5)
    assert crowns.sum() > 50 and walls.sum() > 50
    assert np.median(gain[crowns]) < 0.3 * np.median(gain[walls])


def test_fixed_orientation_minimum_norm_is_the_closed_form():
    """M = R L^T (L R L^T + lambda C)^-1 (Hamalainen & Ilmoniemi 1994), with the depth
    prior and the regularisation share as groupsrc/simulate/inverse.py states them."""
    rng = np.random.default_rng(4)
    L = rng.standard_normal((12, 30)) * np.linspace(0.2, 2.0, 30)
    A = rng.standard_normal((12, 12))
    C = A @ A.T + 12 * np.eye(12)
    got = normal_minimum_norm(L, C, regularisation=0.2, depth_exponent=0.5, gain_floor=0.05)
    ev, evec = np.linalg.eigh(C)
    white = (evec / np.sqrt(ev)) @ evec.T
    g = ((white @ L) ** 2).sum(axis=0)
    w = np.maximum(g, 0.05 * g.max()) ** -0.5
    R = np.diag(w / w.max())
    G = white @ L @ R @ L.T @ white
    lam = 0.2 * np.trace(G) / 12
    M = R @ L.T @ np.linalg.inv(L @ R @ L.T + lam * C)
    np.testing.assert_allclose(got.matrix, M, rtol=1e-8, atol=1e-12 * np.abs(M).max())


# ----------------------------------------------------------------------------
# the build
# ----------------------------------------------------------------------------

def test_small_build_is_a_valid_cohort(small_cohort, capsys):
    root = small_cohort.parent
    maps = pd.read_csv(root / "maps.tsv", sep="\t", dtype=str)
    assert list(maps.columns) == ["participant_id", "condition", "session", "path_left",
                                  "path_right"]
    parts = pd.read_csv(root / "participants.tsv", sep="\t")
    # the same participants as the volume demo of this size (the same fictional study)
    pd.testing.assert_frame_equal(parts, volume_model.participants_table("small"),
                                  check_dtype=False)
    for h in ("left", "right"):
        mesh = nib.load(str(root / "template" / f"{h}.surf.gii"))
        v = mesh.agg_data("NIFTI_INTENT_POINTSET")
        f = mesh.agg_data("NIFTI_INTENT_TRIANGLE")
        assert euler_characteristic(len(v), f) == 2                    # Euler's formula
        data = nib.load(str(root / maps[f"path_{h}"][0]))
        assert len(data.darrays) == 36 and data.darrays[0].data.shape == (len(v),)
        atlas = nib.load(str(root / "template" / f"{h}.atlas.label.gii"))
        assert set(atlas.labeltable.get_labels_as_dict().values()) >= {"frontal", "parietal"}
    truth = surface_demo_truth(root)
    assert set(truth["masks"]) == set(TRUTH.values()) | {"no_effect"}
    assert main(["check", str(small_cohort)]) == 0, capsys.readouterr().err


def test_two_builds_are_byte_identical(small_cohort, tmp_path):
    again = build_surface_demo_cohort(tmp_path / "again", size="small")

    def digests(root):
        return {p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
                for p in sorted(root.rglob("*")) if p.is_file()}
    assert digests(again.parent) == digests(small_cohort.parent)


# ----------------------------------------------------------------------------
# what the default-size demo finds (acceptance)
# ----------------------------------------------------------------------------

def _labels(out, contrast):
    return {h: np.column_stack([d.data for d in nib.load(
        str(out / contrast / f"clusters.{h}.label.gii")).darrays]) for h in ("left", "right")}


def test_generators_sit_on_sulcal_walls(demo_results):
    cohort, _ = demo_results
    info = json.loads((cohort / "truth" / "truth.json").read_text())
    for effect in TRUTH.values():
        for name, g in info["effects"][effect]["generators"].items():
            # project rule: a wall is tilted at least 45 degrees from the radius
            assert g["radiality"] < 0.71, (name, g)
            assert g["gain_vs_median_source"] > 1.0, (name, g)


@pytest.mark.parametrize("contrast", sorted(TRUTH))
def test_surface_demo_finds_its_effects(demo_results, contrast):
    cohort, out = demo_results
    truth = surface_demo_truth(cohort)["masks"][TRUTH[contrast]]
    table = pd.read_csv(out / contrast / "clusters.tsv", sep="\t")
    sig = table.loc[table.p_corrected <= 0.05, "cluster"].to_numpy()
    assert sig.size, f"no significant cluster for {contrast}"
    labels = _labels(out, contrast)
    hit = any((np.isin(labels[h], sig).any(axis=1) & truth[h]).any() for h in labels)
    assert hit, f"no significant cluster of {contrast} overlaps its true region"


@pytest.mark.parametrize("contrast", sorted(TRUTH))
def test_surface_demo_finds_nothing_in_its_no_effect_region(demo_results, contrast):
    cohort, out = demo_results
    quiet = surface_demo_truth(cohort)["masks"]["no_effect"]
    table = pd.read_csv(out / contrast / "clusters.tsv", sep="\t")
    labels = _labels(out, contrast)
    for k in table.loc[table.p_corrected <= 0.05, "cluster"]:
        where = {h: (labels[h] == k).any(axis=1) for h in labels}
        inside = sum(int((where[h] & quiet[h]).sum()) for h in labels)
        size = sum(int(where[h].sum()) for h in labels)
        assert inside < size, f"cluster {k} of {contrast} lies in the no-effect region"


def test_surface_demo_report_shows_surface_views(demo_results):
    _, out = demo_results
    page = (out / "report.html").read_text(encoding="utf-8")
    for contrast in TRUTH:
        figs = list((out / contrast / "figures").glob("surface_cluster*.png"))
        assert figs, contrast
    assert page.count("lateral and medial views of each hemisphere") >= 3
