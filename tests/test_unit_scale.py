"""Results do not depend on the maps' unit: scaled by 1e-20 or 1e20, or riding on 1e9.

A statistic, its threshold and its permutation p-values are invariant to multiplying
every observation by a positive constant, and a contrast that does not test the mean
level (condition differences, group differences, slopes) to adding one (common
practice: location-scale invariance of t and F).  Single precision breaks both when the
data are used as they come (squares of 1e-20 underflow; 1e9 + 1 is 1e9 in float32), so
the maps are centred and scaled in float64 as they are decoded (inputs/units.py).  The
cohort here is written in float64 at every scale, so that the inputs themselves differ
only by the scaling; the p maps must then be equal exactly, and estimates scale.
"""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from scipy import ndimage

from groupsrc.inputs.settings import parse_settings
from groupsrc.pipeline import analyse, prepare

from conftest import AFFINE, DT, T0, write_mask

SHAPE = (6, 6, 4)
N_T = 10


def _write(path, data):
    img = nib.Nifti1Image(np.asarray(data, np.float64), AFFINE)
    img.header.set_xyzt_units("mm", "sec")
    img.header.set_zooms(list(img.header.get_zooms()[:3]) + [DT])
    img.header["toffset"] = T0
    img.set_sform(AFFINE, code=2)
    img.set_qform(AFFINE, code=2)
    nib.save(img, str(path))


ANALYSIS = """\
title = "unit scale"
[cohort]
participants = "participants.tsv"
maps = "maps.tsv"
mask = "mask.nii.gz"
cache = "cache"
[model]
between = "group + age"
within = "condition"
mixed = {mixed}
[[contrasts]]
name = "rare_minus_frequent"
within = {{ rare = 1, frequent = -1 }}
[[contrasts]]
name = "group_by_tone"
within = {{ rare = 1, frequent = -1 }}
compare = {{ group = ["patient", "control"] }}
[[contrasts]]
name = "age_slope"
slope = "age"
[inference]
correction = "cluster-mass"
resamples = 60
seed = 11
forming_p = 0.05
variance_groups = "{vg}"
"""


def _cohort(root, factor=1.0, offset=0.0, mixed=False, vg="none", seed=4):
    """Patients (5) more variable than controls (8); a condition effect in one corner, a
    group difference in another; maps written as factor * data + offset (float64).  The
    loading cache is the cohort's own (a module-scoped fixture runs before the autouse
    fixture that moves the cache out of the user's home)."""
    rng = np.random.default_rng(seed)
    root.mkdir(parents=True)
    (root / "maps").mkdir()
    n_c, n_p = 8, 5
    ids = [f"sub-{i + 1:02d}" for i in range(n_c + n_p)]
    group = ["control"] * n_c + ["patient"] * n_p
    pd.DataFrame({"participant_id": ids, "group": group,
                  "age": rng.integers(20, 70, len(ids))}).to_csv(
        root / "participants.tsv", sep="\t", index=False)
    mask = np.zeros(SHAPE, np.uint8)
    mask[1:5, 1:5, 1:3] = 1
    write_mask(root / "mask.nii.gz", mask)
    rows = []
    for i, pid in enumerate(ids):
        sd = 2.0 if group[i] == "patient" else 1.0
        for cond in ("rare", "frequent"):
            data = ndimage.gaussian_filter(rng.standard_normal(SHAPE + (N_T,)), (1, 1, 1, 1))
            data = 3.0 * sd * data + 0.8
            if cond == "rare":
                data[1:3, 1:3, 1:3, 3:7] += 1.5
                if group[i] == "patient":
                    data[3:5, 3:5, 1:3, 4:8] += 2.0
            data[mask == 0] = 0.0
            name = f"{pid}_cond-{cond}.nii.gz"
            _write(root / "maps" / name, np.where(mask[..., None] > 0,
                                                  factor * data + offset, 0.0))
            rows.append({"participant_id": pid, "condition": cond, "path": f"maps/{name}"})
    pd.DataFrame(rows).to_csv(root / "maps.tsv", sep="\t", index=False)
    (root / "analysis.toml").write_text(ANALYSIS.format(mixed=str(mixed).lower(), vg=vg))
    return root / "analysis.toml"


def _run(path):
    res = analyse(prepare(parse_settings(path), progress=False))
    return {c.name: c for c in res.contrasts}


