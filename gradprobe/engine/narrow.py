"""How far a narrow gradient may leave its float64 run: the rounding it accumulates, measured,
and the kinks its rounding reaches.

Narrow code (float32, float16, ...) checked on its float64 run returns a narrow gradient that
differs from that run by the rounding its own computation accumulates. Two parts are measured
on the target, never assumed: how much the narrow backward's rounding varies from point to
point (point.Point.jitter, at the narrow values), and how much rounding propagates: the
float64 gradient moved by perturbing every floating value the code is given (params and
inputs) by PROPAGATION_UNITS units of the narrow type's roundoff u, in random directions, as
storing each value in that type does. Near a kink, or where large inputs cancel, the second
part reaches far above u.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from ..common.errors import ProbeError
from ..common.tensors import Workspace, is_float
from .domain import quiet
from .gradients import validate
from .preflight import call_backward
from .ladder import Estimate
from .probe import TensorProbe
from .sampling import SIGN_CHUNK, random_signs
from ..common.roundoff import unit_roundoff

PROPAGATION_UNITS = 2.0  # each value moves by this many units of roundoff (its storage and one operation)
PROPAGATION_SAMPLES = 2  # backward calls, each at its own random signs


def propagated_rounding(
    backward: Callable[..., Any], wide: Workspace, grad_output: np.ndarray | None,
    dtype: np.dtype, base: dict[str, np.ndarray], rng: np.random.Generator,
    source: Workspace | None = None,
) -> dict[str, np.ndarray]:
    """Per tensor and flat coordinate, the largest change of the float64 gradient (``base``)
    when every floating value moves by PROPAGATION_UNITS * u of ``dtype``; {} when backward
    fails there (no evidence: the narrow gradient is then held to the threshold alone).

    ``source``: the workspace ``wide`` was copied from (its floating values exact in
    ``wide``'s types, and ``wide`` at rest at them): the moved values are then written into
    ``wide``'s own arrays a block at a time and put back from ``source`` after each call (no
    moved copy of the params beside them); without it each moved tensor is a new array."""
    u = unit_roundoff(dtype)
    spread: dict[str, np.ndarray] = {}
    names = [n for n in wide.names() if is_float(wide.owners[n])]
    in_place = source is not None and source is not wide and all(
        _refillable(wide.owners[n], source.owners.get(n)) for n in names)
    try:
        for _ in range(PROPAGATION_SAMPLES):
            try:
                if in_place:
                    for n in names:
                        _move_in_place(wide.owners[n], PROPAGATION_UNITS * u, rng)
                    at = wide
                else:
                    at = wide.replacing({n: _moved(wide.owners[n], PROPAGATION_UNITS * u, rng) for n in names})
                with quiet():  # a moved point: the code's warnings there are not shown
                    raw = call_backward(backward, at, grad_output, scratch=False)
                del at
            finally:
                if in_place:
                    assert source is not None
                    for n in names:
                        np.copyto(wide.owners[n], source.owners[n], casting="unsafe")
            # read at once and let go of: no copies of the user's arrays
            g = validate(raw, wide, borrowed=True).values
            del raw
            for name, b in base.items():
                if name in g:
                    spread[name] = _largest_change(spread.get(name), g.pop(name).reshape(-1), b)
            del g
    except ProbeError:
        return {}
    return spread


BLOCK = 1 << 16  # values a block at a time


def _refillable(x: np.ndarray, narrow: np.ndarray | None) -> bool:
    """``x`` can be moved in place and refilled from ``narrow``: a float64 array of its own,
    C-ordered, of the same shape."""
    return (narrow is not None and x.dtype == np.float64 and x.flags.c_contiguous and x.flags.writeable
            and narrow.shape == x.shape and not np.may_share_memory(x, narrow))


def _move_in_place(x: np.ndarray, share: float, rng: np.random.Generator) -> None:
    """x * (1 + share * s), s = +-1 at random, written into ``x`` a block at a time: the same
    draws as :func:`_moved` (sampling.random_negative's chunks, in order) and the same
    operations in the same order on each value."""
    flat = x.reshape(-1)
    for start in range(0, flat.size, SIGN_CHUNK):
        stop = min(start + SIGN_CHUNK, flat.size)
        out = np.ones(stop - start)
        np.negative(out, out=out, where=rng.integers(0, 2, size=stop - start) == 0)
        out *= share
        out += 1.0
        out *= flat[start:stop]
        flat[start:stop] = out


def _largest_change(most: np.ndarray | None, g: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``most`` raised to |g - b| where that is larger, a block at a time (a new array when
    ``most`` is None): the whole-size difference's values, without it."""
    out = np.empty(g.size, dtype=np.result_type(g, b)) if most is None else most
    for start in range(0, g.size, BLOCK):
        part = slice(start, start + BLOCK)
        change = np.subtract(g[part], b[part])
        np.abs(change, out=change)
        if most is None:
            out[part] = change
        else:
            np.maximum(out[part], change, out=out[part])
    return out


def _moved(x: np.ndarray, share: float, rng: np.random.Generator) -> np.ndarray:
    """x * (1 + share * s), s = +-1 at random, in one array: the same operations in the same
    order as written out, done in place."""
    out = random_signs(rng, np.shape(x))  # rng.choice([-1.0, 1.0]), drawn in chunks
    out *= share
    out += 1.0
    out *= x
    return out


# Steps as fractions of the narrow code's first step h: h, h/2, h/4, then quartering to h/256.
KINK_STEPS = (1.0, 0.5, 0.25, 1.0 / 16, 1.0 / 64, 1.0 / 256)
# Three steps running (rows of KINK_STEPS, largest first) and the share of its gap a kink
# keeps each time the step shrinks there: curvature's halves (quarters) as the step halves
# (quarters), or shrinks faster.
KINK_TRIPLES = ((0, 1, 2, 0.75), (0, 2, 3, 0.5), (2, 3, 4, 0.5), (3, 4, 5, 0.5))


def kink_within_reach(
    probe: TensorProbe, own: TensorProbe, flat: np.ndarray, narrow: np.ndarray, scale: np.ndarray
) -> tuple[np.ndarray, Estimate, np.ndarray] | None:
    """Which narrow gradients that leave their float64 run are explained by a kink of the
    float64 run within the narrow type's resolution, with the estimate each is judged by,
    and which lie off the sides of a kink shown there (None where neither).

    The evidence of a kink is the one-sided quotients of the float64 run at the steps
    KINK_STEPS: at three steps running (KINK_TRIPLES: halving from h, or quartering) their
    gap keeps its sign and at least the triple's share of its size each time the step
    shrinks, beyond their rounding, and lies further apart than the narrow type's agreement
    at the largest of them; and the narrow value lies between them there (narrow rounding
    puts the code on the kink, or on its other side, where the float64 run is just off it).
    A smooth loss's gap is f'' h + f'''' h**3 / 12 + ... (Taylor): it halves with the step,
    or shrinks faster; across a kink at distance d it is the jump times (1 - d / s) at step
    s, plus that, which keeps three quarters of itself twice over as the step halves from h
    where d <= h / 10 (half twice over as it quarters from s where d <= s / 28). A kink
    further off, within the narrow type's reach, is left to the measured rounding and to the
    narrow code's own check. One batch of pairs."""
    n = flat.size
    rows = len(KINK_STEPS)
    steps = np.concatenate([own.prior_steps(flat) * f for f in KINK_STEPS])
    p = probe.pairs(np.tile(flat, rows), steps)
    right, left = (q.reshape(rows, n) for q in p.sides(probe.f0))
    noise = (2.0 * p.noise / np.minimum(p.h_plus, p.h_minus)).reshape(rows, n)
    tol = own.threshold * scale
    gap = right - left
    with np.errstate(invalid="ignore"):
        def kept(a: int, b: int, share: float) -> np.ndarray:
            """The gap at row a kept its share down to row b: beyond rounding, in one sign."""
            return ((np.abs(gap[b]) - noise[b] >= share * (np.abs(gap[a]) + noise[a]))
                    & (gap[a] * gap[b] > 0))

        steady = np.zeros((rows, n), dtype=bool)
        for a, b, c, share in KINK_TRIPLES:
            steady[a] |= kept(a, b, share) & kept(b, c, share)
        apart = np.abs(gap) > tol + 2.0 * noise
        between = ((narrow >= np.minimum(left, right) - tol - noise)
                   & (narrow <= np.maximum(left, right) + tol + noise))
    fits = steady & apart & between
    took = fits.any(axis=0)
    beside = (steady & apart).any(axis=0) & ~took  # a kink shown, the narrow value off its sides
    if not (took.any() or beside.any()):
        return None
    row = np.argmax(fits, axis=0)  # the largest step that explains it
    cols = np.arange(n)
    lv, rv, nv = left[row, cols], right[row, cols], noise[row, cols]
    nearer = np.where(np.abs(narrow - lv) <= np.abs(narrow - rv), lv, rv)
    return took, Estimate(nearer[took], nv[took]), beside
