"""Whole-participant permutations as products: which design rows meet which residuals.

A permutation ``perm`` (slot i receives participant ``perm[i]``'s residual vector,
map by map) within blocks of equal covariance (:mod:`.exchange`) gives, at the fixed
variance components, the fixed-effect score

    h* = sum_i X_i' Vbar_i^-1 r_perm[i] = sum_j X_sigma(j)' Vbar_j^-1 r_j,

``sigma = perm^-1`` (``Vbar_i = Vbar_perm[i]``, so the design may move instead of the
residuals), while ``A = X'Vbar^-1 X`` and ``||r||^2_V`` do not change.  Maps are
matched in each participant's *canonical order*: sorted by their random-effect row,
then their within and map-covariate rows (so equal rows meet where they can), then
their order in the maps table.  Two ways to form ``h*``, the same numbers:

* **between rows** -- when every participant of a block has the same within and
  map-covariate rows, only the between row ``b`` differs, and
  ``h* = (sum_j b_sigma(j) (x) w_j, sum_j w^M_j)`` with ``w_j = [W_j, M_j]' Vbar_j^-1
  r_j``: one product ``(R p_b, N) @ (N, p_w F)`` (the kernel's own path);
* **map rows** (:class:`MapMoves`) -- otherwise (a continuous map covariate, or
  participants with the same number of maps but other conditions):
  ``X_sigma(j)' Vbar_j^-1 r_j = X_sigma(j)' r_j - H_sigma(j)' K_j Z_j' r_j``, where the
  first term pairs map rows and the second the participants' design products
  ``H = Z'X``: one product ``(R p, n + q N) @ (n + q N, F)`` of the moved design
  entries against the map residuals ``r`` and ``K_j Z_j' r_j``.  It costs about
  ``(n / N + q) / p_w`` times the between-rows product.
"""

from __future__ import annotations

import numpy as np


def canonical_order(design):
    """Per map, its position in its participant's canonical order (module docstring),
    and the table ``T[j, k]`` of participant j's k-th map (maps-table index; -1 where
    j has fewer maps)."""
    g = np.asarray(design.groups)
    rows = [np.asarray(design.Z, float)]
    if design.within is not None:
        rows.append(np.asarray(design.within, float))
    if design.map_cols is not None:
        rows.append(np.asarray(design.map_cols, float))
    key = np.round(np.hstack(rows), 10)
    N = int(g.max()) + 1
    rank = np.zeros(g.size, np.int64)
    T = np.full((N, int(np.bincount(g).max())), -1, np.int64)
    for j in range(N):
        idx = np.flatnonzero(g == j)
        order = idx[np.lexsort(np.vstack([idx[None, :].astype(float),
                                          key[idx].T[::-1]]))]
        rank[order] = np.arange(order.size)
        T[j, :order.size] = order
    return rank, T, key


def homogeneous(design, blocks) -> bool:
    """True when the participants of every block have the same within and map-covariate
    rows in canonical order (the between-rows path applies)."""
    _, T, key = canonical_order(design)
    blocks = np.asarray(blocks)
    for b in np.unique(blocks):
        members = np.flatnonzero(blocks == b)
        first = key[T[members[0]][T[members[0]] >= 0]]
        for j in members[1:]:
            rows = key[T[j][T[j] >= 0]]
            if rows.shape != first.shape or not np.array_equal(rows, first):
                return False
    return True


class MapMoves:
    """The product rows of the map-rows path for a block of permutations."""

    def __init__(self, core):
        d = core.design
        self.rank, self.T, _ = canonical_order(d)
        self.g = np.asarray(core.groups)
        self.X = np.asarray(core.X, np.float32)          # (n, p)
        self.H = np.asarray(core.H, np.float32)          # (q, N, p), scaled Z
        self.n, self.p, self.q, self.N = core.n, core.p, core.q, core.N

    @property
    def width(self):
        """Rows of the data each feature contributes: ``n`` map residuals, ``q N`` scores."""
        return self.n + self.q * self.N

    def rows(self, perm, block):
        """(block p, n + q N) float32: for each permutation row of ``perm`` (R <= block,
        the rest zero), the moved design entries (module docstring)."""
        R = perm.shape[0]
        G = np.zeros((block, self.p, self.width), np.float32)
        inv = np.argsort(perm, axis=1)                            # sigma: slot j <- X of inv[j]
        src = self.T[inv[:, self.g], self.rank[None, :]]          # (R, n) maps-table rows
        G[:R, :, :self.n] = np.transpose(self.X[src], (0, 2, 1))
        Hs = self.H[:, inv, :]                                    # (q, R, N, p)
        G[:R, :, self.n:] = -np.transpose(Hs, (1, 3, 0, 2)).reshape(R, self.p, -1)
        return G.reshape(block * self.p, self.width)
