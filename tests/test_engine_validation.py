"""The engine refuses invalid parameters with a ValueError that names them.

These are the engine's own input rules (no outside fact is checked): TFCE
exponents must be positive (the enhancement is defined for E, H > 0; Smith &
Nichols 2009, NeuroImage 44:83-98), and a seed is a non-negative integer
(numpy.random.default_rng refuses negative seeds).
"""

import numpy as np
import pytest
from scipy import sparse

from groupsrc.stats.corrections.scorers import TfceOptions
from groupsrc.stats.inference import run_inference


def _call(**kw):
    Y = np.random.default_rng(0).standard_normal((6, 2, 3)).astype(np.float32)
    args = dict(scheme="sign-flip", correction="tfce", n_resamples=8, seed=1)
    args.update(kw)
    if isinstance(args.get("tfce"), dict):
        args["tfce"] = TfceOptions(**args["tfce"])
    return run_inference(Y, np.ones((6, 1)), [1.0], sparse.csr_matrix((2, 2)), **args)


def test_valid_parameters_run():
    assert _call().n_resamples == 8


@pytest.mark.parametrize("kw,match", [
    ({"tfce": {"extent_power": 0.0}}, "extent exponent E"),
    ({"tfce": {"extent_power": -0.5}}, "extent exponent E"),
    ({"tfce": {"height_power": 0}}, "height exponent H"),
    ({"tfce": {"height_power": -2.0}}, "height exponent H"),
    ({"tfce": {"extent_power": float("nan")}}, "extent exponent E"),
    ({"tfce": {"height_power": float("inf")}}, "height exponent H"),
    ({"tfce": {"steps": 0}}, "steps"), ({"tfce": {"step": -0.1}}, "dh"),
    # refused even when the correction does not use them: the caller passed them
    ({"tfce": {"extent_power": -1.0}, "correction": "max-stat"}, "extent exponent E"),
    ({"seed": -1}, "seed"), ({"seed": -20261201, "correction": "fdr"}, "seed"),
    ({"seed": 1.5}, "seed"), ({"seed": "7"}, "seed"), ({"seed": True}, "seed")])
def test_invalid_parameters_raise_value_error(kw, match):
    with pytest.raises(ValueError, match=match) as err:
        _call(**kw)
    assert "->" in str(err.value)                      # says how to fix it


def test_seed_none_draws_and_records_a_seed():
    r = _call(seed=None, n_resamples=200, scheme="sign-flip", correction="max-stat")
    assert isinstance(r.resampling.seed, int) and r.resampling.seed >= 0
