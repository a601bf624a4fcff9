"""Map, mask and atlas files: damaged files and files used twice.

A gzip file carries the CRC-32 and length of its data in an 8-byte trailer
(RFC 1952, section 2.3.1); a truncated or altered file fails that check.  A
file used for two rows gives a zero within-participant contrast or a copied
participant, a wrong answer without an error, so it is refused.
"""

import gzip
import os
import shutil

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from conftest import AFFINE, SHAPE, copy_cohort, write_mask
from test_check import assert_refused


@pytest.fixture
def cohort_copy(tiny_cohort, tmp_path):
    return copy_cohort(tiny_cohort, tmp_path / "broken")


def _maps(a):
    return pd.read_csv(a.parent / "maps.tsv", sep="\t", dtype=str, keep_default_na=False)


def _save_maps(a, df):
    df.to_csv(a.parent / "maps.tsv", sep="\t", index=False)


def _truncate(path, keep=0.6):
    raw = path.read_bytes()
    path.write_bytes(raw[:int(len(raw) * keep)])
    # the damage is past the header: nibabel still reads the header (outside reader)
    assert len(nib.load(str(path)).shape) >= 3


def _flip(path, offset):
    raw = bytearray(path.read_bytes())
    raw[offset] ^= 0xFF
    path.write_bytes(bytes(raw))


# ---------------------------------------------------------------------------
# damaged files: named, with the row, for maps, mask and atlas
# ---------------------------------------------------------------------------

def test_truncated_map(cohort_copy, tmp_path, capsys):
    rel = _maps(cohort_copy).loc[0, "path"]
    _truncate(cohort_copy.parent / rel)
    assert_refused(cohort_copy, capsys, [f"maps.tsv row 2 ({cohort_copy.parent / rel})",
                                         "cannot be decoded", "truncated or damaged"],
                   out=tmp_path / "out")


def test_map_with_a_wrong_crc(cohort_copy, tmp_path, capsys):
    # the last 8 bytes are CRC-32 then length (RFC 1952): altering the CRC leaves the
    # data intact, so only a reader that checks the trailer notices
    rel = _maps(cohort_copy).loc[3, "path"]
    path = cohort_copy.parent / rel
    _flip(path, len(path.read_bytes()) - 6)
    with pytest.raises(gzip.BadGzipFile):      # Python's gzip module is the outside check
        gzip.decompress(path.read_bytes())
    assert_refused(cohort_copy, capsys, ["maps.tsv row 5", "cannot be decoded", "CRC"],
                   out=tmp_path / "out")


