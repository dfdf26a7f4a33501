"""The shop demand stack of shop_demand_stack.py with a wrong input gradient in one layer.

The trend layer's backward passes the upstream gradient to its input without the tanh
derivative (`grad_y @ W.T` where `dz @ W.T` belongs); its own weight and bias gradients are
right. Checked as one flat network, the bug shows up only in the layers *before* trend
(hidden.W, hidden.b and x fail; trend passes). Checked as a stack, gradprobe names trend:

    gradprobe check samples/shop_demand_stack_buggy.py
    # exit 1: error enters at trend (its input gradient is wrong);
    #         hidden.W, hidden.b and x are marked inherited from trend
"""

import numpy as np
from shop_demand_stack import Dense, DenseTanh, Rectify, SquaredError, setup  # noqa: F401


class DenseTanhSlip(DenseTanh):
    def backward(self, p, x, inputs, grad_y):
        y = np.tanh(x @ p["W"] + p["b"])
        dz = grad_y * (1.0 - y**2)
        return {"W": x.T @ dz, "b": dz.sum(axis=0)}, grad_y @ p["W"].T  # bug: dz belongs here


layers = [Dense("hidden"), Rectify(), DenseTanhSlip("trend"), Dense("forecast"), SquaredError()]
