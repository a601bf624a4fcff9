"""Surface figures: lateral and medial views of each hemisphere, drawn with matplotlib.

:func:`surface_figures` is the ``SPATIAL_FIGURES["surface"]`` entry of the
report: for each distinct peak time of the reported clusters (at most
``MAX_VIEWS``) the statistic at that time on the template meshes, with every
reported cluster present at that time outlined along mesh edges.

How a view is drawn (orthographic projection, no 3D toolkit):

* the camera looks along -x or +x with z up: a lateral view of the left
  hemisphere is seen from the left (anterior to the left of the image), its
  medial view from the right (anterior to the right), and mirrored for the
  right hemisphere; "A" and "P" mark anterior and posterior;
* triangles facing away from the viewer are dropped (the mesh is oriented
  outwards first, by the sign of its enclosed volume), the rest are painted
  far to near (painter's algorithm);
* each triangle's colour is the colour of the mean of its three vertices'
  values, shaded by a Lambert factor ``0.35 + 0.65 max(0, n . l)`` for a light
  from the viewer's side and above (common practice), so the folds stay
  visible whatever the statistic;
* cluster outlines are the edges between triangles whose three vertices are
  all in a reported cluster and triangles that are not, drawn as thin quads
  inside the same far-to-near painting, so a fold in front hides them.

Colours: the figures' one light-centred diverging map
(:func:`groupsrc.outputs.figures.stat_cmap`: ColorBrewer's RdBu reversed, near
white at zero), so the shading of the folds stays readable where the
statistic is small; F uses its white-to-red half; the colour bar marks the
cluster-forming threshold.  Each reported cluster seen in a view is numbered
with its sign ("3+") at its point nearest the viewer; a number that would
overlap another is left out.  Each figure has an inflated twin
(``surface_inflated_*``): the mesh smoothed along its edges so sulcal walls
and floors show, gyri light and sulci darker grey.
Points in no cluster at the time shown are faded toward light grey, so the
clusters stand out while the rest of the map stays visible; vertices that are
not sources (outside the mask, e.g. the medial wall) are mid grey.  The triangle layer is rasterised in the SVG (text stays vector),
so a 20,000-vertex mesh gives a file of moderate size.

Volume parts (CIFTI-2 voxels of subcortical structures or the cerebellum)
are not on any mesh, and a cluster there never touches the cortex (the
surfaces and volume parts are never joined).  The surface views therefore
show only clusters with points on the cortex; each reported cluster that
lies in the volume parts gets maximum-intensity projections of the volume
parts at its peak time instead (:func:`volume_part_figures`, drawn by
:func:`groupsrc.outputs.figures.projection_figure` on the box around the
parts' voxels), so no surface figure is drawn for a cluster it cannot show.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib
import numpy as np
from matplotlib.collections import PolyCollection
from matplotlib.colors import Normalize

from . import figures, volume_figures

MAX_VIEWS = 4
#: smoothing steps of the inflated view
INFLATE_STEPS = 60
#: greys of the inflated view's faded points: gyri (lighter) and sulci (darker)
GYRUS, SULCUS = np.array([0.88, 0.88, 0.88]), np.array([0.66, 0.66, 0.66])
NOT_SOURCE = np.array([0.55, 0.55, 0.55])
#: points in no cluster at the time shown are faded this far toward FADED
FADE, FADED = 0.7, np.array([0.86, 0.86, 0.86])
OUTLINE = "#000000"
AMBIENT, DIFFUSE = 0.35, 0.65
#: (title, camera direction from the object to the viewer) per hemisphere
VIEWS = {"left": (("lateral", (-1.0, 0.0, 0.0)), ("medial", (1.0, 0.0, 0.0))),
         "right": (("lateral", (1.0, 0.0, 0.0)), ("medial", (-1.0, 0.0, 0.0)))}
UP = np.array([0.0, 0.0, 1.0])


def surface_cmap(kind):
    """The figures' one statistic map (:func:`groupsrc.outputs.figures.stat_cmap`)."""
    return figures.stat_cmap(kind)


