"""Surface geometry (groupsrc/sources/surface.py) and clusters on a mesh.

Outside references, named beside each check:
- geometry of the subdivided icosahedron: the 12 original vertices keep 5
  neighbours, every vertex added by subdivision has 6; V = 10 * 4^k + 2,
  E = 30 * 4^k, F = 20 * 4^k (geometry fact);
- Euler's formula V - E + F = 2 for a closed surface of genus 0;
- the normal of a sphere is radial (geometry fact);
- connected components: scipy.sparse.csgraph.connected_components on the
  mesh graph x time (reference library);
- a closed triangulated 2-manifold has every edge in exactly two triangles and
  every vertex in one fan of triangles (definition, common practice).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import sparse
from scipy.sparse.csgraph import connected_components

from groupsrc.sources import Hemisphere, SurfaceMesh
from groupsrc.sources.surface import (euler_characteristic, icosphere, mesh_defects, mesh_edges,
                                      vertex_normals)
from groupsrc.stats.corrections.clusters import label_clusters


@pytest.mark.parametrize("k", [0, 1, 2, 3])
def test_subdivided_icosahedron_degrees_and_counts(k):
    v, f = icosphere(k)
    space = SurfaceMesh((Hemisphere.from_arrays("left", v, f),))
    degree = np.asarray(space.adjacency().sum(axis=1)).ravel()
    # geometry: 12 vertices of degree 5, every other vertex of degree 6
    assert (degree == 5).sum() == 12 and (degree == 6).sum() == len(v) - 12
    # geometry: V = 10 * 4^k + 2, E = 30 * 4^k, F = 20 * 4^k
    assert (len(v), len(mesh_edges(f)), len(f)) == (10 * 4 ** k + 2, 30 * 4 ** k, 20 * 4 ** k)
    # Euler's formula for a closed genus-0 surface
    assert euler_characteristic(len(v), f) == 2
    assert np.allclose(np.linalg.norm(v, axis=1), 1.0)


def test_euler_per_closed_hemisphere():
    v, f = icosphere(2)
    left = Hemisphere.from_arrays("left", 30 * v - [35, 0, 0], f)
    right = Hemisphere.from_arrays("right", 30 * v + [35, 0, 0], f)
    for h in SurfaceMesh((left, right)).hemispheres:
        assert euler_characteristic(h.n_vertices, h.triangles) == 2   # Euler's formula
        assert mesh_defects(h.n_vertices, h.triangles, closed=True) == []


def test_sphere_normals_are_radial():
    v, f = icosphere(3)
    n = vertex_normals(20 * v, f)
    # geometry: a sphere's outward normal is its radius direction (to mesh accuracy)
    assert np.all((n * v).sum(axis=1) > 0.999)


def _tetra():
    return np.array([[0, 1, 2], [0, 2, 3], [0, 3, 1], [1, 3, 2]])


@pytest.mark.parametrize("case,n,triangles,closed,fragment", [
    ("hole", 4, _tetra()[:3], True, "belong to one triangle only"),
    ("hole allowed when open", 4, _tetra()[:3], False, None),
    ("bow tie", 7, np.r_[_tetra(), np.where(_tetra() > 0, _tetra() + 3, 0)], True,
     "join surface pieces"),
    ("three triangles on one edge", 5, np.r_[_tetra(), [[0, 1, 4]]], False,
     "shared by more than two triangles"),
    ("index out of range", 4, np.r_[_tetra()[:3], [[1, 3, 9]]], True, "outside 0..3"),
    ("vertex named twice", 4, np.r_[_tetra(), [[1, 1, 2]]], True, "name one vertex twice"),
    ("triangle listed twice", 4, np.r_[_tetra(), [[2, 0, 1]]], True, "listed more than once"),
    ("unused vertex", 5, _tetra(), True, "belong to no triangle"),
])
def test_mesh_defects(case, n, triangles, closed, fragment):
    """Planted defects against the definition of a closed 2-manifold (common practice)."""
    found = mesh_defects(n, triangles, closed=closed)
    if fragment is None:
        assert found == []
    else:
        assert any(fragment in d for d in found), found


def _space_time_reference(adjacency, supra):
    """Components of the graph (space neighbours at one sample) + (one source, next sample),
    built as a Kronecker sum and labelled by scipy.sparse.csgraph."""
    S, T = supra.shape
    A = sparse.csr_matrix(adjacency, dtype=np.int8)
    chain = sparse.diags([np.ones(T - 1), np.ones(T - 1)], [-1, 1], shape=(T, T), dtype=np.int8)
    G = sparse.kron(A, sparse.identity(T, dtype=np.int8)) + sparse.kron(
        sparse.identity(S, dtype=np.int8), chain)
    keep = np.flatnonzero(supra.ravel())
    sub = sparse.csr_matrix(G)[keep][:, keep]
    n, lab = connected_components(sub, directed=False)
    return n, keep, lab


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_mesh_clusters_equal_csgraph_components(seed):
    v, f = icosphere(2)
    rng = np.random.default_rng(seed)
    left = Hemisphere.from_arrays("left", 30 * v - [35, 0, 0], f, mask=rng.random(len(v)) > 0.1)
    right = Hemisphere.from_arrays("right", 30 * v + [35, 0, 0], f)
    space = SurfaceMesh((left, right))
    A = space.adjacency("edge")
    supra = rng.random((space.n_sources, 6)) < 0.35
    lab, n = label_clusters(supra, A)
    n_ref, keep, ref = _space_time_reference(A, supra)       # scipy.sparse.csgraph reference
    assert n == n_ref
    got = lab.ravel()[keep]
    assert np.all(got > 0) and np.all(lab.ravel()[~supra.ravel()] == 0)
    # the same partition: a one-to-one map between labels
    pairs = np.unique(np.column_stack([got, ref]), axis=0)
    assert len(pairs) == n == len(np.unique(pairs[:, 0])) == len(np.unique(pairs[:, 1]))


def test_hemispheres_are_never_joined_and_masks_break_paths():
    v, f = icosphere(1)
    # two touching copies: some left and right vertices coincide, still not neighbours
    left = Hemisphere.from_arrays("left", v, f)
    right = Hemisphere.from_arrays("right", v, f, mask=np.abs(v[:, 2]) > 0.5)
    space = SurfaceMesh((left, right))
    n, lab = connected_components(space.adjacency(), directed=False)
    hemi = space.labels().hemisphere.to_numpy()
    assert set(lab[hemi == "left"]).isdisjoint(lab[hemi == "right"])
    assert n == 3          # the left sphere; the right one cut by its masked belt into two caps


def test_values_round_trip_through_vertices():
    v, f = icosphere(1)
    space = SurfaceMesh((Hemisphere.from_arrays("left", v, f, mask=v[:, 0] > 0),
                         Hemisphere.from_arrays("right", v, f)))
    x = np.arange(space.n_sources * 2, dtype=float).reshape(-1, 2)
    per = {h: space.to_vertices(x, h, fill=np.nan) for h in space.names}
    assert np.isnan(per["left"][v[:, 0] <= 0]).all()
    np.testing.assert_array_equal(space.from_vertices(per), x)
    lab = space.labels()
    assert list(lab.columns) == ["hemisphere", "vertex"]
    np.testing.assert_allclose(space.coords_mm[lab.hemisphere == "left"],
                               v[lab.vertex[lab.hemisphere == "left"]])