MODELS = {"glm pooled": dict(mixed=False, vg="none"),
          "glm variance groups": dict(mixed=False, vg="auto"),
          "mixed": dict(mixed=True, vg="none")}


@pytest.fixture(scope="module", params=list(MODELS))
def runs(request, tmp_path_factory):
    root = tmp_path_factory.mktemp("scale")
    variants = {"1": (1.0, 0.0), "1e-20": (1e-20, 0.0), "1e20": (1e20, 0.0),
                "offset 1e9": (1.0, 1e9)}
    return {k: _run(_cohort(root / k.replace(" ", "_"), f, o, **MODELS[request.param]))
            for k, (f, o) in variants.items()}


@pytest.mark.parametrize("variant", ["1e-20", "1e20", "offset 1e9"])
def test_p_maps_are_the_same_at_any_scale(runs, variant):
    base = runs["1"]
    for name, c in runs[variant].items():
        ref = base[name].inference
        got = c.inference
        np.testing.assert_array_equal(got.p_corrected, ref.p_corrected, err_msg=name)
        np.testing.assert_allclose(got.statistic, ref.statistic, rtol=1e-5, atol=1e-6,
                                   err_msg=name)
        np.testing.assert_allclose(got.p_uncorrected, ref.p_uncorrected, rtol=1e-5,
                                   atol=1e-12, err_msg=name)


def test_the_analysis_finds_something_to_compare(runs):
    """Not a vacuous comparison: clusters with small corrected p exist."""
    assert any((c.inference.p_corrected <= 0.05).any() for c in runs["1"].values())


@pytest.mark.parametrize("variant,factor", [("1e-20", 1e-20), ("1e20", 1e20)])
def test_estimates_are_in_the_input_units(runs, variant, factor):
    for name, c in runs[variant].items():
        ref = runs["1"][name]
        if c.inference.kind == "t":
            np.testing.assert_allclose(c.inference.estimate, factor * ref.inference.estimate,
                                       rtol=1e-5, atol=1e-6 * factor)
            np.testing.assert_allclose(c.inference.se, factor * ref.inference.se, rtol=1e-5)
        np.testing.assert_allclose(c.data, factor * ref.data, rtol=1e-5, atol=1e-5 * factor)


def test_which_contrasts_see_the_level():
    """A constant added to every participant's reduced map moves only the coefficients
    of the design's constant (common practice: the intercept absorbs a shift)."""
    from groupsrc.inputs.units import tests_level
    X = np.c_[np.ones(6), [0, 0, 0, 1, 1, 1], [20, 31, 45, 27, 60, 38]]
    assert not tests_level(X, [0, 1, 0], 1.0)          # group difference
    assert not tests_level(X, [0, 0, 1], 1.0)          # slope
    assert tests_level(X, [1, 0.5, 0], 1.0)            # the mean of the groups: the level
    assert not tests_level(X, [1, 0.5, 0], 0.0)        # ... of differences: no level
    assert tests_level(X[:, 1:], [1, 0], 1.0)          # no constant in the design


def test_a_first_map_without_spread_is_no_guide_and_the_scale_settles():
    """The first map nearly constant: its spread (1e-12) would make the others' stored
    values 1e12; settle() multiplies them by a power of two (exact in IEEE arithmetic) to
    order one, and the maps still come back in the input's units."""
    from groupsrc.inputs.units import LEVEL_ROWS, Standardizer, Units
    rng = np.random.default_rng(0)
    raw = rng.standard_normal((5, 40, 6))
    raw[0] = 3.0 + 1e-12 * rng.standard_normal((40, 6))
    st = Standardizer()
    stored = np.empty((5 + LEVEL_ROWS, 40, 6), np.float32)
    for i in range(5):
        stored[i] = st(raw[i])
    before = np.sqrt(np.mean(stored[:5].astype(np.float64) ** 2))
    st.settle(stored, 5)
    stored[5:] = st.level_rows((40, 6))
    after = np.sqrt(np.mean(stored[:5].astype(np.float64) ** 2))
    assert before > 1e10 and 0.5 <= after <= 2.0
    units = Units(st.scale, stored[5:])
    back = stored[:5].astype(np.float64) * units.scale + units.scale * units.level()
    np.testing.assert_allclose(back, raw, rtol=1e-6, atol=1e-6)
