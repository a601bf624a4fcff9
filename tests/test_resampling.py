"""Rearrangement sets: counts, exactness, seed determinism."""

import math

import numpy as np
import pytest

from groupsrc import resampling as rs


def test_sign_flip_exact_enumeration():
    r = rs.sign_flips(7, 128, seed=3)
    assert r.exact and r.n_resamples == 128      # 2**7 distinct sign vectors
    assert np.all(r.matrix[0] == 1)
    assert len({tuple(v) for v in r.matrix}) == 128


def test_sign_flip_random_identity_first_and_seeded():
    a = rs.sign_flips(20, 50, seed=9)
    b = rs.sign_flips(20, 50, seed=9)
    c = rs.sign_flips(20, 50, seed=10)
    assert not a.exact and a.n_resamples == 50
    assert np.all(a.matrix[0] == 1)
    np.testing.assert_array_equal(a.matrix, b.matrix)
    assert not np.array_equal(a.matrix, c.matrix)


def test_two_group_enumerates_combinations():
    labels = [0] * 4 + [1] * 3
    r = rs.permutations(7, 10_000, seed=0, labels=labels)
    assert r.exact and r.n_resamples == math.comb(7, 3)  # distinct relabellings C(7, 3)
    np.testing.assert_array_equal(r.matrix[0], np.arange(7))
    # every row is a permutation and the group-1 member sets are all distinct
    assert all(sorted(row) == list(range(7)) for row in r.matrix)
    sets = {frozenset(row[4:]) for row in r.matrix}
    assert len(sets) == 35


def test_blocks_permute_within_blocks():
    blocks = np.array([0, 0, 0, 1, 1, 1, 1])
    r = rs.permutations(7, 200, seed=1, blocks=blocks)
    # exact: 3! * 4! = 144 <= 200
    assert r.exact and r.n_resamples == 144
    assert np.all(blocks[r.matrix] == blocks)
    r2 = rs.permutations(12, 100, seed=1, blocks=np.repeat([0, 1, 2], 4))
    assert not r2.exact
    assert np.all(np.repeat([0, 1, 2], 4)[r2.matrix] == np.repeat([0, 1, 2], 4))


def test_count_multinomial():
    # 3-level factor with sizes 2, 2, 3: 7! / (2! 2! 3!) = 210
    assert rs.count_distinct_permutations(labels=[0, 0, 1, 1, 2, 2, 2]) == 210


def test_null_p_values_counts_identity():
    null = np.array([5.0, 1.0, 2.0, 6.0])
    np.testing.assert_allclose(rs.null_p_values(null, [5.0, 0.5, 7.0]), [0.5, 1.0, 0.0])


def test_bad_inputs():
    with pytest.raises(ValueError):
        rs.sign_flips(5, 0)
    with pytest.raises(TypeError):
        rs.sign_flips(5, 10, seed=1.5)
    with pytest.raises(ValueError):
        rs.rearrangements("shuffle", 5, 10)


def test_string_blocks_from_a_table():
    blocks = np.array(["a", "a", "b", "b", "b"], dtype=object)   # as pandas .to_numpy() gives
    r = rs.permutations(5, 100, seed=0, blocks=blocks)
    assert r.exact and r.n_resamples == 2 * 6                   # 2! * 3!
    assert np.all(blocks[r.matrix] == blocks)
