"""Variance groups through the command line: what check prints, what run writes.

A cohort of 8 controls and 5 patients (patients twice as variable): with the default
``variance_groups = "auto"`` every GLM contrast is tested with Welch's v and sign flips;
``check`` says so, run.json records it, the methods text names it, and the written
test statistic at a source is Welch's t as ``scipy.stats.ttest_ind(equal_var=False)``
computes it on the participants' values read back from the maps (reference library).
"""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pandas as pd
from scipy import stats

from groupsrc.cli import main

from test_unit_scale import _cohort


def _analysis(tmp_path, vg="auto"):
    path = _cohort(tmp_path / "c", vg=vg)
    text = path.read_text().replace('cache = "cache"\n', "")
    path.write_text(text)
    return path


def test_check_names_the_statistic_and_the_groups(tmp_path, capsys):
    rc = main(["check", str(_analysis(tmp_path))])
    out = capsys.readouterr().out
    assert rc == 0, out
    assert "group_by_tone [Welch v, sign-flip]" in out
    assert "variance groups: group (control 8, patient 5); automatic: the groups of group " \
           "differ in size" in out


def test_none_keeps_the_pooled_t(tmp_path, capsys):
    rc = main(["check", str(_analysis(tmp_path, vg="none"))])
    out = capsys.readouterr().out
    assert rc == 0 and "group_by_tone [t, permutation]" in out and "variance groups" not in out


def test_a_column_that_does_not_exist_is_named(tmp_path, capsys):
    rc = main(["check", str(_analysis(tmp_path, vg="site"))])
    out = capsys.readouterr()
    assert rc == 1 and "'site'" in out.out + out.err


def test_run_records_and_writes_welch(tmp_path, capsys):
    analysis = _analysis(tmp_path)
    out = tmp_path / "out"
    assert main(["run", str(analysis), "--out", str(out), "--quiet"]) == 0
    capsys.readouterr()
    rec = json.loads((out / "group_by_tone" / "summary.json").read_text())
    run = json.loads((out / "run.json").read_text())
    assert next(c for c in run["contrasts"] if c["name"] == "group_by_tone")["statistic"] \
        == "welch_v"
    assert rec["statistic"] == "welch_v" and rec["df_rule"] == "welch_satterthwaite"
    assert rec["variance_groups"]["sizes"] == {"control": 8, "patient": 5}
    assert rec["scale"] == "z" and rec["degenerate_features"] == 0
    methods = (out / "methods.md").read_text()
    assert "Welch's v" in methods and "control (8) and patient (5)" in methods
    assert "Welch BL (1947)" in methods


def test_welch_at_a_source_without_covariates(tmp_path, capsys):
    analysis = _analysis(tmp_path)
    analysis.write_text(analysis.read_text().replace('between = "group + age"',
                                                     'between = "group"').replace(
        '[[contrasts]]\nname = "age_slope"\nslope = "age"\n', ""))
    out = tmp_path / "out"
    assert main(["run", str(analysis), "--out", str(out), "--quiet"]) == 0
    capsys.readouterr()
    parts = pd.read_csv(analysis.parent / "participants.tsv", sep="\t")
    maps = pd.read_csv(analysis.parent / "maps.tsv", sep="\t")
    v = np.asarray(nib.load(str(out / "group_by_tone" / "test_statistic.nii.gz")).dataobj)
    df = np.asarray(nib.load(str(out / "group_by_tone" / "df.nii.gz")).dataobj)
    for (i, j, k, t) in [(2, 2, 1, 5), (1, 3, 2, 0), (4, 4, 1, 8)]:
        diff = {}
        for pid in parts.participant_id:
            rows = maps[maps.participant_id == pid].set_index("condition")
            val = {c: np.asarray(nib.load(str(analysis.parent / rows.loc[c, "path"])).dataobj)
                   [i, j, k, t] for c in ("rare", "frequent")}
            diff[pid] = val["rare"] - val["frequent"]
        g = parts.set_index("participant_id").group
        ref = stats.ttest_ind([diff[p] for p in g.index if g[p] == "patient"],
                              [diff[p] for p in g.index if g[p] == "control"], equal_var=False)
        np.testing.assert_allclose(v[i, j, k, t], ref.statistic, rtol=1e-4)
        np.testing.assert_allclose(df[i, j, k, t], ref.df, rtol=1e-4)
