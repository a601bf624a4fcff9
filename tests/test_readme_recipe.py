"""The README's recipe for writing one's own maps, run exactly as printed.

The code blocks of the README section "Writing your own maps" are executed; the files
they write are read back with nibabel (reference library for NIfTI-1 and GIfTI 1.0:
pixdim[4], toffset, xyzt_units; data arrays and metadata) and must hold the arrays and
the time axis given; then ``groupsrc init`` and ``groupsrc check`` take a cohort written
with them.  The arrays are random numbers: only their round trip is checked.
"""

import re
import shutil
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from _surface_fixture import make_surface_cohort, mesh
from conftest import make_cohort
from groupsrc.cli import main

README = Path(__file__).resolve().parents[1] / "README.md"


def _recipe():
    text = README.read_text(encoding="utf-8")
    start = text.index("\n## Writing your own maps\n")
    section = text[start:text.index("\n## ", start + 5)]
    blocks = re.findall(r"```python\n(.*?)```", section, flags=re.S)
    assert len(blocks) == 2, "the recipe's two code blocks (functions, example) changed"
    return blocks


@pytest.fixture
def recipe():
    space = {}
    exec(compile(_recipe()[0], "README.md (Writing your own maps)", "exec"), space)
    return space


def test_the_example_block_runs(tmp_path, monkeypatch, recipe):
    src = make_cohort(tmp_path / "vol").parent
    surf = make_surface_cohort(tmp_path / "surf", "gifti").parent
    study = tmp_path / "study"
    (study / "template").mkdir(parents=True)
    (study / "maps").mkdir()
    shutil.copy(src / "mask.nii.gz", study / "template" / "mask.nii.gz")
    n_src = int(np.count_nonzero(np.asarray(nib.load(str(src / "mask.nii.gz")).dataobj)))
    rng = np.random.default_rng(0)
    space = dict(recipe, volume_values=rng.standard_normal((n_src, 175)),
                 left_values=rng.standard_normal((mesh("left")[0].shape[0], 175)),
                 right_values=rng.standard_normal((mesh("right")[0].shape[0], 175)))
    monkeypatch.chdir(study)
    exec(compile(_recipe()[1], "README.md (example)", "exec"), space)
    vol = nib.load("maps/sub-01_cond-rare.nii.gz")
    assert vol.header.get_xyzt_units() == ("mm", "sec")
    assert float(vol.header["pixdim"][4]) == pytest.approx(0.004)
    assert float(vol.header["toffset"]) == pytest.approx(-0.1)
    inside = np.asarray(nib.load("template/mask.nii.gz").dataobj) != 0
    np.testing.assert_array_equal(np.asarray(vol.dataobj)[inside],
                                  space["volume_values"].astype(np.float32))
    left = nib.load("maps/sub-01_cond-rare_hemi-L.func.gii")
    assert dict(left.meta)["AnatomicalStructurePrimary"] == "CortexLeft"
    assert float(dict(left.meta)["time_start_s"]) == -0.1
    assert float(dict(left.meta)["sampling_interval_s"]) == 0.004
    np.testing.assert_array_equal(np.column_stack([d.data for d in left.darrays]),
                                  space["left_values"].astype(np.float32))
    assert surf.exists()


def _volume_study(tmp_path, recipe, t0, dt):
    src = make_cohort(tmp_path / "src").parent
    study = tmp_path / "study"
    (study / "maps").mkdir(parents=True)
    shutil.copy(src / "mask.nii.gz", study / "mask.nii.gz")
    n_src = int(np.count_nonzero(np.asarray(nib.load(str(src / "mask.nii.gz")).dataobj)))
    rng = np.random.default_rng(1)
    for i in range(1, 7):
        for cond in ("rare", "frequent"):
            recipe["save_volume_map"](rng.standard_normal((n_src, 20)), str(study / "mask.nii.gz"),
                                      str(study / "maps" / f"sub-{i:02d}_cond-{cond}.nii.gz"),
                                      time_start=t0, sampling_interval=dt)
    return study


def test_volume_maps_written_by_the_recipe_pass_check(tmp_path, recipe, capsys):
    study = _volume_study(tmp_path, recipe, -0.1, 0.004)
    assert main(["init", str(study / "maps")]) == 0
    text = (study / "analysis.toml").read_text()
    text = text.replace('# mask = "mask.nii.gz"', 'mask = "mask.nii.gz"')
    text = text.replace('# unit = "nA m"', 'unit = "nA m"')
    (study / "analysis.toml").write_text(text)
    capsys.readouterr()
    assert main(["check", str(study / "analysis.toml")]) == 0
    out = capsys.readouterr().out
    # 20 samples from -100 ms every 4 ms: -100 to -100 + 19 * 4 = -24 ms (arithmetic)
    assert "  samples      : 20, -100 to -24 ms every 4 ms" in out.splitlines(), out


def test_a_recipe_given_milliseconds_is_caught(tmp_path, recipe, capsys):
    """The recipe's mistake the README warns of: times in ms where seconds are meant."""
    study = _volume_study(tmp_path, recipe, -100, 4)
    assert main(["init", str(study / "maps")]) == 0
    capsys.readouterr()
    assert main(["check", str(study / "analysis.toml")]) == 1
    assert "sampling interval 4000 ms" in capsys.readouterr().err


def test_surface_maps_written_by_the_recipe_need_no_time_keys(tmp_path, recipe, capsys):
    src = make_surface_cohort(tmp_path / "src", "gifti").parent
    study = tmp_path / "study"
    (study / "maps").mkdir(parents=True)
    shutil.copytree(src / "template", study / "template")
    table = pd.read_csv(src / "maps.tsv", sep="\t", dtype=str)
    for _, row in table.iterrows():
        for hemi, h in (("left", "L"), ("right", "R")):
            values = np.column_stack([d.data for d in nib.load(str(src / row[f"path_{hemi}"])).darrays])
            recipe["save_surface_map"](values, hemi, str(
                study / "maps" / f"{row['participant_id']}_cond-{row['condition']}_hemi-{h}.func.gii"),
                time_start=0.05, sampling_interval=0.002)
    assert main(["init", str(study / "maps")]) == 0
    text = (study / "analysis.toml").read_text()
    for h in ("left", "right"):
        text = text.replace(f'# mesh_{h} = "template/{h}.surf.gii"', f'mesh_{h} = "template/{h}.surf.gii"')
    (study / "analysis.toml").write_text(text)
    capsys.readouterr()
    assert main(["check", str(study / "analysis.toml")]) == 0
    out = capsys.readouterr().out
    n_t = len(nib.load(str(src / table["path_left"][0])).darrays)
    last = 50 + (n_t - 1) * 2
    assert f"  samples      : {n_t}, 50 to {last:g} ms every 2 ms" in out.splitlines(), out
