"""Targets with second derivatives built from sympy's symbolic Hessians (the outside
reference): a smooth loss of two tensors, its gradient and its Hessian differentiated by
sympy, with hooks to break either on purpose."""

from __future__ import annotations

import numpy as np
import sympy as sp

# A loss of a (2,) "weights" tensor and a (2, 2) "mix" tensor, with every cross term:
# sum over the four mix entries of exp(0.3 * w_i * m_ij) plus w'w * log(1 + m'm), and a cubic.
W = sp.symbols("w0:2")
M = sp.symbols("m0:4")
SYMBOLS = (*W, *M)
LOSS = (sum(sp.exp(sp.Rational(3, 10) * W[k % 2] * M[k]) for k in range(4))
        + (W[0] ** 2 + W[1] ** 2) * sp.log(1 + sum(m**2 for m in M)) + W[0] * M[1] ** 3 / 6)
GRADIENT = [sp.diff(LOSS, s) for s in SYMBOLS]
HESSIAN = sp.hessian(LOSS, SYMBOLS)
_loss = sp.lambdify(SYMBOLS, LOSS, "numpy")
_grad = sp.lambdify(SYMBOLS, GRADIENT, "numpy")
_hess = sp.lambdify(SYMBOLS, HESSIAN, "numpy")


def flat(params):
    return np.concatenate([np.ravel(params["weights"]), np.ravel(params["mix"])])


def split(vec):
    return {"weights": np.asarray(vec[:2], dtype=float), "mix": np.asarray(vec[2:], dtype=float).reshape(2, 2)}


class SympyTarget:
    """forward, backward and a Hessian form from sympy; ``grad_bug`` and ``hess_bug`` edit
    the exact gradient vector and Hessian matrix."""

    def __init__(self, form="hvp", hess_bug=None, grad_bug=None, grad_bug_hessian=None):
        self.form, self.hess_bug, self.grad_bug = form, hess_bug, grad_bug
        self.grad_bug_hessian = grad_bug_hessian  # the Hessian of the buggy gradient
        if form == "hvp":
            self.hvp = self._hvp
        else:
            self.hessian = self._hessian

    def setup(self):
        return {"weights": np.array([0.7, -0.4]), "mix": np.array([[0.5, -1.1], [0.9, 0.3]])}, {}

    def forward(self, params, inputs):
        return float(_loss(*flat(params)))

    def backward(self, params, inputs):
        x = flat(params)
        g = np.array(_grad(*x), dtype=float)
        if self.grad_bug is not None:
            g = self.grad_bug(x, g)
        return split(g)

    def matrix(self, params):
        x = flat(params)
        h = np.array(_hess(*x), dtype=float)
        if self.grad_bug_hessian is not None:
            h = self.grad_bug_hessian(x, h)
        if self.hess_bug is not None:
            h = self.hess_bug(h)
        return h

    def _hessian(self, params, inputs):
        return self.matrix(params)

    def _hvp(self, params, inputs, v):
        return split(self.matrix(params) @ flat(v))
