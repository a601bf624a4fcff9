"""Rearrangements of observations: sign flips and permutations.

A set of rearrangements is generated once, up front, from the seed alone, so
the null distribution never depends on how resamples are later split into
batches or spread over workers.

* Sign flips (one-sample data, within-participant differences): each
  observation's sign is flipped independently; there are ``2**n`` distinct
  vectors.
* Permutations (between-participant designs): observations are reordered,
  optionally only within exchangeability blocks.  Observations whose design
  rows (``labels``) are identical are interchangeable, so the number of
  distinct relabellings is the multinomial coefficient ``n! / prod(n_g!)``
  (product over blocks) -- for two groups of sizes a and b, ``C(a+b, a)``.

When the number of distinct rearrangements is at most the number requested,
all of them are enumerated, each once (identity included), and the resulting
p-values are exact.  Otherwise the identity comes first followed by
``n_resamples - 1`` independent random draws.

P-values count the identity in numerator and denominator,
``p = #(stat >= observed) / m`` over the ``m`` rearrangements including the
identity (Phipson & Smyth 2010, Stat Appl Genet Mol Biol 9:39).

Examples
--------
>>> r = sign_flips(3, 100, seed=1)
>>> r.exact, r.matrix.shape, r.matrix[0].tolist()
(True, (8, 3), [1, 1, 1])
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

#: never enumerate more than this many rearrangements, whatever was asked
_MAX_ENUMERATE = 2_000_000


@dataclass(frozen=True)
class Rearrangements:
    """A fixed set of rearrangements.

    Attributes
    ----------
    kind : "sign-flip" or "permutation"
    matrix : (m, n) array
        int8 sign vectors (+1/-1) or int64 index permutations; row 0 is the
        identity.  For a permutation row ``perm``, rearranged data are
        ``data[perm]`` (row i receives observation ``perm[i]``).
    exact : bool
        True when every distinct rearrangement is present exactly once.
    seed : int
    """

    kind: str
    matrix: np.ndarray
    exact: bool
    seed: int

    @property
    def n_resamples(self) -> int:
        return int(self.matrix.shape[0])

    def apply(self, data):
        """Rearranged copies of ``data`` (n, ...): shape (m, n, ...)."""
        data = np.asarray(data)
        if self.kind == "sign-flip":
            return self.matrix.reshape(self.matrix.shape + (1,) * (data.ndim - 1)) * data
        return data[self.matrix]


def _check_seed(seed):
    if seed is None:
        return int(np.random.SeedSequence().entropy % (2 ** 63))
    if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, (int, np.integer)):
        raise TypeError(f"seed must be an integer or None, got {seed!r}")
    if seed < 0:
        raise ValueError(f"seed must be non-negative, got {seed}")
    return int(seed)


def _check_count(n, n_resamples):
    if int(n) < 1:
        raise ValueError(f"need at least one observation, got {n}")
    if int(n_resamples) < 1:
        raise ValueError(f"n_resamples must be at least 1, got {n_resamples}")
    return int(n), int(n_resamples)


def sign_flips(n, n_resamples, seed=None) -> Rearrangements:
    """Sign-flip vectors for ``n`` observations.

    Exact enumeration of all ``2**n`` vectors when ``2**n <= n_resamples``.

    Examples
    --------
    >>> sign_flips(7, 128, seed=0).exact
    True
    >>> sign_flips(7, 100, seed=0).matrix.shape
    (100, 7)
    """
    n, n_resamples = _check_count(n, n_resamples)
    seed = _check_seed(seed)
    if n < 63 and 2 ** n <= min(n_resamples, _MAX_ENUMERATE):
        k = np.arange(2 ** n, dtype=np.int64)[:, None]
        bits = (k >> np.arange(n, dtype=np.int64)[None, :]) & 1
        return Rearrangements("sign-flip", (1 - 2 * bits).astype(np.int8), True, seed)
    rng = np.random.default_rng(seed)
    m = np.ones((n_resamples, n), dtype=np.int8)
    m[1:] = 1 - 2 * rng.integers(0, 2, size=(n_resamples - 1, n), dtype=np.int8)
    return Rearrangements("sign-flip", m, False, seed)


def _codes(values, n, what):
    if values is None:
        return np.zeros(n, dtype=np.int64)
    values = np.asarray(values)
    if values.shape[0] != n:
        raise ValueError(f"{what} must have one entry per observation ({n}), "
                         f"got {values.shape[0]}")
    if values.ndim == 1:
        # 1D labels may be strings (object dtype), which unique(axis=0) refuses
        _, codes = np.unique(values.astype(str) if values.dtype == object else values,
                             return_inverse=True)
        return codes.reshape(-1).astype(np.int64)
    values = values.reshape(n, -1)
    _, codes = np.unique(values, axis=0, return_inverse=True)
    return codes.reshape(-1).astype(np.int64)


def count_distinct_permutations(labels=None, blocks=None, n=None) -> int:
    """Number of distinct relabellings: product over blocks of ``k! / prod(k_g!)``.

    ``labels`` (n,) or (n, p): observations with equal labels are
    interchangeable (e.g. rows of the design matrix); default all distinct.

    Examples
    --------
    >>> count_distinct_permutations(labels=[0, 0, 0, 1, 1, 1])
    20
    """
    if n is None:
        ref = labels if labels is not None else blocks
        if ref is None:
            raise ValueError("give labels, blocks or n")
        n = np.asarray(ref).shape[0]
    lab = _codes(labels, n, "labels") if labels is not None else np.arange(n)
    blk = _codes(blocks, n, "blocks")
    total = 1
    for b in np.unique(blk):
        sel = lab[blk == b]
        total *= math.factorial(sel.size)
        for c in np.unique(sel):
            total //= math.factorial(int(np.sum(sel == c)))
    return total


def _block_arrangements(positions, lab):
    """All distinct assignments of observations to ``positions`` (one block).

    Yields arrays ``perm`` over the block's positions: ``perm[j]`` is the
    observation placed at ``positions[j]``.  Observations of the same label
    class are placed at that class's positions in increasing order, so each
    distinct relabelling appears once.
    """
    classes = np.unique(lab)
    slots = [positions[lab == c] for c in classes]   # where class c sits
    sizes = [s.size for s in slots]
    pool = tuple(int(p) for p in positions)

    def rec(remaining, ci):
        if ci == len(classes) - 1:
            yield [tuple(remaining)]
            return
        for chosen in itertools.combinations(remaining, sizes[ci]):
            rest = tuple(x for x in remaining if x not in chosen)
            for tail in rec(rest, ci + 1):
                yield [chosen] + tail

    order = {int(p): j for j, p in enumerate(positions)}
    for groups in rec(pool, 0):
        perm = np.empty(positions.size, dtype=np.int64)
        for slot, chosen in zip(slots, groups):
            for pos, obs in zip(slot, chosen):
                perm[order[int(pos)]] = obs
        yield perm


def permutations(n, n_resamples, seed=None, *, labels=None, blocks=None) -> Rearrangements:
    """Index permutations of ``n`` observations, optionally within blocks.

    Parameters
    ----------
    n : int
    n_resamples : int
        Requested number of rearrangements, identity included.
    seed : int or None
    labels : (n,) or (n, p) array, optional
        Observations with equal labels are interchangeable (pass the design
        matrix rows); used to count and enumerate distinct relabellings.
    blocks : (n,) array, optional
        Exchangeability blocks: observations are only permuted within their
        block.

    Examples
    --------
    >>> r = permutations(6, 1000, seed=0, labels=[0, 0, 0, 1, 1, 1])
    >>> r.exact, r.n_resamples
    (True, 20)
    """
    n, n_resamples = _check_count(n, n_resamples)
    seed = _check_seed(seed)
    lab = _codes(labels, n, "labels") if labels is not None else np.arange(n)
    blk = _codes(blocks, n, "blocks")
    block_ids = np.unique(blk)
    n_distinct = count_distinct_permutations(lab, blk, n)
    if n_distinct <= min(n_resamples, _MAX_ENUMERATE):
        per_block = []
        for b in block_ids:
            pos = np.nonzero(blk == b)[0]
            per_block.append((pos, list(_block_arrangements(pos, lab[pos]))))
        rows = np.empty((n_distinct, n), dtype=np.int64)
        for i, combo in enumerate(itertools.product(*[arr for _, arr in per_block])):
            for (pos, _), perm in zip(per_block, combo):
                rows[i, pos] = perm
        ident = np.nonzero(np.all(rows == np.arange(n), axis=1))[0]
        if ident.size != 1:  # pragma: no cover - guaranteed by construction
            raise RuntimeError("enumeration did not contain the identity exactly once")
        j = int(ident[0])
        rows[[0, j]] = rows[[j, 0]]
        return Rearrangements("permutation", rows, True, seed)
    rng = np.random.default_rng(seed)
    rows = np.tile(np.arange(n, dtype=np.int64), (n_resamples, 1))
    if n_resamples > 1:
        for b in block_ids:
            pos = np.nonzero(blk == b)[0]
            if pos.size > 1:
                rows[1:, pos] = rng.permuted(rows[1:, pos], axis=1)
    return Rearrangements("permutation", rows, False, seed)


def rearrangements(scheme, n, n_resamples, seed=None, *, labels=None, blocks=None):
    """Dispatch on ``scheme`` ("sign-flip" or "permutation")."""
    if scheme == "sign-flip":
        return sign_flips(n, n_resamples, seed)
    if scheme == "permutation":
        return permutations(n, n_resamples, seed, labels=labels, blocks=blocks)
    raise ValueError(f"scheme must be 'sign-flip' or 'permutation', got {scheme!r}")


#: relative tolerance when comparing resampled with observed statistics.  The
#: resampled statistics are computed in float32; values within this relative
#: distance of the observed one count as ties (common practice: a permutation
#: count must not lose exact ties to rounding).
RTOL = 2e-5


def null_p_values(null_max, observed, rtol=RTOL):
    """FWER p per observed value: fraction of ``null_max`` >= observed.

    ``null_max`` (m,) holds one maximum per rearrangement, identity
    included; ``observed`` any shape (already on the scale of the maxima,
    e.g. absolute values for two-sided tests).
    """
    null_max = np.sort(np.asarray(null_max, dtype=np.float64))
    obs = np.asarray(observed, dtype=np.float64)
    thr = obs - rtol * np.abs(obs)
    below = np.searchsorted(null_max, thr, side="left")
    return (null_max.size - below) / null_max.size
