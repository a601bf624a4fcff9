"""The data and script of the report's interactive map browser (a small plain-JavaScript viewer
inside report.html; no network, no library).

For each contrast the statistic map at every analysed sample, quantized to signed
bytes (value = byte / 127 x the map's largest |value|), and the labels of its
reported clusters (corrected p <= alpha, or every cluster when the run has no
corrected p), so the browser shows what passed the corrected level in full colour
and fades the rest.  Geometry: a volume's grid shape, each source's voxel and the
affine (to show mm); a surface's meshes (vertices, triangles) and which vertex each
source is.  Arrays travel as base64 of little-endian typed arrays.

Very large maps are thinned in time (every k-th sample) so the page stays below
``MAX_BYTES`` of map data; the page says so.
"""

from __future__ import annotations

import base64

import numpy as np

from .layout import read_tsv, read_values, times_ms
from .surface_figures import outward_triangles

#: map bytes (statistic + labels, all contrasts) the page may carry
MAX_BYTES = 24_000_000


def _b64(a) -> str:
    a = np.ascontiguousarray(a)
    if a.dtype.byteorder == ">":
        a = a.byteswap().view(a.dtype.newbyteorder("<"))
    return base64.b64encode(a.tobytes()).decode("ascii")


def _geometry(space) -> dict | None:
    if space.kind == "volume":
        return {"kind": "volume", "shape": [int(s) for s in space.shape],
                "ijk": _b64(np.asarray(space.ijk, np.int16)),
                "affine": np.asarray(space.affine, float).round(6).tolist(),
                "n_sources": int(space.n_sources)}
    hemis = []
    for h in space.hemispheres:
        part = space.source_slice(h.name)
        hemis.append({"name": h.name, "vertices": _b64(np.asarray(h.vertices, np.float32)),
                      "triangles": _b64(outward_triangles(h.vertices, h.triangles)
                                        .astype(np.int32)),
                      "n_vertices": int(h.n_vertices),
                      "sources": _b64(np.asarray(h.sources, np.int32)),
                      "first": int(part.start), "count": int(part.stop - part.start)})
    return {"kind": "surface", "hemis": hemis, "n_sources": int(space.n_sources)}


def browser_data(results, maps, summary: dict, cs_list: list) -> dict | None:
    """JSON-ready data of the browser, or None when the folder has no contrast."""
    if not cs_list:
        return None
    space = maps.space
    geometry = _geometry(space)
    times = times_ms(summary["window"])
    n_s, n_t = int(space.n_sources), int(times.size)
    per_sample = 2 * n_s * len(cs_list)                # int8 statistic + int8 label id
    step = max(1, int(np.ceil(per_sample * n_t / MAX_BYTES)))
    keep = np.arange(0, n_t, step)
    contrasts = []
    for cs in cs_list:
        folder = results / cs["name"]
        stat = read_values(maps, folder, "statistic")[:, keep]
        labels = read_values(maps, folder, "clusters").astype(np.int64)[:, keep]
        top = float(np.nanmax(np.abs(stat))) if np.isfinite(stat).any() else 1.0
        top = top if top > 0 else 1.0
        q = np.round(np.nan_to_num(stat) / top * 127).astype(np.int8)
        reported = [int(k) for k in cs.get("reported_clusters", [])][:126]
        ids = np.zeros(labels.shape, np.int8)
        for n, k in enumerate(reported, start=1):
            ids[labels == k] = n
        table = read_tsv(folder / "clusters.tsv")
        rows = []
        for n, k in enumerate(reported, start=1):
            r = table.loc[table["cluster"] == k]
            if not len(r):
                continue
            r = r.iloc[0]
            member = labels == k
            t_idx = int(np.abs(times[keep] - float(r["t_peak_ms"])).argmin())
            pts = np.flatnonzero(member[:, t_idx])
            if pts.size == 0:
                pts = np.flatnonzero(member.any(axis=1))
            s = int(pts[np.argmax(np.abs(stat[pts, t_idx]))])
            rows.append({"cluster": k, "id": n, "sign": int(r["sign"]), "source": s,
                         "t": t_idx, "p": float(r["p_corrected"])
                         if np.isfinite(r["p_corrected"]) else None})
        contrasts.append({"name": cs["name"],
                          "kind": "z" if cs.get("scale") == "z" else cs["kind"],
                          "top": top, "stat": _b64(q.T), "ids": _b64(ids.T),
                          "clusters": rows})
    return {"geometry": geometry, "times": [float(t) for t in times[keep]],
            "thinned": step, "contrasts": contrasts, "n_sources": n_s}


def browser_script() -> str:
    """The browser's JavaScript (``templates/browser.js``), inlined into the page."""
    from importlib.resources import files
    return files("groupsrc.outputs").joinpath("templates", "browser.js").read_text("utf-8")
