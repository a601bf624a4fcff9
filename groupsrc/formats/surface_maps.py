"""Result maps of a surface source space: GIfTI per hemisphere, or CIFTI-2.

:class:`SurfaceMaps` is the ``RESULT_MAPS["surface"]`` entry: the writer
asks for maps by role (statistic, estimate, p values, labels) and the report
reads them back per source, exactly as for :class:`~groupsrc.formats.nifti.VolumeMaps`.

Which format: the one the maps came in.  The loader records it on the
source space (:attr:`groupsrc.sources.SurfaceMesh.maps_format`, "gifti" or
"cifti"), the space travels with the result to the writer, and this class
writes accordingly; the choice is written into the source-mask files'
metadata (``maps_format``) so that a saved folder is read back the same way.

Files (``<stem>`` is the map's role, e.g. ``statistic``):

=====================  =================================  ==========================
map                    GIfTI inputs                        CIFTI-2 inputs
=====================  =================================  ==========================
maps over time         ``<stem>.left.func.gii``,           ``<stem>.dtseries.nii``
                       ``<stem>.right.func.gii``
cluster labels         ``clusters.<hemi>.label.gii``       ``clusters.dlabel.nii``
cluster summary        ``cluster_summary.<hemi>.func.gii`` ``cluster_summary.dscalar.nii``
source space (both)    ``source_space.<hemi>.surf.gii`` (the template mesh) and
                       ``source_mask.<hemi>.shape.gii`` (1 = source)
volume parts                                               ``source_structures.dlabel.nii``
=====================  =================================  ==========================

CIFTI-2 maps with volume parts (subcortical structures, cerebellum voxels)
carry them on every result map's brain-model axis; ``source_structures.dlabel.nii``
labels every source with its structure, and is how ``groupsrc report`` reads
the volume parts back (:meth:`SurfaceMaps.read_space`).

Conventions of each file type (intents, metadata, the time axis) are in
:mod:`.gifti` and :mod:`.cifti`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..sources.surface import Hemisphere, SurfaceMesh
from ..sources.timeaxis import TimeAxis
from . import cifti, gifti
from .nifti import cluster_summary_values

#: stems written as label files and as single (not time-resolved) maps
LABEL_STEMS = ("clusters",)
SCALAR_STEMS = ("cluster_summary",)
FORMATS = ("gifti", "cifti")


#: the brain models of every source, labelled by structure (CIFTI-2 with volume parts only)
STRUCTURES_FILE = "source_structures.dlabel.nii"


def space_file_names(hemispheres, volume_parts=False) -> list:
    return [n for h in hemispheres for n in (f"source_space.{h}.surf.gii",
                                             f"source_mask.{h}.shape.gii")] + (
        [STRUCTURES_FILE] if volume_parts else [])


def map_file_names(stem, hemispheres, fmt) -> list:
    """File names of map ``stem`` for a surface of ``hemispheres`` in format ``fmt``."""
    if fmt == "cifti":
        ext = ("dlabel" if stem in LABEL_STEMS else "dscalar" if stem in SCALAR_STEMS
               else "dtseries")
        return [f"{stem}.{ext}.nii"]
    ext = "label" if stem in LABEL_STEMS else "func"
    return [f"{stem}.{h}.{ext}.gii" for h in hemispheres]


class SurfaceMaps:
    """Result maps of a :class:`SurfaceMesh` (see the module docstring)."""

    def __init__(self, space: SurfaceMesh, time_axis: TimeAxis | None = None):
        if space.maps_format not in FORMATS:
            raise ValueError(f"unknown surface map format {space.maps_format!r}")
        self.surface, self.time_axis = space, time_axis

    @property
    def space(self) -> SurfaceMesh:
        return self.surface

    @property
    def format(self) -> str:
        return self.surface.maps_format

    # -- names -----------------------------------------------------------------
    def files(self, stem) -> list:
        return map_file_names(stem, self.surface.names, self.format)

    @classmethod
    def expected_files(cls, summary: dict):
        """(space files, stem -> file names) of a saved folder, from its summary."""
        space = summary.get("space", {})
        hemis = [h["name"] for h in space.get("hemispheres", [])]
        fmt = space.get("maps_format", "gifti")
        return (space_file_names(hemis, bool(space.get("volume_parts"))),
                lambda stem: map_file_names(stem, hemis, fmt))

    # -- writing ---------------------------------------------------------------
    def _write(self, folder, stem, values, *, name, intent, params=(), meta=None, fill=0.0):
        folder = Path(folder)
        names = self.files(stem)
        values = np.asarray(values)
        if self.format == "cifti":
            meta = {"map": name, **(meta or {}),
                    **{f"intent_p{i + 1}": repr(float(p)) for i, p in enumerate(params)}}
            if stem in SCALAR_STEMS:
                img = cifti.scalar_image(values, self.surface, name, meta)
            else:
                img = cifti.series_image(values, self.surface, self.time_axis, meta)
            return [cifti.save(folder / names[0], img)]
        out = []
        for h, fname in zip(self.surface.names, names):
            v = self.surface.to_vertices(values.astype(np.float32), h, fill=fill)
            img = gifti.map_image(v, h, intent, name=name, params=params,
                                  time_axis=self.time_axis, extra_meta=meta)
            out.append(gifti.save(folder / fname, img))
        return out

    def statistic(self, folder, stem, values, kind, df, name):
        """t (p1 = df), F (p1, p2 = df) or ``kind`` "z": the z of equal p of a mixed
        model (NIFTI_INTENT_ZSCORE, no parameter; its per-source df are a map of their own)."""
        if kind == "z":
            return self._write(folder, stem, values, name=f"z of equal p, contrast {name}",
                               intent="NIFTI_INTENT_ZSCORE", meta={"statistic": "z"})
        if kind == "t":
            return self._write(folder, stem, values, name=f"t statistic, contrast {name}",
                               intent="NIFTI_INTENT_TTEST", params=(df[0],),
                               meta={"statistic": "t"})
        return self._write(folder, stem, values, name=f"F statistic, contrast {name}",
                           intent="NIFTI_INTENT_FTEST", params=(df[0], df[1]),
                           meta={"statistic": "F"})

    def estimate(self, folder, stem, values, name, what, signed=True, bounded=False):
        return self._write(folder, stem, values, name=f"{what}, contrast {name}",
                           intent="NIFTI_INTENT_ESTIMATE")

    def p_values(self, folder, stem, values, name, which):
        p = np.where(np.isfinite(values), values, 1.0)
        return self._write(folder, stem, p, name=f"{which} p, contrast {name}",
                           intent="NIFTI_INTENT_PVAL", fill=1.0)

    def labels(self, folder, stem, labels, name):
        """Cluster labels 1..K (0 = none) with a label table naming each cluster."""
        labels = np.asarray(labels)
        keys = [int(k) for k in np.unique(labels) if k > 0]
        names = {0: "none", **{k: f"cluster {k}" for k in keys}}
        folder = Path(folder)
        fnames = self.files(stem)
        if self.format == "cifti":
            img = cifti.label_image(labels, self.surface, names, self.time_axis,
                                    {"map": f"cluster labels, contrast {name}"})
            return [cifti.save(folder / fnames[0], img)]
        out = []
        for h, fname in zip(self.surface.names, fnames):
            v = self.surface.to_vertices(labels.astype(np.int32), h, fill=0)
            img = gifti.label_image(v, h, names, name=f"cluster labels, contrast {name}",
                                    time_axis=self.time_axis)
            out.append(gifti.save(folder / fname, img))
        return out

    def cluster_summary(self, folder, stem, statistic, labels, keep, kind, name):
        """One map: peak statistic over each source's cluster time span (0 elsewhere)."""
        vals = cluster_summary_values(statistic, labels, keep)
        return self._write(folder, stem, vals, name=f"peak {kind} over cluster span, "
                           f"contrast {name}", intent="NIFTI_INTENT_NONE")

    def write_space(self, folder) -> list:
        """The template meshes and the source masks (one pair per hemisphere), and
        with volume parts the sources' structures (:data:`STRUCTURES_FILE`)."""
        folder = Path(folder)
        out = []
        for h, (mesh_name, mask_name) in zip(self.surface.hemispheres,
                                             zip(*[iter(space_file_names(self.surface.names))] * 2)):
            out.append(gifti.save(folder / mesh_name, gifti.mesh_image(h.vertices, h.triangles,
                                                                       h.name)))
            img = gifti.map_image(h.mask.astype(np.uint8), h.name, "NIFTI_INTENT_NONE",
                                  name="source mask", dtype=np.uint8,
                                  extra_meta={"maps_format": self.format})
            out.append(gifti.save(folder / mask_name, img))
        if self.surface.voxels is not None:
            out.append(cifti.save(folder / STRUCTURES_FILE, cifti.structure_image(self.surface)))
        return out

    # -- reading back ------------------------------------------------------------
    def read(self, folder, stem) -> np.ndarray:
        """Per-source values (n_sources, n_times) of a written map (raises when damaged)."""
        folder = Path(folder)
        names = self.files(stem)
        if self.format == "cifti":
            values, _ = cifti.load_values(folder / names[0], self.surface)
            return values
        per = {}
        for h, fname in zip(self.surface.names, names):
            data = gifti.read_arrays(folder / fname)
            per[h] = data.reshape(data.shape[0], -1)
        return self.surface.from_vertices(per)

    @classmethod
    def read_space(cls, folder, time_axis=None) -> "SurfaceMaps":
        folder = Path(folder)
        hemis, fmt = [], "gifti"
        for name in ("left", "right"):
            mesh_name, mask_name = space_file_names([name])
            if not (folder / mesh_name).exists() and not (folder / mask_name).exists():
                continue
            vertices, triangles, _ = gifti.read_mesh(folder / mesh_name)
            mask, _ = gifti.read_vertex_values(folder / mask_name)
            fmt = dict(gifti.load(folder / mask_name).meta).get("maps_format", fmt)
            hemis.append(Hemisphere.from_arrays(name, vertices, triangles, mask > 0))
        if not hemis:
            raise FileNotFoundError(str(folder / space_file_names(["left"])[0]))
        voxels = None
        if fmt == "cifti" and (folder / STRUCTURES_FILE).exists():
            _, img = cifti.load_values(folder / STRUCTURES_FILE, None)
            voxels = cifti.voxel_parts(img.header.get_axis(1))
        return cls(SurfaceMesh(tuple(hemis), maps_format=fmt, voxels=voxels), time_axis)