def test_map_with_a_damaged_byte_inside(cohort_copy, capsys):
    rel = _maps(cohort_copy).loc[5, "path"]
    path = cohort_copy.parent / rel
    _flip(path, len(path.read_bytes()) // 2)
    assert_refused(cohort_copy, capsys, ["maps.tsv row 7", "cannot be decoded"])


def test_truncated_map_without_a_mask(cohort_copy, capsys):
    # without a mask every map is scanned for the default mask first
    cohort_copy.write_text(cohort_copy.read_text().replace('mask = "mask.nii.gz"\n', ""))
    rel = _maps(cohort_copy).loc[2, "path"]
    _truncate(cohort_copy.parent / rel)
    assert_refused(cohort_copy, capsys, ["maps.tsv row 4", "cannot be decoded"])


def test_truncated_uncompressed_map(cohort_copy, capsys):
    m = _maps(cohort_copy)
    src = cohort_copy.parent / m.loc[1, "path"]
    dst = src.with_name(src.name.replace(".nii.gz", ".nii"))
    dst.write_bytes(gzip.decompress(src.read_bytes()))
    src.unlink()
    m.loc[1, "path"] = str(dst.relative_to(cohort_copy.parent))
    _save_maps(cohort_copy, m)
    _truncate(dst)
    assert_refused(cohort_copy, capsys, ["maps.tsv row 3", "cannot be decoded"])


def test_truncated_map_reported_with_other_problems(cohort_copy, capsys):
    _truncate(cohort_copy.parent / _maps(cohort_copy).loc[0, "path"])
    (cohort_copy.parent / _maps(cohort_copy).loc[9, "path"]).unlink()
    assert_refused(cohort_copy, capsys, ["maps.tsv row 2", "cannot be decoded",
                                         "maps.tsv row 11", "map file not found"])


def test_folder_where_a_map_is_expected(cohort_copy, tmp_path, capsys):
    path = cohort_copy.parent / _maps(cohort_copy).loc[4, "path"]
    path.unlink()
    path.mkdir()
    assert_refused(cohort_copy, capsys, ["maps.tsv row 6", "is a folder"], out=tmp_path / "out")


def test_truncated_mask(cohort_copy, tmp_path, capsys):
    # a larger mask so that the cut falls after the header
    mask = np.zeros(SHAPE)
    mask[1:5, 1:6, 1:4] = 1
    nib.save(nib.Nifti1Image(mask, AFFINE), str(cohort_copy.parent / "mask.nii.gz"))
    _truncate(cohort_copy.parent / "mask.nii.gz", keep=0.8)
    assert_refused(cohort_copy, capsys, ["mask.nii.gz", "cannot be decoded"], out=tmp_path / "out")


def test_truncated_atlas(cohort_copy, capsys):
    # integer labels stored as float64, so that the file is long enough for a cut
    # past the header
    labels = np.random.default_rng(0).integers(0, 3, SHAPE).astype(np.float64)
    nib.save(nib.Nifti1Image(labels, AFFINE), str(cohort_copy.parent / "atlas.nii.gz"))
    _truncate(cohort_copy.parent / "atlas.nii.gz", keep=0.9)
    (cohort_copy.parent / "atlas.tsv").write_text("index\tname\n1\tfront\n2\tback\n")
    cohort_copy.write_text(cohort_copy.read_text().replace(
        'mask = "mask.nii.gz"', 'mask = "mask.nii.gz"\natlas = "atlas.nii.gz"\n'
        'atlas_labels = "atlas.tsv"'))
    assert_refused(cohort_copy, capsys, ["atlas.nii.gz", "cannot be decoded"])


def test_atlas_lookup_index_must_be_an_integer(cohort_copy, capsys):
    write_mask(cohort_copy.parent / "atlas.nii.gz", np.ones(SHAPE, np.uint8))
    (cohort_copy.parent / "atlas.tsv").write_text("index\tname\n1.5\tfront\n")
    cohort_copy.write_text(cohort_copy.read_text().replace(
        'mask = "mask.nii.gz"', 'mask = "mask.nii.gz"\natlas = "atlas.nii.gz"\n'
        'atlas_labels = "atlas.tsv"'))
    assert_refused(cohort_copy, capsys, ["atlas.tsv row 2", "'1.5' is not an integer"])


# ---------------------------------------------------------------------------
# one file for two rows
# ---------------------------------------------------------------------------

def test_same_path_for_two_conditions(cohort_copy, tmp_path, capsys):
    m = _maps(cohort_copy)
    m.loc[1, "path"] = "./maps/../" + m.loc[0, "path"]   # sub-01 frequent -> sub-01 rare
    _save_maps(cohort_copy, m)
    real = (cohort_copy.parent / m.loc[0, "path"]).resolve()
    assert_refused(cohort_copy, capsys,
                   ["maps.tsv rows 2, 3", f"the same file {real}",
                    "participant 'sub-01' condition 'rare'",
                    "participant 'sub-01' condition 'frequent'"], out=tmp_path / "out")


def test_symlink_to_another_row_file(cohort_copy, capsys):
    m = _maps(cohort_copy)
    link = cohort_copy.parent / "maps" / "link.nii.gz"
    os.symlink(cohort_copy.parent / m.loc[6, "path"], link)
    m.loc[8, "path"] = "maps/link.nii.gz"                 # another participant's map
    _save_maps(cohort_copy, m)
    assert_refused(cohort_copy, capsys, ["maps.tsv rows 8, 10", "the same file"])


def test_copied_file_for_two_participants(cohort_copy, tmp_path, capsys):
    m = _maps(cohort_copy)
    shutil.copyfile(cohort_copy.parent / m.loc[2, "path"], cohort_copy.parent / m.loc[12, "path"])
    assert_refused(cohort_copy, capsys,
                   ["maps.tsv rows 4, 14", "identical content", m.loc[2, "path"],
                    m.loc[12, "path"]], out=tmp_path / "out")


def test_symlink_loop_as_map_path(cohort_copy, capsys):
    m = _maps(cohort_copy)
    a, b = cohort_copy.parent / "maps" / "loop_a.nii.gz", cohort_copy.parent / "maps" / "loop_b.nii.gz"
    os.symlink(b, a)
    os.symlink(a, b)
    m.loc[3, "path"] = "maps/loop_a.nii.gz"
    _save_maps(cohort_copy, m)
    assert_refused(cohort_copy, capsys, ["maps.tsv row 5", "map file not found"])


def test_map_with_a_non_finite_affine(cohort_copy, capsys):
    path = cohort_copy.parent / _maps(cohort_copy).loc[7, "path"]
    img = nib.load(str(path))
    aff = img.affine.copy()
    aff[1, 3] = np.nan
    out = nib.Nifti1Image(np.asanyarray(img.dataobj), aff, img.header)
    out.set_sform(aff, code=2)
    out.set_qform(None, code=0)
    nib.save(out, str(path))
    assert np.isnan(nib.load(str(path)).affine[1, 3])   # nibabel reads the NaN back
    assert_refused(cohort_copy, capsys, ["maps.tsv row 9", "affine", "NaN"])
