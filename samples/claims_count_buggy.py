"""The claims-count model of claims_count.py with a Hessian that forgets a cross term.

The Newton solver's Hessian leaves the block between the rating factors and the base rate
at zero (as if the two were fitted separately): the gradient is right, the Hessian is not,
and the error enters in the Hessian.

    gradprobe check samples/claims_count_buggy.py  # exit 1: blocks rating.coef × rating.base
"""

import numpy as np
from claims_count import FACTORS, RIDGE, _mean, backward, forward, setup  # noqa: F401


def hessian(params, inputs):
    mu = _mean(params, inputs)
    x = inputs["x"]
    h = np.zeros((FACTORS + 1, FACTORS + 1))
    h[:FACTORS, :FACTORS] = x.T @ (mu[:, None] * x) + RIDGE * np.eye(FACTORS)
    h[FACTORS, FACTORS] = mu.sum()  # bug: the cross terms x' mu are left out
    return h
