"""``groupsrc init MAPS_FOLDER``: maps.tsv, a participants.tsv skeleton and an analysis
file from BIDS-like file names (groupsrc/scaffold.py).

File names follow the BIDS specification's "key-label" entities joined by "_"
(``sub``, ``ses``, ``hemi``; ``cond`` is ours).  The expected tables are written out
here from the file names the test itself chose; the scaffold is then judged by
``groupsrc check`` accepting it (with only the edits the analysis file asks for) and by
pandas reading the tables.  Nothing that exists is ever overwritten.
"""

import hashlib
import shutil

import pandas as pd

from _surface_fixture import make_surface_cohort
from conftest import make_cohort
from groupsrc.cli import main


def _hash(p):
    return hashlib.sha256(p.read_bytes()).hexdigest()


def _study_from(cohort_maps, root):
    """A study folder holding only the cohort's map files (as a lab's folder would)."""
    study = root / "study"
    shutil.copytree(cohort_maps, study / "maps")
    return study


def test_a_volume_study_is_ready_for_check(tmp_path, capsys):
    make_cohort(tmp_path / "src")
    study = _study_from(tmp_path / "src" / "maps", tmp_path)
    (study / "maps" / "sub-01_cond-rare.json").write_text("{}")      # a sidecar: skipped
    assert main(["init", str(study / "maps")]) == 0
    out = capsys.readouterr().out
    assert "16 maps (NIfTI volumes) of 8 participants; conditions frequent, rare" in out, out
    assert "skipped 1 file" in out
    maps = pd.read_csv(study / "maps.tsv", sep="\t", dtype=str)
    expected = [(f"sub-{i:02d}", c, f"maps/sub-{i:02d}_cond-{c}.nii.gz")
                for i in range(1, 9) for c in ("frequent", "rare")]
    assert list(maps.columns) == ["participant_id", "condition", "path"]
    assert [tuple(r) for r in maps.to_numpy()] == expected
    parts = pd.read_csv(study / "participants.tsv", sep="\t", dtype=str, keep_default_na=False)
    assert parts["participant_id"].tolist() == [f"sub-{i:02d}" for i in range(1, 9)]
    assert set(parts["group"]) == {"n/a"}
    assert main(["check", str(study / "analysis.toml")]) == 0
    text = capsys.readouterr().out
    assert "contrast     : frequent_minus_rare" in text, text


def test_nothing_is_overwritten(tmp_path, capsys):
    make_cohort(tmp_path / "src")
    study = _study_from(tmp_path / "src" / "maps", tmp_path)
    (study / "maps.tsv").write_text("mine\n")
    before = _hash(study / "maps.tsv")
    assert main(["init", str(study / "maps")]) == 1
    err = capsys.readouterr().err
    assert "maps.tsv: exists already; groupsrc init never overwrites a file" in err, err
    assert _hash(study / "maps.tsv") == before
    assert not (study / "participants.tsv").exists() and not (study / "analysis.toml").exists()


def test_every_naming_problem_is_listed_at_once(tmp_path, capsys):
    make_cohort(tmp_path / "src")
    study = _study_from(tmp_path / "src" / "maps", tmp_path)
    maps = study / "maps"
    shutil.copy(maps / "sub-01_cond-rare.nii.gz", maps / "rare_average.nii.gz")
    shutil.copy(maps / "sub-02_cond-rare.nii.gz", maps / "sub-02_cond-rare_run-2.nii.gz")
    assert main(["init", str(maps)]) == 1
    err = capsys.readouterr().err
    assert "2 problems found" in err, err
    assert "rare_average.nii.gz: the file name has no sub-<label> part" in err, err
    assert "is a second map for participant sub-02 condition rare" in err, err
    assert not (study / "maps.tsv").exists()


def test_a_single_condition_tests_the_mean(tmp_path, capsys):
    make_cohort(tmp_path / "src", conditions=("tone",))
    study = tmp_path / "study"
    (study / "maps").mkdir(parents=True)
    for p in (tmp_path / "src" / "maps").iterdir():            # names without cond-
        shutil.copy(p, study / "maps" / p.name.replace("_cond-tone", "_desc-source"))
    assert main(["init", str(study / "maps"), "--out", str(study / "analysis")]) == 0
    capsys.readouterr()
    maps = pd.read_csv(study / "analysis" / "maps.tsv", sep="\t", dtype=str)
    assert list(maps.columns) == ["participant_id", "path"]
    assert maps["path"][0] == "../maps/sub-01_desc-source.nii.gz"
    assert main(["check", str(study / "analysis" / "analysis.toml")]) == 0
    assert "contrast     : mean_response" in capsys.readouterr().out


def test_gifti_pairs_in_nested_bids_folders(tmp_path, capsys):
    src = make_surface_cohort(tmp_path / "src", "gifti").parent
    study = tmp_path / "study"
    table = pd.read_csv(src / "maps.tsv", sep="\t", dtype=str)
    for _, row in table.iterrows():
        pid, cond = row["participant_id"], row["condition"]
        folder = study / "derivatives" / pid / "ses-1"
        folder.mkdir(parents=True, exist_ok=True)
        for hemi, h in (("left", "L"), ("right", "R")):
            shutil.copy(src / row[f"path_{hemi}"],
                        folder / f"{pid}_ses-1_cond-{cond}_hemi-{h}_desc-minnorm.func.gii")
    assert main(["init", str(study / "derivatives")]) == 0
    out = capsys.readouterr().out
    assert "16 maps (GIfTI maps per hemisphere) of 8 participants" in out, out
    assert "template meshes" in out
    maps = pd.read_csv(study / "maps.tsv", sep="\t", dtype=str)
    assert list(maps.columns) == ["participant_id", "condition", "session", "path_left",
                                  "path_right"]
    assert maps.loc[0, "path_left"] == "derivatives/sub-01/ses-1/sub-01_ses-1_cond-frequent_" \
                                       "hemi-L_desc-minnorm.func.gii"
    # the edits the file asks for: the meshes and the time axis (GIfTI carries none here)
    shutil.copytree(src / "template", study / "template")
    text = (study / "analysis.toml").read_text()
    for h in ("left", "right"):
        text = text.replace(f'# mesh_{h} = "template/{h}.surf.gii"', f'mesh_{h} = "template/{h}.surf.gii"')
    text = text.replace("# time_start = -0.1", "time_start = -0.008")
    text = text.replace("# sampling_interval = 0.004", "sampling_interval = 0.004")
    (study / "analysis.toml").write_text(text)
    assert main(["check", str(study / "analysis.toml")]) == 0, capsys.readouterr()
    assert "sessions     : 1" in capsys.readouterr().out


def test_a_missing_hemisphere_is_named(tmp_path, capsys):
    study = tmp_path / "maps"
    study.mkdir()
    for name in ("sub-01_cond-a_hemi-L.func.gii", "sub-01_cond-a_hemi-R.func.gii",
                 "sub-02_cond-a_hemi-L.func.gii"):
        (study / name).write_bytes(b"")
    assert main(["init", str(study)]) == 1
    err = capsys.readouterr().err
    assert "sub-02_cond-a_hemi-L.func.gii: has no right-hemisphere partner" in err, err