def inflate(vertices, triangles, iterations=INFLATE_STEPS, step=0.5):
    """(smoothed vertices, sulcal depth per vertex): Laplacian smoothing along mesh
    edges (each vertex moved ``step`` of the way to its neighbours' mean, repeated),
    rescaled to the mesh's original size, so folds open up and buried cortex shows.
    The depth is the original position's offset along the smoothed surface's outward
    normal (negative in sulci)."""
    from scipy import sparse
    v = np.asarray(vertices, float)
    t = outward_triangles(v, triangles)
    i = np.concatenate([t[:, 0], t[:, 1], t[:, 2]])
    j = np.concatenate([t[:, 1], t[:, 2], t[:, 0]])
    a = sparse.coo_matrix((np.ones(i.size), (i, j)), shape=(len(v), len(v))).tocsr()
    a = ((a + a.T) > 0).astype(float)
    deg = np.asarray(a.sum(axis=1)).ravel()
    walk = sparse.diags(1.0 / np.maximum(deg, 1)) @ a
    w = v.copy()
    for _ in range(iterations):
        w = (1 - step) * w + step * (walk @ w)
    centre, centre_w = v.mean(axis=0), w.mean(axis=0)
    scale = np.ptp(v, axis=0).max() / max(np.ptp(w, axis=0).max(), 1e-12)
    w = centre + (w - centre_w) * scale
    n = vertex_normals(w, t)
    depth = np.einsum("ij,ij->i", v - w, n)
    return w, depth


def vertex_normals(vertices, triangles):
    """Area-weighted outward normal per vertex (triangles already outward)."""
    v = np.asarray(vertices, float)
    fn = np.cross(v[triangles[:, 1]] - v[triangles[:, 0]], v[triangles[:, 2]] - v[triangles[:, 0]])
    n = np.zeros_like(v)
    for k in range(3):
        np.add.at(n, triangles[:, k], fn)
    return n / np.maximum(np.linalg.norm(n, axis=1, keepdims=True), 1e-12)


# ----------------------------------------------------------------------------
# geometry of a view
# ----------------------------------------------------------------------------

def outward_triangles(vertices, triangles):
    """Triangles ordered so their normals point out (by the enclosed volume's sign)."""
    v = np.asarray(vertices, float)
    t = np.asarray(triangles, np.int64)
    signed = np.einsum("ij,ij->i", v[t[:, 0]], np.cross(v[t[:, 1]], v[t[:, 2]])).sum()
    return t[:, ::-1] if signed < 0 else t


