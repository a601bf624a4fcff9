"""NIfTI-1 images of a contrast's maps.

Every map is written on the template grid with the template affine in both
the sform and the qform (code 2, "aligned"), spatial units mm and time unit
seconds (``xyzt_units``), ``pixdim[4]`` = sampling interval and ``toffset`` =
first sample time of the analysed window, so that other NIfTI readers place
the data in space and time.  Intent codes follow nifti1.h:

=================  ====  ==========================================
map                code  intent parameters
=================  ====  ==========================================
t statistic        3     p1 = degrees of freedom (NIFTI_INTENT_TTEST)
F statistic        4     p1 = df1, p2 = df2 (NIFTI_INTENT_FTEST)
p values           22    none (NIFTI_INTENT_PVAL)
estimate, effect   1001  none (NIFTI_INTENT_ESTIMATE)
cluster labels     1002  none (NIFTI_INTENT_LABEL), int16 or int32
=================  ====  ==========================================

Voxels outside the source mask hold 0 (p maps: 1, "nothing there").
"""

from __future__ import annotations

import nibabel as nib
import numpy as np

from ..sources.volume import Grid, TimeAxis

# nifti1.h intent codes
INTENT_NONE = 0
INTENT_TTEST = 3
INTENT_FTEST = 4
INTENT_PVAL = 22
INTENT_ESTIMATE = 1001
INTENT_LABEL = 1002

#: NIfTI-1 sform/qform code 2 = NIFTI_XFORM_ALIGNED_ANAT (aligned to a template-like space)
XFORM_ALIGNED = 2


def _robust_abs(values, q=99.5):
    v = np.abs(np.asarray(values, float))
    v = v[np.isfinite(v)]
    if v.size == 0:
        return 1.0
    r = float(np.percentile(v, q))
    return r if r > 0 else (float(v.max()) or 1.0)


def make_image(values, grid: Grid, time_axis: TimeAxis | None, *, dtype, fill=0.0,
               intent=INTENT_NONE, intent_params=(), intent_name="", descrip="",
               cal=None) -> nib.Nifti1Image:
    """One NIfTI-1 image from per-source values.

    ``values`` is (n_sources, n_times) for a 4D map or (n_sources,) for a 3D
    map; ``cal`` is (cal_min, cal_max), the display range readers may use.
    """
    values = np.asarray(values)
    vol = grid.to_volume(values.astype(dtype), fill=np.asarray(fill).astype(dtype))
    affine = np.asarray(grid.affine, float)
    img = nib.Nifti1Image(vol, affine)
    hdr = img.header
    hdr.set_data_dtype(dtype)
    hdr.set_xyzt_units("mm", "sec")
    zooms = [float(z) for z in grid.voxel_size]
    if vol.ndim == 4:
        zooms.append(float(time_axis.dt))
        hdr["toffset"] = float(time_axis.t0)
    hdr.set_zooms(zooms)
    img.set_sform(affine, code=XFORM_ALIGNED)
    img.set_qform(affine, code=XFORM_ALIGNED)
    hdr.set_intent(intent, tuple(float(p) for p in intent_params), name=intent_name[:15])
    hdr["descrip"] = descrip.encode("ascii", "replace")[:79]
    if cal is not None:
        hdr["cal_min"], hdr["cal_max"] = float(cal[0]), float(cal[1])
    return img


def statistic_image(statistic, grid, time_axis, kind, df, name):
    """t (intent 3, p1 = df) or F (intent 4, p1 = df1, p2 = df2) map, float32."""
    if kind == "t":
        r = _robust_abs(statistic)
        return make_image(statistic, grid, time_axis, dtype=np.float32, intent=INTENT_TTEST,
                          intent_params=(df[0],), intent_name="t statistic",
                          descrip=f"groupsrc t map, contrast {name}, df {df[0]}", cal=(-r, r))
    r = _robust_abs(statistic)
    return make_image(statistic, grid, time_axis, dtype=np.float32, intent=INTENT_FTEST,
                      intent_params=(df[0], df[1]), intent_name="F statistic",
                      descrip=f"groupsrc F map, contrast {name}, df {df[0]},{df[1]}",
                      cal=(0.0, r))


def p_image(p, grid, time_axis, name, which):
    """p-value map (intent 22), float32, 1 outside the mask, display range 0..1."""
    p = np.where(np.isfinite(p), p, 1.0)
    return make_image(p, grid, time_axis, dtype=np.float32, fill=1.0, intent=INTENT_PVAL,
                      intent_name=f"p {which}"[:15], descrip=f"groupsrc {which} p, contrast {name}",
                      cal=(0.0, 1.0))


def estimate_image(values, grid, time_axis, name, what, signed=True):
    """Contrast estimate or standardized effect (intent 1001), float32."""
    r = _robust_abs(values)
    return make_image(values, grid, time_axis, dtype=np.float32, intent=INTENT_ESTIMATE,
                      intent_name=what[:15], descrip=f"groupsrc {what}, contrast {name}",
                      cal=(-r, r) if signed else (0.0, min(1.0, r)))


def label_dtype(n_labels: int):
    return np.int16 if n_labels <= np.iinfo(np.int16).max else np.int32


def label_image(labels, grid, time_axis, name):
    """Cluster labels 1..K, 0 = none (intent 1002), int16 (int32 beyond 32767 labels)."""
    k = int(np.max(labels)) if np.size(labels) else 0
    return make_image(labels, grid, time_axis, dtype=label_dtype(k), intent=INTENT_LABEL,
                      intent_name="cluster label", descrip=f"groupsrc clusters, contrast {name}",
                      cal=(0, max(k, 1)))


def cluster_summary_values(statistic, labels, keep):
    """Per source: the statistic of largest magnitude over the samples where the
    source belongs to one of the clusters in ``keep``; 0 elsewhere (n_sources,)."""
    stat = np.asarray(statistic, float)
    member = np.isin(labels, np.asarray(list(keep), dtype=np.int64)) & (labels > 0)
    masked = np.where(member, stat, 0.0)
    idx = np.argmax(np.abs(masked), axis=1)
    return masked[np.arange(stat.shape[0]), idx]


def cluster_summary_image(statistic, labels, keep, grid, kind, name):
    """3D overlay (x, y, z): peak statistic over each source's cluster time span."""
    vals = cluster_summary_values(statistic, labels, keep)
    r = _robust_abs(vals[vals != 0]) if np.any(vals != 0) else 1.0
    return make_image(vals, grid, None, dtype=np.float32, intent=INTENT_NONE,
                      intent_name=f"peak {kind} in cl", cal=(-r, r) if kind == "t" else (0.0, r),
                      descrip=f"groupsrc peak {kind} over cluster span, contrast {name}")
