"""Which participants may trade places, and how many distinct rearrangements there are.

Design-only (no data): the same decision for ``groupsrc check`` and for the kernel.

Exchangeability blocks (Winkler et al. 2015, NeuroImage 123:253-268).  Whole
participants move, never single maps.  Two participants may trade their residual
vectors when those have the same covariance: under the model, participant ``i``'s
maps have covariance ``sigma^2 (I + Z_i Psi Z_i')``, which depends on the
*multiset of its random-effect rows* only (``Z_i`` up to the order of the maps).
So the blocks are the classes of equal random-effect row multisets
(``MixedDesign.layout``), crossed with the user's ``blocks`` column -- not the map
covariates' values: a continuous map covariate (trials per map) does not change the
covariance, and would otherwise make every participant a block of its own.

Counting.  A between-participant contrast tests the directions ``U`` of the between
design that its weights touch; participants whose rows agree on ``B U`` (the tested
columns, e.g. the group) are interchangeable for it, so the distinct rearrangements
are the relabellings of ``B U`` within blocks: the product over blocks of multinomial
coefficients (``resampling.count_distinct_permutations``), not the permutations of
whole between rows (a continuous age would make every one distinct and the count
meaningless: 2 vs 2 participants have 6 group relabellings, not 24).  The smallest
corrected p a test can reach is one over the number of rearrangements used (the
distinct ones, or the resamples asked for when fewer), two over it for a two-sided
test whose rearrangements include the observed statistic's mirror (sign flips: all
signs reversed; a two-level tested column with equal groups in one block: the groups
swapped); a design where it exceeds alpha cannot reject and is refused by ``check``.

Sign flips replace permutations when the blocks leave fewer distinct relabellings
than ``min(resamples, MIN_PERMUTATIONS, 2^N)`` (whole-participant sign flips need
symmetric participant residuals instead of exchangeable ones), and always with
variance groups (participants of different variance are not exchangeable).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ...resampling import count_distinct_permutations

#: fewest distinct whole-participant permutations before sign flips are used instead
MIN_PERMUTATIONS = 1000


@dataclass(frozen=True)
class Plan:
    """What a contrast's rearrangements will be: ``scheme`` ("sign-flip" or
    "permutation"), the number of distinct rearrangements, the smallest attainable
    corrected p, and why sign flips replace permutations ("" when they do not)."""

    scheme: str
    distinct: int
    p_min: float
    fallback: str = ""


def tested_directions(L, p_between, p_within):
    """Orthonormal basis (p_b, r) of the between-design directions the contrast rows
    ``L`` (k, p) touch: the span of ``L_j[b, c]`` over rows j and within columns c."""
    L = np.atleast_2d(np.asarray(L, float))
    Lb = L[:, :p_between * p_within].reshape(L.shape[0], p_between, p_within)
    M = np.transpose(Lb, (1, 0, 2)).reshape(p_between, -1)
    if not np.any(M):
        return np.zeros((p_between, 0))
    U, sv, _ = np.linalg.svd(M, full_matrices=False)
    return U[:, sv > 1e-10 * sv[0]]


def tested_labels(between, L, p_within):
    """Per participant, its values on the tested directions (N, r), rounded so that
    equal values compare equal."""
    B = np.asarray(between, float)
    U = tested_directions(L, B.shape[1], p_within)
    return np.round(B @ U, 9) + 0.0            # + 0.0: no negative zeros


def blocks_of(layout, blocks=None):
    """Exchangeability blocks: the covariance layouts crossed with user blocks."""
    layout = np.asarray(layout).astype(str)
    if blocks is None:
        return layout
    return np.char.add(np.char.add(layout, "|"), np.asarray(blocks).astype(str))


def _p_min(distinct, n_resamples, mirror):
    m = min(int(n_resamples), int(distinct))
    return (2.0 if mirror and m == distinct else 1.0) / m


def plan(design, L, requested, n_resamples, blocks=None, variance_groups=False,
         tails="two") -> Plan:
    """The rearrangements of contrast ``L`` on a :class:`~.model.MixedDesign`."""
    N = design.n_participants
    flips = min(2 ** min(N, 62), 2 ** 62)
    two = tails == "two" and np.atleast_2d(L).shape[0] == 1
    if requested == "sign-flip":
        return Plan("sign-flip", flips, _p_min(flips, n_resamples, two))
    if variance_groups:
        return Plan("sign-flip", flips, _p_min(flips, n_resamples, two),
                    "variance groups: participants of different variance are not "
                    "exchangeable, so whole-participant sign flips are used")
    if design.between is None or design.within is None:
        raise ValueError("whole-participant permutations need the design layout "
                         "(between, within)")
    layout = design.layout if design.layout is not None else np.zeros(N, int)
    labels = tested_labels(design.between, L, np.asarray(design.within).shape[1])
    blk = blocks_of(layout, blocks)
    count = count_distinct_permutations(labels=labels, blocks=blk)
    if count >= min(int(n_resamples), MIN_PERMUTATIONS, flips):
        values, sizes = np.unique(labels, axis=0, return_counts=True)
        mirror = (two and len(np.unique(blk)) == 1 and len(values) == 2
                  and sizes[0] == sizes[1])
        return Plan("permutation", count, _p_min(count, n_resamples, mirror))
    return Plan("sign-flip", flips, _p_min(flips, n_resamples, two),
                f"only {count} distinct relabelling(s) of the tested columns among "
                "participants whose maps have the same covariance layout (the same "
                "random-effect rows), fewer than min(resamples, "
                f"{MIN_PERMUTATIONS}), so whole-participant sign flips are used")