def boundary_edges(triangles, inside):
    """Mesh edges between triangles wholly inside a vertex set and triangles that are not.

    ``inside`` is a bool per vertex; returns (E, 2) vertex pairs along the
    outline of the set (an edge of the mesh's border counts when its one
    triangle is inside).
    """
    t = np.asarray(triangles, np.int64)
    full = inside[t].all(axis=1)
    if not full.any():
        return np.zeros((0, 2), np.int64)
    sides = np.concatenate([t[:, [0, 1]], t[:, [1, 2]], t[:, [2, 0]]])
    sides.sort(axis=1)
    flag = np.tile(full, 3)
    edges, inv = np.unique(sides, axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    n_in = np.bincount(inv, weights=flag, minlength=len(edges))
    n_all = np.bincount(inv, minlength=len(edges))
    return edges[(n_in >= 1) & (n_in < n_all) | ((n_all == 1) & (n_in == 1))]


def _camera(direction):
    d = np.asarray(direction, float)
    d /= np.linalg.norm(d)
    right = np.cross(UP, d)
    right /= np.linalg.norm(right)
    up = np.cross(d, right)
    return d, right, up


def view_polygons(vertices, triangles, face_rgb, direction, outline=None, outline_width=1.0):
    """(polygons (N, 4, 2), colours (N, 3)) of one view, painted far to near.

    ``face_rgb``: (F, 3) colour per triangle before shading; ``outline``:
    (E, 2) vertex pairs drawn as quads ``outline_width`` wide (data units).
    """
    v = np.asarray(vertices, float)
    d, right, up = _camera(direction)
    xy = np.column_stack([v @ right, v @ up])
    depth = v @ d
    n = np.cross(v[triangles[:, 1]] - v[triangles[:, 0]], v[triangles[:, 2]] - v[triangles[:, 0]])
    n /= np.maximum(np.linalg.norm(n, axis=1, keepdims=True), 1e-12)
    facing = n @ d
    keep = facing > 0
    light = d + 0.6 * up - 0.3 * right
    light /= np.linalg.norm(light)
    shade = AMBIENT + DIFFUSE * np.clip(n[keep] @ light, 0.0, 1.0)
    tri = triangles[keep]
    polys = [np.concatenate([xy[tri], xy[tri[:, :1]]], axis=1)]          # 4th point closes
    colours = [np.clip(face_rgb[keep] * shade[:, None], 0, 1)]
    depths = [depth[tri].mean(axis=1)]
    if outline is not None and len(outline):
        seen = np.zeros(len(v), bool)
        seen[tri.ravel()] = True
        outline = outline[seen[outline].all(axis=1)]     # edges of front-facing triangles only
    if outline is not None and len(outline):
        a, b = xy[outline[:, 0]], xy[outline[:, 1]]
        along = b - a
        perp = np.column_stack([-along[:, 1], along[:, 0]])
        perp *= (outline_width / 2) / np.maximum(np.linalg.norm(perp, axis=1, keepdims=True), 1e-12)
        polys.append(np.stack([a - perp, b - perp, b + perp, a + perp], axis=1))
        colours.append(np.tile(matplotlib.colors.to_rgb(OUTLINE), (len(outline), 1)))
        # just in front of the triangles along the edge, so a nearer fold still hides it
        depths.append(depth[outline].max(axis=1) + 1e-3 * np.ptp(depth))
    polys, colours, depths = (np.concatenate(x) for x in (polys, colours, depths))
    order = np.argsort(depths, kind="stable")
    return polys[order], colours[order]


# ----------------------------------------------------------------------------
# the figure
# ----------------------------------------------------------------------------

def vertex_colours(space, values, kind, vlim, strong=None, greys=None):
    """{hemisphere: (V, 3) rgb}: the colour map at sources, grey elsewhere.

    Sources not in ``strong`` (bool per source; default all) are faded toward
    light grey (FADE of the way), so the map's pattern stays visible but the
    points in clusters stand out; ``greys`` ({hemisphere: (V, 3)}) replaces that
    grey per vertex (the inflated view's gyri and sulci).
    """
    cmap, norm = surface_cmap(kind), Normalize(*vlim)
    strong = np.ones(space.n_sources, bool) if strong is None else np.asarray(strong, bool)
    out = {}
    for h in space.hemispheres:
        rgb = np.tile(NOT_SOURCE, (h.n_vertices, 1))
        part = space.source_slice(h.name)
        col = cmap(norm(np.nan_to_num(np.asarray(values, float)[part])))[:, :3]
        weak = ~strong[part]
        grey = FADED if greys is None else greys[h.name][h.sources][weak]
        col[weak] = (1 - FADE) * col[weak] + FADE * grey
        rgb[h.sources] = col
        out[h.name] = rgb
    return out


def _padded(box, pad=3.0):
    """A text box grown by ``pad`` pixels, so labels keep a gap at any resolution."""
    return matplotlib.transforms.Bbox([[box.x0 - pad, box.y0 - pad], [box.x1 + pad, box.y1 + pad]])


def _cluster_labels(ax, xy, depth, front, member_labels, signs):
    """Number each cluster seen in a view with its sign ("3+", "1-") at its point
    nearest the viewer around its centre; labels that would overlap are moved down
    or left out (their number is in the caption's table)."""
    fig = ax.figure
    r = fig.canvas.get_renderer()
    placed = [_padded(t.get_window_extent(r)) for t in ax.texts]
    for k in sorted(set(member_labels[front & (member_labels > 0)])):
        pts = np.flatnonzero(front & (member_labels == k))
        centre = xy[pts].mean(axis=0)
        near = pts[np.argsort(((xy[pts] - centre) ** 2).sum(axis=1))[:max(1, pts.size // 3)]]
        p = near[np.argmax(depth[near])]
        text = ax.text(xy[p, 0], xy[p, 1], f"{k}{'+' if signs.get(k, 1) > 0 else '-'}",
                       fontsize=6.5, weight="bold", ha="center", va="center", color="black",
                       bbox=dict(facecolor="white", edgecolor="black", lw=0.4, pad=0.6,
                                 alpha=0.85), zorder=5)
        text.set_in_layout(False)
        for dy in (0, -10, 10, -20, 20):
            text.set_position((xy[p, 0], xy[p, 1]))
            text.set_transform(ax.transData + matplotlib.transforms.ScaledTranslation(
                0, dy / 72, fig.dpi_scale_trans))
            b = _padded(text.get_window_extent(r))
            inside = ax.get_window_extent(r)
            if inside.contains(b.x0, b.y0) and inside.contains(b.x1, b.y1) and not any(
                    b.overlaps(o) for o in placed):
                placed.append(b)
                break
        else:
            text.remove()


def views_figure(space, values, inside, kind, title, base: Path, vlim=None, strong=None,
                 threshold=None, numbers=None, inflated=False) -> list:
    """Lateral and medial views of each hemisphere of per-source ``values``.

    ``inside``: bool per source, the points outlined (reported clusters);
    ``strong``: bool per source, the points shown in full colour (others
    faded; default all); ``numbers``: (labels per source, {cluster: sign}) to
    number the clusters seen; ``inflated``: draw the smoothed surface, with gyri
    light and sulci darker grey.  Returns the written paths (PNG and SVG).
    """
    vlim = vlim if vlim is not None else figures._stat_range(values, kind)
    hemis = space.hemispheres
    shapes, greys = {}, None
    for h in hemis:
        t = outward_triangles(h.vertices, h.triangles)
        if inflated:
            w, depth = inflate(h.vertices, h.triangles)
            shapes[h.name] = (w, t, depth)
        else:
            shapes[h.name] = (np.asarray(h.vertices, float), t, None)
    if inflated:
        greys = {}
        for h in hemis:
            d = shapes[h.name][2]
            s_ = np.clip(0.5 - d / (2 * max(np.percentile(np.abs(d), 95), 1e-9)), 0, 1)
            greys[h.name] = GYRUS[None] * (1 - s_[:, None]) + SULCUS[None] * s_[:, None]
    rgb = vertex_colours(space, values, kind, vlim, strong, greys)
    fig = figures.new_figure(64 * len(hemis) + 16)
    gs = fig.add_gridspec(len(hemis), 2)
    axes, pending = [], []
    extent = max(np.ptp(shapes[h.name][0][:, 1:], axis=0).max() for h in hemis)
    for i, h in enumerate(hemis):
        verts, t, _ = shapes[h.name]
        face = rgb[h.name][t].mean(axis=1)
        member = np.zeros(h.n_vertices, bool)
        member[h.sources] = np.asarray(inside, bool)[space.source_slice(h.name)]
        edges = boundary_edges(t, member)
        for j, (view, direction) in enumerate(VIEWS[h.name]):
            ax = fig.add_subplot(gs[i, j])
            axes.append(ax)
            polys, colours = view_polygons(verts, t, face, direction, edges,
                                           outline_width=0.012 * extent)
            coll = PolyCollection(polys, facecolors=colours, edgecolors=colours,
                                  linewidths=0.25, rasterized=True)
            coll.set_in_layout(False)
            ax.add_collection(coll)
            lo, hi = polys.reshape(-1, 2).min(axis=0), polys.reshape(-1, 2).max(axis=0)
            pad = 0.03 * extent
            ax.set_xlim(lo[0] - pad, hi[0] + pad)
            ax.set_ylim(lo[1] - pad, hi[1] + pad)
            ax.set_aspect("equal")
            ax.set_axis_off()
            d, right, _ = _camera(direction)
            front_right = right[1] > 0           # +y (anterior) to the right of the image
            ax.set_title(f"{h.name} hemisphere, {view}"
                         + (" (inflated)" if inflated else "")
                         + f"\n{'P' if front_right else 'A'} <-  -> "
                           f"{'A' if front_right else 'P'}", fontsize=7.5)
            if numbers is not None:
                lab = np.zeros(h.n_vertices, np.int64)
                lab[h.sources] = np.asarray(numbers[0])[space.source_slice(h.name)]
                _, right_, up_ = _camera(direction)
                xy = np.column_stack([verts @ right_, verts @ up_])
                dvec = np.asarray(direction, float) / np.linalg.norm(direction)
                front = (vertex_normals(verts, t) @ dvec) > 0.2
                pending.append((ax, xy, verts @ dvec, front, lab))
    sm = matplotlib.cm.ScalarMappable(norm=Normalize(*vlim), cmap=surface_cmap(kind))
    figures.stat_colorbar(fig, sm, kind, threshold, ax=axes, shrink=0.8, aspect=30, pad=0.02)
    fig.suptitle(title, fontsize=8.5)
    fig.canvas.draw()                   # the final layout, so labels can be measured
    for ax, xy, depth, front, lab in pending:
        _cluster_labels(ax, xy, depth, front, lab, numbers[1])
    return figures.save(fig, base)


def _sample_index(times, value_ms):
    return int(np.abs(np.asarray(times, float) - float(value_ms)).argmin())


def _views(clusters, reported, times):
    """[(sample, [clusters peaking there])] for the first MAX_VIEWS distinct peak samples."""
    out = {}
    for k in reported:
        r = clusters.loc[clusters["cluster"] == k].iloc[0]
        out.setdefault(_sample_index(times, r["t_peak_ms"]), []).append(k)
    return list(out.items())[:MAX_VIEWS]


def _title(name, kind, time_ms, ks, clusters):
    if not ks:
        return f"{name}: {kind} at its largest |{kind}|, {time_ms:g} ms (no cluster reported)"
    which = (f"cluster {ks[0]}" if len(ks) == 1 else
             "clusters " + ", ".join(str(k) for k in ks[:-1]) + f" and {ks[-1]}"
             if len(ks) <= 4 else
             "clusters " + ", ".join(str(k) for k in ks[:3]) + f" and {len(ks) - 3} more")
    return f"{name}: {kind} at {time_ms:g} ms, the peak time of {which}"


def surface_figures(space, stat, labels, clusters, reported, times, name, kind, figdir,
                    threshold=None) -> list:
    """The report's spatial figures of a surface: [(caption, png path)].

    One figure per distinct peak time of the reported clusters (at most
    MAX_VIEWS), so clusters peaking at the same sample share one figure.
    """
    vlim = figures._stat_range(stat, kind)
    n_surf = space.n_surface_sources
    cortex = [k for k in reported if (labels[:n_surf] == k).any()]
    views = _views(clusters, cortex, times)
    if not reported:
        s, t = np.unravel_index(np.nanargmax(np.abs(stat[:n_surf])), stat[:n_surf].shape)
        views = [(int(t), [])]
    out = []
    for t_idx, ks in views:
        base = figdir / (f"surface_cluster{ks[0]:02d}" if ks else "surface_peak")
        inside = np.isin(labels[:, t_idx], reported) if reported else np.zeros(len(stat), bool)
        title = _title(name, kind, times[t_idx], ks, clusters)
        if not ks and space.voxels is not None:
            title = title.replace(" at its largest", " on the cortex at its largest")
        signs = ({int(k): int(v) for k, v in zip(clusters["cluster"], clusters["sign"])}
                 if "sign" in clusters.columns else {})
        shown = np.where(np.isin(labels[:, t_idx], reported), labels[:, t_idx], 0)
        for inflated in (False, True):
            b = base.with_name(base.name.replace("surface_", "surface_inflated_")) \
                if inflated else base
            views_figure(space, stat[:, t_idx], inside, kind, title, b, vlim=vlim,
                         strong=labels[:, t_idx] > 0, threshold=threshold,
                         numbers=(shown, signs), inflated=inflated)
            out.append((("The same on the inflated surface (smoothed so that the walls and "
                         "floors of sulci show; light grey: gyri, darker grey: sulci)."
                         if inflated else
                         f"The {kind} map at {times[t_idx]:g} ms on the template surface: "
                         "lateral and medial views of each hemisphere (A: anterior, P: "
                         "posterior), shaded to show the folds; full colour: points in a "
                         "cluster at that time, faded: the rest; dark grey: not a source "
                         "(outside the mask); black outlines: reported clusters at that time, "
                         "along mesh edges, numbered with their sign (3+: cluster 3, "
                         "positive)"
                         + ("; the volume parts are shown in their own figures." if
                            space.voxels is not None else ".")), b.with_suffix(".png")))
    if space.voxels is not None:
        out += volume_part_figures(space, stat, labels, clusters,
                                   [k for k in reported if k not in cortex], reported, times,
                                   name, kind, figdir, vlim, surface_views=bool(views),
                                   threshold=threshold)
    return out


def _part_box(voxels, values, margin=1):
    """Per-voxel values -> (volume cropped to the parts' bounding box, its affine)."""
    lo = np.maximum(voxels.ijk.min(axis=0) - margin, 0)
    hi = np.minimum(voxels.ijk.max(axis=0) + margin + 1, voxels.shape)
    box = tuple(slice(a, b) for a, b in zip(lo, hi))
    shift = np.eye(4)
    shift[:3, 3] = lo
    return voxels.to_volume(values, fill=0)[box], voxels.affine @ shift


def volume_part_figures(space, stat, labels, clusters, in_parts, reported, times, name, kind,
                        figdir, vlim, surface_views=True, threshold=None) -> list:
    """Projections of the volume parts: one per distinct peak time of the reported
    clusters ``in_parts`` (at most MAX_VIEWS); with no reported cluster at all, one at
    the parts' largest |statistic|.  [(caption, png path)]."""
    vox, part = space.voxels, space.voxel_slice
    views = _views(clusters, in_parts, times)
    if not reported:
        _, t = np.unravel_index(np.nanargmax(np.abs(stat[part])), stat[part].shape)
        views = [(int(t), [])]
    out = []
    for t_idx, ks in views:
        base = figdir / (f"volume_parts_cluster{ks[0]:02d}" if ks else "volume_parts_peak")
        values, affine = _part_box(vox, stat[part, t_idx].astype(float))
        mask, _ = _part_box(vox, np.ones(vox.n_voxels, bool))
        inside, _ = _part_box(vox, np.isin(labels[part, t_idx], reported))
        where = sorted({vox.names[vox.structure_index[i]] for k in ks
                        for i in np.flatnonzero(labels[part, t_idx] == k)})
        title = (_title(name, kind, times[t_idx], ks, clusters).replace(
            f" at {times[t_idx]:g} ms", f" in the volume parts at {times[t_idx]:g} ms", 1)
            + f",\nin {', '.join(where)}" if ks else
            f"{name}: {kind} in the volume parts at their largest |{kind}|, "
            f"{times[t_idx]:g} ms (no cluster reported)")
        volume_figures.projection_figure(values, mask.astype(bool), inside.astype(bool),
                                         affine, kind, title, base, vlim=vlim,
                                         threshold=threshold)
        out.append((f"Maximum-intensity projections of the {kind} map over the CIFTI-2 volume "
                    f"parts ({', '.join(vox.names)}) at {times[t_idx]:g} ms, on the box around "
                    "their voxels (grey outline: the volume parts' voxels; black: reported "
                    "clusters at that time). " + (
                        "The cortex is shown in the surface views." if surface_views else
                        "No reported cluster lies on the cortex, so no surface view is drawn."),
                    base.with_suffix(".png")))
    return out
