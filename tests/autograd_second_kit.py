"""The truth for the double-backward tests: sympy's symbolic Hessian of a smooth
soft-threshold loss, L(gain, lam) = mean_ij (s(raw_ij gain_j, lam_j) - ref_ij)^2 with
s(z, lam) = z - lam tanh(z / lam), evaluated at the tests' point (params ordered gain, lam)."""

from __future__ import annotations

import numpy as np
import sympy

RNG = np.random.default_rng(41)
RAW = RNG.normal(0.0, 0.8, size=(6, 2))
REF = 0.9 * RAW + RNG.normal(0.0, 0.05, size=(6, 2))
GAIN = np.array([1.1, 0.9])
LAM = np.array([0.3, 0.5])


def sympy_hessian() -> np.ndarray:
    """The 4 x 4 Hessian of L in the order gain0, gain1, lam0, lam1: each term's second
    derivatives by sympy (symbolically, once), evaluated with mpmath at 30 digits."""
    import mpmath

    r, c, g, lam = sympy.symbols("r c g lam")
    z = r * g
    term = (z - lam * sympy.tanh(z / lam) - c) ** 2
    second = [sympy.lambdify((r, c, g, lam), sympy.diff(term, a, b), modules="mpmath")
              for a, b in ((g, g), (g, lam), (lam, lam))]
    out = np.zeros((4, 4))
    with mpmath.workdps(30):
        for j in range(2):
            gg, gl, ll = (float(sum(f(mpmath.mpf(RAW[i, j]), mpmath.mpf(REF[i, j]),
                                      mpmath.mpf(GAIN[j]), mpmath.mpf(LAM[j]))
                                    for i in range(RAW.shape[0])) / RAW.size)
                          for f in second)
            out[j, j], out[j, 2 + j], out[2 + j, j], out[2 + j, 2 + j] = gg, gl, gl, ll
    return out


HESSIAN = sympy_hessian()
