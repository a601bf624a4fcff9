"""Benjamini-Hochberg adjustment against statsmodels."""

import numpy as np
from statsmodels.stats.multitest import multipletests

from groupsrc.stats.corrections.fdr import fdr_bh


def test_matches_statsmodels():
    rng = np.random.default_rng(0)
    p = np.concatenate([rng.uniform(size=500), rng.uniform(0, 1e-3, size=50)])
    ref = multipletests(p, method="fdr_bh")[1]  # statsmodels reference
    np.testing.assert_allclose(fdr_bh(p), ref, rtol=1e-12)


def test_shape_ties_and_nan():
    p = np.array([[0.01, 0.01], [0.5, np.nan]])
    out = fdr_bh(p)
    ref = multipletests([0.01, 0.01, 0.5], method="fdr_bh")[1]  # statsmodels reference
    np.testing.assert_allclose(out[np.isfinite(p)], ref)
    assert np.isnan(out[1, 1])
