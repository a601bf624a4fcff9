"""Surface views (groupsrc/outputs/surface_figures.py): geometry of a view, outlines, grouping.

Checked against definitions, each stated beside its check: the outline of a
vertex set is the set of mesh edges between a triangle wholly inside and one
that is not (computed here by a plain loop over triangles); an orthographic
view from -x with z up shows +y (anterior) to the left (geometry of a
right-handed frame, common practice for a left lateral view); a closed
convex surface seen from one side shows only triangles whose outward normal
points to the viewer (back-face culling, common practice).
"""

from __future__ import annotations

from collections import Counter

import numpy as np
import pandas as pd

from groupsrc.outputs.surface_figures import (boundary_edges, outward_triangles, surface_figures,
                                              view_polygons)
from groupsrc.sources import Hemisphere, SurfaceMesh
from groupsrc.sources.surface import icosphere


def test_outline_is_between_inside_and_outside_triangles():
    v, f = icosphere(2)
    inside = v[:, 2] > 0.3
    got = {tuple(e) for e in boundary_edges(f, inside).tolist()}
    uses = Counter()
    for tri in f.tolist():                               # plain loop: the definition
        full = all(inside[t] for t in tri)
        for a, b in ((tri[0], tri[1]), (tri[1], tri[2]), (tri[2], tri[0])):
            uses[(min(a, b), max(a, b))] += 1 if full else 1000
    ref = {e for e, n in uses.items() if n == 1001}      # one full triangle, one not
    assert got == ref and len(ref) > 10


def test_left_lateral_view_puts_anterior_left_and_culls_the_back():
    v, f = icosphere(2)
    v = 50 * v + [0.0, 20.0, 0.0]                       # off-centre: +y and -y differ
    f = outward_triangles(v, f[:, ::-1])                 # reordered inward, put back outward
    colours = np.ones((len(f), 3))
    polys, _ = view_polygons(v, f, colours, (-1.0, 0.0, 0.0))   # seen from the left
    x = polys[:, :3, 0].mean(axis=1)
    # which triangles were drawn: match by screen centre to the triangles facing -x
    front = f[(np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]])[:, 0]) < 0]
    assert len(polys) == len(front)                      # back faces culled
    ys = v[front].mean(axis=1)[:, 1]
    # seen from -x with z up, screen x = -y: anterior (+y) on the left of the image
    np.testing.assert_allclose(np.sort(x), np.sort(-ys), atol=1e-9)
    # and mirrored from +x (the left medial view)
    polys, _ = view_polygons(v, f, colours, (1.0, 0.0, 0.0))
    back = f[(np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]])[:, 0]) > 0]
    np.testing.assert_allclose(np.sort(polys[:, :3, 0].mean(axis=1)),
                               np.sort(v[back].mean(axis=1)[:, 1]), atol=1e-9)


def test_clusters_peaking_together_share_one_figure(tmp_path):
    v, f = icosphere(2)
    space = SurfaceMesh((Hemisphere.from_arrays("left", 40 * v - [45, 0, 0], f),
                         Hemisphere.from_arrays("right", 40 * v + [45, 0, 0], f)))
    n, T = space.n_sources, 4
    stat = np.zeros((n, T))
    labels = np.zeros((n, T), np.int64)
    labels[:10, 1], stat[:10, 1] = 1, 5.0
    labels[200:210, 1], stat[200:210, 1] = 2, -4.0
    labels[50:60, 3], stat[50:60, 3] = 3, 3.0
    times = np.array([0.0, 10.0, 20.0, 30.0])
    clusters = pd.DataFrame({"cluster": [1, 2, 3], "t_peak_ms": [10.0, 10.0, 30.0],
                             "p_corrected": [0.01, 0.02, 0.04], "sign": [1, -1, 1]})
    out = surface_figures(space, stat, labels, clusters, [1, 2, 3], times, "c", "t", tmp_path)
    # each view time once, folded and inflated
    assert [p.name for _, p in out] == ["surface_cluster01.png", "surface_inflated_cluster01.png",
                                        "surface_cluster03.png", "surface_inflated_cluster03.png"]
    assert all(p.exists() and p.with_suffix(".svg").exists() for _, p in out)
    none = surface_figures(space, stat, np.zeros_like(labels), clusters.iloc[:0], [], times,
                           "c", "t", tmp_path)
    assert [p.name for _, p in none] == ["surface_peak.png", "surface_inflated_peak.png"]
