"""The source-space contract (groupsrc/sources/base.py): every source space passes it.

To add a source space, add a factory to SPACES: it returns the space and, where an
outside reference exists, the adjacency that reference gives for each neighbour
kind.  Facts checked: adjacency is a symmetric relation without self loops
(definition of an undirected neighbour graph, common practice); volume
neighbours are those of scipy.ndimage.generate_binary_structure (reference
library) and lie one voxel step apart (geometry); surface neighbours are the
vertex pairs that share a triangle side, read off the triangle list by a plain
loop, restricted to in-mask vertices and never across hemispheres (mesh-edge
definition), and their connected pieces are those of
scipy.sparse.csgraph.connected_components on that reference graph.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import ndimage, sparse
from scipy.sparse.csgraph import connected_components

from groupsrc.sources import Hemisphere, SourceSpace, SurfaceMesh, VolumeGrid
from groupsrc.sources.surface import icosphere


def _volume_reference(mask, kind):
    """Neighbour pairs of in-mask voxels by scipy.ndimage's structuring element."""
    order = {"face": 1, "edge": 2, "vertex": 3}[kind]
    struct = ndimage.generate_binary_structure(3, order)
    index = -np.ones(mask.shape, np.int64)
    index[mask] = np.arange(mask.sum())
    rows, cols = [], []
    for off in np.argwhere(struct) - 1:
        if not off.any():
            continue
        shifted = np.full(mask.shape, -1, np.int64)
        src = tuple(slice(max(0, -o), mask.shape[d] - max(0, o)) for d, o in enumerate(off))
        dst = tuple(slice(max(0, o), mask.shape[d] - max(0, -o)) for d, o in enumerate(off))
        shifted[src] = index[dst]
        ok = (index >= 0) & (shifted >= 0)
        rows.append(index[ok])
        cols.append(shifted[ok])
    n = int(mask.sum())
    r, c = np.concatenate(rows), np.concatenate(cols)
    return sparse.csr_matrix((np.ones(r.size, bool), (r, c)), shape=(n, n))


def volume_box():
    mask = np.ones((4, 3, 5), bool)
    affine = np.diag([2.0, 3.0, 4.0, 1.0])
    return VolumeGrid.from_mask(mask, affine), mask


def volume_irregular():
    rng = np.random.default_rng(0)
    mask = rng.random((6, 7, 5)) < 0.6
    affine = np.array([[-3.0, 0, 0, 90], [0, 3.0, 0, -126], [0, 0, 3.0, -72], [0, 0, 0, 1]])
    return VolumeGrid.from_mask(mask, affine), mask


def _mesh_edge_reference(space):
    """Neighbour pairs of sources: vertices sharing a triangle side (plain loop over
    the triangle list), both in the mask, same hemisphere."""
    labels = space.labels()
    index = {(h, int(v)): k for k, (h, v) in enumerate(zip(labels.hemisphere, labels.vertex))}
    pairs = set()
    for h in space.hemispheres:
        for a, b, c in h.triangles.tolist():
            for u, w in ((a, b), (b, c), (c, a)):
                if (h.name, u) in index and (h.name, w) in index:
                    pairs.add((index[(h.name, u)], index[(h.name, w)]))
                    pairs.add((index[(h.name, w)], index[(h.name, u)]))
    r, c = np.array(sorted(pairs)).T
    n = space.n_sources
    return sparse.csr_matrix((np.ones(r.size, bool), (r, c)), shape=(n, n))


def surface_two_hemispheres():
    """Two subdivided icosahedra 80 mm apart, a patch of the right one masked out."""
    v, f = icosphere(2)
    left = Hemisphere.from_arrays("left", 40 * v - [40, 0, 0], f)
    right = Hemisphere.from_arrays("right", 40 * v + [40, 0, 0], f, mask=v[:, 0] > -0.6)
    space = SurfaceMesh((left, right))
    return space, _mesh_edge_reference(space)


