"""Rearrangement sets: counts, exactness, seed determinism.

Counts of distinct rearrangements are combinatorics (common practice): 2^n
sign vectors; n! / prod(n_g!) distinct relabellings of n observations in
classes of sizes n_g (the multinomial coefficient; C(a + b, a) for two
groups); the product of the per-block counts when rearrangements stay within
exchangeability blocks (Winkler et al. 2015, NeuroImage 123:253-268).
"""

import math

import numpy as np
import pytest

from groupsrc.stats import resampling as rs


def test_sign_flip_exact_enumeration():
    r = rs.sign_flips(7, 128, seed=3)
    assert r.exact and r.n_resamples == 128      # 2**7 distinct sign vectors (combinatorics)
    assert np.all(r.matrix[0] == 1)
    assert len({tuple(v) for v in r.matrix}) == 128


def test_sign_flip_random_identity_first_and_seeded():
    a = rs.sign_flips(20, 50, seed=9)
    b = rs.sign_flips(20, 50, seed=9)
    c = rs.sign_flips(20, 50, seed=10)
    assert not a.exact and a.n_resamples == 50
    # the identity is one of the m rearrangements (Phipson & Smyth 2010)
    assert np.all(a.matrix[0] == 1)
    np.testing.assert_array_equal(a.matrix, b.matrix)
    assert not np.array_equal(a.matrix, c.matrix)


def test_two_group_enumerates_combinations():
    labels = [0] * 4 + [1] * 3
    r = rs.permutations(7, 10_000, seed=0, labels=labels)
    # distinct relabellings C(7, 3) = 35 (combinatorics, common practice)
    assert r.exact and r.n_resamples == math.comb(7, 3)
    np.testing.assert_array_equal(r.matrix[0], np.arange(7))
    # every row is a permutation and the group-1 member sets are all distinct
    assert all(sorted(row) == list(range(7)) for row in r.matrix)
    sets = {frozenset(row[4:]) for row in r.matrix}
    assert len(sets) == 35


def test_blocks_permute_within_blocks():
    blocks = np.array([0, 0, 0, 1, 1, 1, 1])
    r = rs.permutations(7, 200, seed=1, blocks=blocks)
    # exact: 3! * 4! = 144 <= 200 within-block orders (combinatorics;
    # within-block exchangeability, Winkler et al. 2015)
    assert r.exact and r.n_resamples == 144
    assert np.all(blocks[r.matrix] == blocks)
    r2 = rs.permutations(12, 100, seed=1, blocks=np.repeat([0, 1, 2], 4))
    assert not r2.exact
    assert np.all(np.repeat([0, 1, 2], 4)[r2.matrix] == np.repeat([0, 1, 2], 4))


def test_count_multinomial():
    # 3-level factor with sizes 2, 2, 3: multinomial 7! / (2! 2! 3!) = 210
    # (combinatorics, common practice)
    assert rs.count_distinct_permutations(labels=[0, 0, 1, 1, 2, 2, 2]) == 210


def test_null_p_values_counts_identity():
    # p = (b + 1) / (m + 1) for b of m random resamples reaching the observed
    # value, the identity counted once (Phipson & Smyth 2010, Stat Appl Genet
    # Mol Biol 9:39).  The null holds the identity's maximum (5) first, then
    # m = 4 random maxima.
    identity, random = 5.0, np.array([1.0, 2.0, 6.0, 5.0])
    null = np.r_[identity, random]
    for obs in (5.0, 4.0, 2.0, 0.5):            # observed values <= the identity's maximum
        b = int(np.sum(random >= obs))
        want = (b + 1) / (random.size + 1)
        assert rs.null_p_values(null, [obs])[0] == pytest.approx(want, abs=1e-15)
    # never zero for the observed maximum itself (Phipson & Smyth 2010)
    assert rs.null_p_values(null, [identity])[0] >= 1 / null.size


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
    assert r.exact and r.n_resamples == 2 * 6                   # 2! * 3! (combinatorics)
    assert np.all(blocks[r.matrix] == blocks)
