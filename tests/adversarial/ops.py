"""The pieces an adversarial target is built from: elementwise functions of ``u``.

Each piece is given three times, independently: numpy source text (what the target runs), its
hand-derived derivative in numpy source text (what the target's backward runs), and mpmath
functions for the value and the derivative (the reference, evaluated at 50 digits). A fourth
text is a plausible wrong derivative, for the "wrong derivative of one piece" bug.

``radius(u)`` is how far (in ``u``) the piece stays smooth enough for a difference quotient:
the distance to a pole or to log's 0, 1/gain for steep pieces; kinks have a smooth side of
size 1 on either side (a one-sided quotient resolves them), and their distance to the point is
recorded separately by the generator.

Derivative sources (from the standard tables, e.g. Abramowitz & Stegun 4.2.1 for exp, 4.1 for
log, 4.5.x for tanh; the rest elementary) use ``x`` for the argument variable.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import mpmath as mp
import numpy as np


@dataclass(frozen=True)
class Piece:
    name: str
    value: str  # numpy source in ``x``
    deriv: str  # numpy source in ``x``: the exact derivative
    wrong: str  # numpy source in ``x``: a plausible wrong derivative
    mp_value: Callable
    mp_deriv: Callable
    kink: bool = False  # the derivative jumps at ``kink_at``
    kink_at: float = 0.0

    def radius(self, u: np.ndarray) -> np.ndarray:
        return _RADIUS.get(self.name, lambda u: np.ones_like(u))(u)


def _sig(x):
    return 1 / (1 + mp.exp(-x))


def _pow(n: int) -> Piece:
    return Piece(f"pow{n}", f"x ** {n}", f"{n} * x ** {n - 1}", f"{n - 1} * x ** {n - 1}",
                 lambda x: x**n, lambda x: n * x ** (n - 1))


def _softplus(k: int) -> Piece:
    # softplus(k x) / k: a smoothed ReLU, steeper as k grows (its curvature is k/4 at 0)
    return Piece(f"sp{k}", f"np.logaddexp(0, {k} * x) / {k}", f"0.5 * (1 + np.tanh({0.5 * k} * x))",
                 "0.5 * (1 + np.tanh(0.5 * x))",
                 lambda x: mp.log(1 + mp.exp(k * x)) / k, lambda x: _sig(k * x))


PIECES: dict[str, Piece] = {p.name: p for p in [
    Piece("tanh", "np.tanh(x)", "1 - np.tanh(x) ** 2", "1 - np.tanh(x)", mp.tanh, lambda x: 1 - mp.tanh(x) ** 2),
    Piece("sin", "np.sin(x)", "np.cos(x)", "-np.cos(x)", mp.sin, mp.cos),
    Piece("sq", "x * x", "2 * x", "x", lambda x: x * x, lambda x: 2 * x),
    Piece("sp1", "np.logaddexp(0, x)", "0.5 * (1 + np.tanh(0.5 * x))", "0.5 * np.tanh(0.5 * x)",
          lambda x: mp.log(1 + mp.exp(x)), _sig),
    Piece("exp", "np.exp(x)", "np.exp(x)", "x * np.exp(x)", mp.exp, mp.exp),
    Piece("pole", "1 / (1 - x)", "1 / ((1 - x) * (1 - x))", "-1 / ((1 - x) * (1 - x))",
          lambda x: 1 / (1 - x), lambda x: 1 / (1 - x) ** 2),
    Piece("log", "np.log(x)", "1 / x", "-1 / x", mp.log, lambda x: 1 / x),
    _pow(5), _pow(7), _pow(9), _pow(12),
    _softplus(100), _softplus(1000), _softplus(10000),
    Piece("abs", "np.abs(x)", "np.sign(x)", "(x > 0) * np.ones_like(x)", abs,
          lambda x: mp.sign(x), kink=True),
    Piece("relu", "np.maximum(x, 0)", "(x > 0) * np.ones_like(x)", "np.sign(x)",
          lambda x: max(x, 0), lambda x: mp.mpf(1) if x > 0 else mp.mpf(0), kink=True),
    # Huber with delta 1: the derivative is continuous, the second one jumps at |x| = 1
    Piece("hub", "np.where(np.abs(x) <= 1, 0.5 * x * x, np.abs(x) - 0.5)", "np.clip(x, -1, 1)", "x",
          lambda x: x * x / 2 if abs(x) <= 1 else abs(x) - mp.mpf(1) / 2,
          lambda x: min(max(x, -1), 1), kink_at=1.0),
]}

_RADIUS = {
    "pole": lambda u: np.abs(1 - u),
    "log": lambda u: np.abs(u),
    "exp": lambda u: np.ones_like(u),  # the gain sits in the argument's scale
    "pow5": lambda u: np.maximum(np.abs(u), 0.2) / 5,
    "pow7": lambda u: np.maximum(np.abs(u), 0.2) / 7,
    "pow9": lambda u: np.maximum(np.abs(u), 0.2) / 9,
    "pow12": lambda u: np.maximum(np.abs(u), 0.2) / 12,
    "sp100": lambda u: np.full_like(u, 1e-2),
    "sp1000": lambda u: np.full_like(u, 1e-3),
    "sp10000": lambda u: np.full_like(u, 1e-4),
}

SMOOTH = ("tanh", "sin", "sq", "sp1")
STEEP = ("exp", "pole", "log", "pow5", "pow7", "pow9", "pow12", "sp100", "sp1000", "sp10000")
KINKED = ("abs", "relu", "hub")


NEAREST = {"float64": -7, "float32": -4, "float16": -2, "bfloat16": -2}


def domain(name: str, rng: np.random.Generator, size: int, gain: float, dtype: str = "float64") -> np.ndarray:
    """Values of ``u`` where the piece is defined and interesting; steep pieces put a few
    elements close to their pole, their log 0 or their bend (10^-7 .. 10^-1 away in float64,
    nearer than the float type's rounding never)."""
    near = 10 ** rng.uniform(NEAREST[dtype], -1, size)
    some = rng.random(size) < 0.3
    if name == "pole":
        return np.where(some, 1 - near, rng.uniform(-1, 0.8, size))
    if name == "log":
        return np.where(some, near, rng.uniform(0.2, 2, size))
    if name == "exp":
        return rng.uniform(-1, 1, size) * gain
    if name.startswith("pow"):
        return rng.uniform(-1.3, 1.3, size)
    if name.startswith("sp") and name != "sp1":
        return np.where(some, near * rng.choice([-1, 1], size), rng.uniform(-0.05, 0.05, size))
    if name == "hub":
        return rng.uniform(-2.5, 2.5, size)
    if name == "sin":
        return rng.uniform(-3, 3, size)
    return rng.uniform(-2, 2, size)
