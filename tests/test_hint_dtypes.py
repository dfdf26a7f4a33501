"""Hints compute in float64 whatever the dtype of the user's inputs (numpy.linalg has no float16)."""

from __future__ import annotations

import numpy as np
import pytest

from gradprobe.hints.evidence import Context, Evidence
from gradprobe.hints.terms import term_hints


@pytest.mark.parametrize("dtype", [np.float16, np.float32, np.float64])
def test_the_one_item_term_rule_takes_low_precision_inputs(dtype):
    """Regression (float16-27 of the adversarial bench): the rule that looks for one item's term
    in a weight gradient passed a float16 input to numpy.linalg.svd, which raised TypeError and
    ended the check with an internal error. A weight gradient sum_t outer(x[t], v[t]) (the sum
    rule over items) whose analytic value is the first item's term alone gets the hint in every
    dtype."""
    rng = np.random.default_rng(4)
    x = rng.normal(size=(3, 4)).astype(dtype)
    v = rng.normal(size=(3, 2))
    xs = x.astype(np.float64)
    numeric = sum(np.outer(xs[t], v[t]) for t in range(3))
    analytic = np.outer(xs[0], v[0])
    e = Evidence("W", (4, 2), np.arange(8), analytic.reshape(-1), numeric.reshape(-1), np.ones(8, bool))
    hints = term_hints([e], Context(inputs={"x": x}))
    assert "item 0 (of 3)" in hints["W"]