SPACES = {"volume box": volume_box, "volume irregular, flipped x": volume_irregular,
          "surface, two hemispheres, masked": surface_two_hemispheres}


@pytest.fixture(params=list(SPACES), ids=list(SPACES))
def space(request):
    return SPACES[request.param]()


def test_counts_and_coordinates(space):
    sp, _ = space
    assert isinstance(sp, SourceSpace)
    assert isinstance(sp.n_sources, int) and sp.n_sources > 0
    xyz = np.asarray(sp.coords_mm)
    assert xyz.shape == (sp.n_sources, 3) and np.all(np.isfinite(xyz))


@pytest.mark.parametrize("which", [0, 1, 2])
def test_adjacency_is_an_undirected_graph_without_self_loops(space, which):
    sp, _ = space
    kinds = sp.neighbor_kinds
    assert kinds, "a source space names at least one neighbour kind"
    if which >= len(kinds):
        pytest.skip("fewer neighbour kinds")
    A = sp.adjacency(kinds[which])
    assert sparse.issparse(A) and A.shape == (sp.n_sources, sp.n_sources)
    A = sparse.csr_matrix(A, dtype=bool)
    assert (A != A.T).nnz == 0
    assert not A.diagonal().any()
    assert (sparse.csr_matrix(sp.adjacency(kinds[which]), dtype=bool) != A).nnz == 0


def test_default_kind_is_the_first(space):
    sp, _ = space
    A, B = sp.adjacency(), sp.adjacency(sp.neighbor_kinds[0])
    assert (sparse.csr_matrix(A, dtype=bool) != sparse.csr_matrix(B, dtype=bool)).nnz == 0


def test_unknown_kind_is_refused(space):
    sp, _ = space
    with pytest.raises(ValueError, match="neighbors"):
        sp.adjacency("diagonal-ish")


def test_labels_locate_each_source_once(space):
    sp, _ = space
    lab = sp.labels()
    assert isinstance(lab, pd.DataFrame) and len(lab) == sp.n_sources
    assert not lab.isna().any().any()
    assert not lab.duplicated().any()


def test_description_is_json(space):
    sp, _ = space
    d = sp.describe()
    assert json.loads(json.dumps(d)) == d
    assert d["kind"] == sp.kind and d["n_sources"] == sp.n_sources


@pytest.mark.parametrize("kind", ["face", "edge", "vertex"])
def test_volume_neighbours_equal_the_ndimage_structure(space, kind):
    sp, mask = space
    if not isinstance(sp, VolumeGrid):
        pytest.skip("volume reference")
    ref = _volume_reference(mask, kind)                      # scipy.ndimage reference
    assert (sparse.csr_matrix(sp.adjacency(kind), dtype=bool) != ref).nnz == 0


def test_face_neighbours_are_one_voxel_apart(space):
    sp, _ = space
    if not isinstance(sp, VolumeGrid):
        pytest.skip("volume geometry")
    A = sparse.coo_matrix(sp.adjacency("face"))
    d = np.linalg.norm(sp.coords_mm[A.row] - sp.coords_mm[A.col], axis=1)
    # geometry: face neighbours differ by one step along one voxel axis
    assert np.all(np.isclose(d[:, None], sp.voxel_size[None, :]).any(axis=1))


def test_surface_neighbours_are_the_mesh_edges(space):
    sp, ref = space
    if not isinstance(sp, SurfaceMesh):
        pytest.skip("surface reference")
    A = sparse.csr_matrix(sp.adjacency("edge"), dtype=bool)
    assert (A != ref).nnz == 0                               # plain mesh-edge reference
    n_ref, lab_ref = connected_components(ref, directed=False)    # scipy.sparse.csgraph
    n, lab = connected_components(A, directed=False)
    assert n == n_ref and (pd.crosstab(lab, lab_ref).to_numpy() > 0).sum() == n
    hemi = sp.labels().hemisphere.to_numpy()
    rows, cols = A.nonzero()
    assert np.all(hemi[rows] == hemi[cols])                  # hemispheres never joined
