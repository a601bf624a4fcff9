"""The loading cache is never served stale.

A file rewritten with the same size and its modification time restored must
not reuse the memoised content hash (cache.py docstring: the fingerprint
rule).  The reference for "what the file now holds" is nibabel reading it.
"""

import gzip
import os
import time

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from conftest import copy_cohort
from groupsrc.inputs import cache
from groupsrc.inputs.cache import HashIndex, sha256_file

BIG = 3 * cache.SAMPLE_BYTES     # the middle third lies outside the sampled ends


def _rewrite_same_size(path, offset, payload):
    """Change bytes in place, then put the modification time back."""
    st = os.stat(path)
    with open(path, "r+b") as fh:
        fh.seek(offset)
        fh.write(payload)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    after = os.stat(path)
    assert (after.st_size, after.st_mtime_ns) == (st.st_size, st.st_mtime_ns)


@pytest.fixture
def settled(monkeypatch):
    """Memoise hashes of files written just now (the racy-file rule off), and let the
    file-system clock tick before the next write."""
    monkeypatch.setattr(cache, "RACY_SECONDS", 0.0)
    return lambda: time.sleep(0.05)


def test_same_size_rewrite_with_restored_mtime_is_rehashed(tmp_path, settled):
    # a change in the middle of a large file: only the inode change time reveals it
    f = tmp_path / "big.bin"
    f.write_bytes(bytes(BIG))
    index = HashIndex(tmp_path / "c")
    first = index.sha256(f)
    settled()
    _rewrite_same_size(f, BIG // 2, b"\x01")
    assert index.sha256(f) == sha256_file(f) != first


def test_sample_catches_a_change_when_stat_fields_cannot(tmp_path, settled, monkeypatch):
    # on a file system whose times say nothing, the sampled ends still do
    monkeypatch.setattr(cache, "_stat_part", lambda st: "same")
    f = tmp_path / "big.bin"
    f.write_bytes(bytes(BIG))
    index = HashIndex(tmp_path / "c")
    first = index.sha256(f)
    _rewrite_same_size(f, BIG - 3, b"\x01")
    assert index.sha256(f) == sha256_file(f) != first


def test_recently_changed_file_is_not_memoised(tmp_path):
    f = tmp_path / "big.bin"
    f.write_bytes(bytes(BIG))
    index = HashIndex(tmp_path / "c")
    index.sha256(f)
    assert str(f.resolve()) not in index.data   # written just now: racy, hashed every time


def test_unchanged_file_reuses_the_memo(tmp_path, settled, monkeypatch):
    f = tmp_path / "big.bin"
    f.write_bytes(bytes(BIG))
    index = HashIndex(tmp_path / "c")
    digest = index.sha256(f)
    index.save()
    again = HashIndex(tmp_path / "c")
    monkeypatch.setattr(cache, "sha256_file", lambda p: pytest.fail("hashed again"))
    assert again.sha256(f) == digest


def test_stale_cache_is_never_served_end_to_end(tiny_cohort, tmp_path, settled):
    from groupsrc.pipeline import prepare
    from groupsrc.inputs.settings import parse_settings
    a = copy_cohort(tiny_cohort, tmp_path / "copy")
    maps = pd.read_csv(a.parent / "maps.tsv", sep="\t", dtype=str)
    src = a.parent / maps.loc[0, "path"]
    nii = src.with_name(src.name.replace(".nii.gz", ".nii"))
    nii.write_bytes(gzip.decompress(src.read_bytes()))
    maps.loc[0, "path"] = str(nii.relative_to(a.parent))
    maps.to_csv(a.parent / "maps.tsv", sep="\t", index=False)
    prep = prepare(parse_settings(a))
    src_k = prep.cohort.grid.ijk.tolist().index([2, 2, 2])
    settled()
    # overwrite voxel (2, 2, 2) at the first sample in place: same size, mtime restored
    img = nib.load(str(nii))
    offset = int(img.dataobj.offset) + 4 * np.ravel_multi_index((2, 2, 2, 0), img.shape,
                                                                order="F")
    _rewrite_same_size(nii, offset, np.float32(123.0).tobytes())
    prep = prepare(parse_settings(a))
    assert not prep.cohort.cache_hit
    expected = np.asanyarray(nib.load(str(nii)).dataobj)[2, 2, 2, :]   # nibabel as reference
    assert expected[0] == 123.0
    np.testing.assert_allclose(prep.cohort.raw(0, src_k), expected, rtol=1e-6,
                               atol=1e-6 * prep.cohort.units.scale)     # inputs/units.py
