"""The composed stack gradient against sympy's symbolic derivative of the same network."""

from __future__ import annotations

import mpmath
import numpy as np
import sympy as sp
from stack_layers import Dense, SquaredLoss, Tanh, arrays

from gradprobe.targets.stack import end_to_end, stack


def test_composed_backward_matches_the_symbolic_gradient():
    params, inputs = arrays(widths=(2, 3, 1), batch=2)
    layers = [Dense("d1"), Tanh(), Dense("d2"), SquaredLoss()]
    target = end_to_end(stack(layers, params, inputs))
    grads = target.backward(params, inputs)

    # the same network in sympy: loss = 1/2 sum((tanh(x W1 + b1) W2 + b2 - y)^2)
    W1 = sp.Matrix(2, 3, lambda i, j: sp.Symbol(f"W1_{i}{j}"))
    b1 = sp.Matrix(1, 3, lambda i, j: sp.Symbol(f"b1_{j}"))
    W2 = sp.Matrix(3, 1, lambda i, j: sp.Symbol(f"W2_{i}"))
    b2 = sp.Symbol("b2")
    X = sp.Matrix(2, 2, lambda i, j: sp.Symbol(f"x_{i}{j}"))
    loss = sum(((((X[n, :] * W1 + b1).applyfunc(sp.tanh) * W2)[0, 0] + b2
                 - float(inputs["y"][n, 0])) ** 2) for n in range(2)) / 2
    values = {**{W1[i, j]: params["d1"]["W"][i, j] for i in range(2) for j in range(3)},
              **{b1[0, j]: params["d1"]["b"][j] for j in range(3)},
              **{W2[i, 0]: params["d2"]["W"][i, 0] for i in range(3)},
              b2: params["d2"]["b"][0],
              **{X[i, j]: inputs["x"][i, j] for i in range(2) for j in range(2)}}

    def symbolic(symbols):
        derivatives = sp.lambdify(list(values), [sp.diff(loss, s) for s in symbols], "mpmath")
        with mpmath.workdps(30):
            return np.array([float(d) for d in derivatives(*values.values())])

    np.testing.assert_allclose(grads["d1"]["W"].ravel(), symbolic(list(W1)), rtol=1e-12)
    np.testing.assert_allclose(grads["d1"]["b"].ravel(), symbolic(list(b1)), rtol=1e-12)
    np.testing.assert_allclose(grads["d2"]["W"].ravel(), symbolic(list(W2)), rtol=1e-12)
    np.testing.assert_allclose(grads["d2"]["b"], symbolic([b2]), rtol=1e-12)
    np.testing.assert_allclose(grads["x"].ravel(), symbolic(list(X)), rtol=1e-12)
    np.testing.assert_allclose(target.forward(params, inputs), float(loss.subs(values)), rtol=1e-13)
