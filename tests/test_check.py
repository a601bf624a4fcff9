"""`groupsrc check` on a clean cohort and on copies broken in each listed way.

Each broken copy must exit 1 and name the file / row / column of every problem.
"""

import hashlib

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from conftest import AFFINE, N_T, SHAPE, copy_cohort, write_map
from groupsrc.cli import main


def run_check(analysis, capsys):
    rc = main(["check", str(analysis)])
    out = capsys.readouterr()
    return rc, out.out + out.err


def tree_hashes(root):
    return {p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


def assert_refused(analysis, capsys, fragments, out=None):
    """`check` (and `run` when ``out`` is given) exit 1 naming every fragment.

    The acceptance rule for bad input: exit code 1, no traceback, the culprit
    named, every file of the cohort folder byte-identical afterwards, and no
    results folder written.  ``cli.main`` lets any exception other than
    InputError through, so a traceback also fails the test.
    """
    root = analysis.parent
    before = tree_hashes(root)
    commands = [["check", str(analysis)]]
    if out is not None:
        commands.append(["run", str(analysis), "--out", str(out)])
    texts = []
    for argv in commands:
        rc = main(argv)
        cap = capsys.readouterr()
        text = cap.out + cap.err
        assert rc == 1, f"{argv[0]} exited {rc}:\n{text}"
        assert "Traceback" not in text, text
        for fragment in fragments:
            assert fragment in text, f"{argv[0]}: {fragment!r} not in:\n{text}"
        assert tree_hashes(root) == before, f"{argv[0]} changed an input file"
        texts.append(text)
    if out is not None:
        assert not out.exists(), "a refused run wrote a results folder"
    return texts[0]


def test_clean_cohort_exits_0(tiny_cohort, capsys):
    rc, text = run_check(tiny_cohort, capsys)
    assert rc == 0, text
    assert "no problems found" in text
    # every expected value is read from the fixture's files by outside readers
    # (nibabel for the NIfTI files, pandas for the tables), not taken from groupsrc
    root = tiny_cohort.parent
    mask = nib.load(str(root / "mask.nii.gz"))
    n_sources = int(np.count_nonzero(np.asanyarray(mask.dataobj)))
    voxel = " x ".join(f"{float(v):g}" for v in mask.header.get_zooms()[:3])
    parts = pd.read_csv(root / "participants.tsv", sep="\t", dtype=str)
    groups = ", ".join(f"{g} {n}" for g, n in parts["group"].value_counts().sort_index().items())
    maps = pd.read_csv(root / "maps.tsv", sep="\t", dtype=str)
    first = nib.load(str(root / maps.loc[0, "path"])).header
    n_t, dt_ms = first.get_data_shape()[3], float(first["pixdim"][4]) * 1e3   # unit: seconds
    t0_ms = float(first["toffset"]) * 1e3
    lines = text.splitlines()
    assert f"  participants : {len(parts)} ({groups})" in lines, text
    assert f"  maps         : {len(maps)}" in lines, text
    assert f"  sources      : {n_sources} (voxel {voxel} mm)" in lines, text
    assert (f"  samples      : {n_t}, {t0_ms:g} to {t0_ms + (n_t - 1) * dt_ms:g} ms "
            f"every {dt_ms:g} ms") in lines, text


def test_usage_error_exits_2(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["run"])
    assert exc.value.code == 2
    assert main([]) == 2


def _maps(a):
    return pd.read_csv(a.parent / "maps.tsv", sep="\t", dtype=str)


def _parts(a):
    return pd.read_csv(a.parent / "participants.tsv", sep="\t", dtype=str)


def _save(df, path):
    df.to_csv(path, sep="\t", index=False)


def _map_path(a, row):
    return a.parent / _maps(a).loc[row, "path"]


def break_missing_file(a):
    _map_path(a, 0).unlink()
    return ["row 2", "map file not found"]


def break_not_nifti(a):
    _map_path(a, 1).write_bytes(b"this is not an image\n" * 10)
    return ["row 3", "cannot be read as NIfTI"]


def break_3d(a):
    write_map(_map_path(a, 2), np.zeros(SHAPE, np.float32))
    return ["row 4", "is 3D", "4D map"]


def break_shape(a):
    write_map(_map_path(a, 3), np.zeros((6, 7, 6, N_T), np.float32))
    return ["row 5", "grid shape (6, 7, 6) differs"]


def break_affine(a):
    aff = AFFINE.copy()
    aff[0, 3] += 2.5
    write_map(_map_path(a, 4), np.zeros(SHAPE + (N_T,), np.float32), affine=aff)
    return ["row 6", "affine differs", "2.5 mm"]


def break_time(a):
    write_map(_map_path(a, 5), np.zeros(SHAPE + (N_T,), np.float32), dt=0.002)
    return ["row 7", "time axis", "every 2 ms"]


def break_nan(a):
    p = _map_path(a, 6)
    data = np.asanyarray(nib.load(str(p)).dataobj).copy()
    data[2, 2, 2, :3] = np.nan
    data[3, 3, 2, 0] = np.inf
    write_map(p, data)
    return ["row 8", "4 NaN/Inf value(s) inside the mask"]


def break_duplicate(a):
    m = _maps(a)
    _save(pd.concat([m, m.iloc[[0]]], ignore_index=True), a.parent / "maps.tsv")
    return ["rows 2, 18", "duplicate map for (participant_id='sub-01', condition='rare')"]


def break_unknown_participant(a):
    m = _maps(a)
    m.loc[0, "participant_id"] = "sub-99"
    m.loc[1, "participant_id"] = "sub-99"
    _save(m, a.parent / "maps.tsv")
    return ["participant 'sub-99' is not in participants.tsv",
            "participant 'sub-01' has no maps in maps.tsv"]


def break_missing_column(a):
    _save(_parts(a).drop(columns=["age"]), a.parent / "participants.tsv")
    return ["column 'age'", "named by the model but missing"]


def break_rare_level(a):
    p = _parts(a)
    p.loc[0, "group"] = "sibling"
    _save(p, a.parent / "participants.tsv")
    return ["column 'group'", "level 'sibling' has only 1 participant"]


def break_rank(a):
    p = _parts(a)
    p["age_months"] = (p["age"].astype(int) * 12).astype(str)
    _save(p, a.parent / "participants.tsv")
    text = a.read_text().replace('between = "group + age"', 'between = "group + age + age_months"')
    a.write_text(text)
    return ["rank-deficient", "age_months"]


def break_key(a):
    text = a.read_text().replace("forming_p = 0.05", "froming_p = 0.05")
    a.write_text(text.replace("[model]", "[model]\nbetwen = \"group\""))
    return ["key 'froming_p'", "did you mean 'forming_p'?", "key 'betwen'",
            "did you mean 'between'?"]


BREAKERS = [break_missing_file, break_not_nifti, break_3d, break_shape, break_affine,
            break_time, break_nan, break_duplicate, break_unknown_participant,
            break_missing_column, break_rare_level, break_rank, break_key]


@pytest.mark.parametrize("breaker", BREAKERS, ids=lambda f: f.__name__)
def test_each_broken_copy_exits_1_and_names_the_problem(tiny_cohort, tmp_path, capsys, breaker):
    a = copy_cohort(tiny_cohort, tmp_path / "broken")
    expected = breaker(a)
    before = tree_hashes(a.parent)
    rc, text = run_check(a, capsys)
    assert rc == 1, text
    for fragment in expected:
        assert fragment in text, f"{fragment!r} not in:\n{text}"
    # no input file is ever modified
    assert tree_hashes(a.parent) == before


def test_every_problem_reported_at_once(tiny_cohort, tmp_path, capsys):
    a = copy_cohort(tiny_cohort, tmp_path / "many")
    # file-level problems that do not stop the others from being found
    expected = []
    for breaker in (break_missing_file, break_not_nifti, break_affine, break_time,
                    break_duplicate, break_rare_level):
        expected += breaker(a)
    rc, text = run_check(a, capsys)
    assert rc == 1
    missing = [e for e in expected if e not in text]
    assert not missing, f"not reported: {missing}\n{text}"
    import re
    n_listed = int(re.search(r"(\d+) problems found", text).group(1))
    assert n_listed >= 6  # at least one line per breaker above


def test_settings_problems_collected_together(tiny_cohort, tmp_path, capsys):
    a = copy_cohort(tiny_cohort, tmp_path / "settings")
    text = a.read_text().replace('correction = "cluster-mass"', 'correction = "clustermass"')
    text = text.replace("resamples = 50", "resamples = 0")
    text += '\n[[contrasts]]\nname = "bad name!"\n'
    a.write_text(text)
    rc, out = run_check(a, capsys)
    assert rc == 1
    for frag in ["did you mean 'cluster-mass'?", "resamples", "must be from 1 to 1,000,000",
                 "contrast 'bad name!'", "says nothing to test"]:
        assert frag in out, out


def test_second_check_reuses_the_cache(tiny_cohort, capsys):
    assert run_check(tiny_cohort, capsys)[0] == 0
    rc, text = run_check(tiny_cohort, capsys)
    assert rc == 0 and "loading cache: reused" in text


def test_cache_invalidated_when_a_map_changes(tiny_cohort, capsys):
    from groupsrc.pipeline import prepare
    from groupsrc.inputs.settings import parse_settings
    s = parse_settings(tiny_cohort)
    first = np.array(prepare(s).cohort.Y)
    p = tiny_cohort.parent / _maps(tiny_cohort).loc[0, "path"]
    data = np.asanyarray(nib.load(str(p)).dataobj).copy()
    data[2, 2, 2, :] += 5.0
    write_map(p, data)
    prep = prepare(parse_settings(tiny_cohort))
    assert not prep.cohort.cache_hit
    assert not np.array_equal(np.asarray(prep.cohort.Y), first)
    # loaded values equal the file's voxel values (nibabel is the reference reader)
    src = prep.cohort.grid.ijk.tolist().index([2, 2, 2])
    # (the stored maps are centred and scaled, inputs/units.py; raw() undoes it)
    np.testing.assert_allclose(prep.cohort.raw(0, src), data[2, 2, 2, :], rtol=1e-6,
                               atol=1e-6 * prep.cohort.units.scale)


def test_time_axis_in_milliseconds_is_understood(tiny_cohort, tmp_path, capsys):
    a = copy_cohort(tiny_cohort, tmp_path / "ms")
    for rel in _maps(a)["path"]:
        p = a.parent / rel
        data = np.asanyarray(nib.load(str(p)).dataobj)
        write_map(p, data, tunit="msec")  # same times written in ms (NIfTI-1 xyzt_units = 16)
    rc, text = run_check(a, capsys)
    assert rc == 0, text
    assert "-8 to 24 ms every 4 ms" in text


def test_time_override_in_analysis_file(tiny_cohort, tmp_path, capsys):
    a = copy_cohort(tiny_cohort, tmp_path / "override")
    a.write_text(a.read_text().replace('mask = "mask.nii.gz"',
                                       'mask = "mask.nii.gz"\ntime_start = 0.1\nsampling_interval = 0.002'))
    rc, text = run_check(a, capsys)
    assert rc == 0, text
    assert "100 to 116 ms every 2 ms" in text


def test_default_mask_is_finite_sources(tiny_cohort, tmp_path, capsys):
    a = copy_cohort(tiny_cohort, tmp_path / "nomask")
    a.write_text(a.read_text().replace('mask = "mask.nii.gz"\n', ""))
    rc, text = run_check(a, capsys)
    assert rc == 0, text
    # expected: voxels finite and not constantly zero in every map, read with nibabel
    keep = None
    for rel in _maps(a)["path"]:
        img = nib.load(str(a.parent / rel))
        data = np.asanyarray(img.dataobj)
        ok = np.isfinite(data).all(axis=3) & ~(data == 0).all(axis=3)
        keep = ok if keep is None else keep & ok
    voxel = " x ".join(f"{float(v):g}" for v in img.header.get_zooms()[:3])
    assert f"  sources      : {int(keep.sum())} (voxel {voxel} mm)" in text.splitlines(), text


def test_atlas_is_checked_against_the_grid(tiny_cohort, tmp_path, capsys):
    from conftest import write_mask
    a = copy_cohort(tiny_cohort, tmp_path / "atlas")
    lab = np.zeros(SHAPE, np.uint8)
    lab[1:3] = 1
    lab[3:5] = 2
    write_mask(a.parent / "atlas.nii.gz", lab)
    (a.parent / "atlas.tsv").write_text("index\tname\n1\tfront\n")
    a.write_text(a.read_text().replace('mask = "mask.nii.gz"',
                                       'mask = "mask.nii.gz"\natlas = "atlas.nii.gz"\n'
                                       'atlas_labels = "atlas.tsv"'))
    rc, text = run_check(a, capsys)
    assert rc == 1 and "labels [2] occur in the atlas but not in the table" in text
    (a.parent / "atlas.tsv").write_text("index\tname\n1\tfront\n2\tback\n")
    rc, text = run_check(a, capsys)
    assert rc == 0, text


def test_a_cohort_too_small_to_reach_alpha_is_refused(tmp_path, capsys):
    """Two per group: 2^4 = 16 sign vectors (two-sided, the all-minus mirror: p >= 2/16)
    and C(4, 2) = 6 group relabellings (equal groups mirror: p >= 2/6) -- counts of
    combinatorics (common practice) -- so neither contrast could ever reach 0.05; the age
    slope has 4! = 24 orderings (p >= 1/24) and passes."""
    from conftest import make_cohort
    analysis = make_cohort(tmp_path / "c", n_per_group=2)
    text = assert_refused(analysis, capsys, ["contrast 'rare_minus_frequent'", "0.125",
                                             "contrast 'group_by_tone'", "0.333",
                                             "could never be significant",
                                             "more participants"], out=tmp_path / "out")
    assert "contrast 'age_slope'" not in text


def test_too_few_resamples_for_alpha_is_refused(tiny_cohort, tmp_path, capsys):
    """resamples = 10 in the analysis file: the identity among 10 draws, p >= 1/10
    (Phipson & Smyth 2010), refused by check; --resamples 10 on the command line runs
    with a notice (an exploratory run, options.py)."""
    import re
    text = tiny_cohort.read_text()
    tiny_cohort.write_text(re.sub(r"resamples = \d+", "resamples = 10", text))
    rc = main(["check", str(tiny_cohort)])
    out = capsys.readouterr()
    out = out.out + out.err
    assert rc == 1 and "0.1 (10 distinct rearrangements" in out and "more resamples" in out
    tiny_cohort.write_text(text)
    rc = main(["run", str(tiny_cohort), "--out", str(tmp_path / "out"), "--resamples", "10",
               "--quiet"])
    out = capsys.readouterr().err
    assert rc == 0 and "at least 20" in out, out
