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
from .refine import Taken, pairs_reusing
from ..common.roundoff import unit_roundoff

PROPAGATION_UNITS = 2.0  # each value moves by this many units of roundoff (its storage and one operation)
PROPAGATION_SAMPLES = 2  # backward calls, each at its own random signs


def propagated_rounding(
    backward: Callable[..., Any], wide: Workspace, grad_output: np.ndarray | None,
    dtype: np.dtype, base: dict[str, np.ndarray], rng: np.random.Generator,
) -> dict[str, np.ndarray]:
    """Per tensor and flat coordinate, the largest change of the float64 gradient (``base``)
    when every floating value moves by PROPAGATION_UNITS * u of ``dtype``; {} when backward
    fails there (no evidence: the narrow gradient is then held to the threshold alone)."""
    u = unit_roundoff(dtype)
    spread: dict[str, np.ndarray] = {}
    names = [n for n in wide.names() if is_float(wide.owners[n])]
    try:
        for _ in range(PROPAGATION_SAMPLES):
            moved = {n: wide.owners[n] * (1.0 + PROPAGATION_UNITS * u * rng.choice([-1.0, 1.0], size=wide.owners[n].shape))
                     for n in names}
            with quiet():  # a moved point: the code's warnings there are not shown
                raw = call_backward(backward, wide.replacing(moved), grad_output, scratch=False)
            g = validate(raw, wide).values
            for name, b in base.items():
                if name in g:
                    change = np.abs(g[name].reshape(-1) - b)
                    spread[name] = np.maximum(spread[name], change) if name in spread else change
    except ProbeError:
        return {}
    return spread


# Steps as fractions of the narrow code's first step h: h, h/2, h/4, then quartering to h/256.
KINK_STEPS = (1.0, 0.5, 0.25, 1.0 / 16, 1.0 / 64, 1.0 / 256)
# Three steps running (rows of KINK_STEPS, largest first) and the share of its gap a kink
# keeps each time the step shrinks there: curvature's halves (quarters) as the step halves
# (quarters), or shrinks faster.
KINK_TRIPLES = ((0, 1, 2, 0.75), (0, 2, 3, 0.5), (2, 3, 4, 0.5), (3, 4, 5, 0.5))


def kink_within_reach(
    probe: TensorProbe, own: TensorProbe, flat: np.ndarray, narrow: np.ndarray, scale: np.ndarray
) -> tuple[np.ndarray, Estimate] | None:
    """Which narrow gradients that leave their float64 run are explained by a kink of the
    float64 run within the narrow type's resolution, with the estimate each is judged by.

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
    if not took.any():
        return None
    row = np.argmax(fits, axis=0)  # the largest step that explains it
    cols = np.arange(n)
    lv, rv, nv = left[row, cols], right[row, cols], noise[row, cols]
    nearer = np.where(np.abs(narrow - lv) <= np.abs(narrow - rv), lv, rv)
    return took, Estimate(nearer[took], nv[took])


# -- code judged on its own narrow arithmetic: wide steps ------------------------------------

WIDE_ROWS = 4  # a window of four steps s, 2s, 4s, 8s
WIDE_FIRST, WIDE_LAST = -2, 5  # windows start at the first step times 2**k, k in this range
WIDE_SAFETY = 2.0  # the measured higher-order term is taken twice
WIDE_NOISE = 2.0  # and the rounding it carries twice (as the ladder's tableau does)
SHRINK_LIMIT = 0.625  # differences of the quotients halve their steps' squares: 1/4, with room
STEP_GROWTH = 1.5  # a window's steps ascend, each at least this many times the last (about 2)


def wide_estimate(probe: TensorProbe, flat: np.ndarray, taken: list[Taken] | None = None,
                  plain: bool = False) -> Estimate:
    """The derivative of narrow code from central quotients at steps far larger than the
    ladder's, where rounding noise no longer hides it: narrow arithmetic puts the best
    central step near u**(1/3) of the scale, and the loss stays smooth well beyond.

    Windows of WIDE_ROWS steps s1 < s2 < s3 < s4 (each twice the last; their real widths
    are used) from the first step times 2**WIDE_FIRST up to 2**(WIDE_LAST + 3). In a window
    the quotients D = f' + c2 s**2 + c4 s**4 + ...: Richardson's R12 = (s2**2 D1 -
    s1**2 D2) / (s2**2 - s1**2) = f' - c4 s1**2 s2**2 + ...; c4 is measured twice, from
    R12 - R23 and from R23 - R34 (two measures, so that orders cancelling in one show in the
    other), each with its rounding added, and the larger taken WIDE_SAFETY times; R12's own
    rounding counts WIDE_NOISE times. A window is used only where its quotients are seen to
    follow that model: each difference of consecutive quotients at most SHRINK_LIMIT of the
    next larger one (they shrink fourfold as the step halves), beyond rounding, and the
    one-sided quotients' gap shrinks with the step as curvature makes it (a kink within
    the window keeps it), and its steps ascend (:func:`_ascending`: a pair whose loss was not
    finite shrank its step). The estimate with the smallest bound; one batch of pairs (those
    ``taken`` before at the same coordinate and step are not evaluated again; its own are added
    to ``taken``)."""
    n = flat.size
    ks = np.arange(WIDE_FIRST, WIDE_LAST + WIDE_ROWS)
    h0 = probe.prior_steps(flat)
    asked = np.concatenate([h0 * 2.0**k for k in ks])
    p = pairs_reusing(probe, np.tile(flat, ks.size), asked, taken or [])
    if taken is not None:  # for a second look at the same steps
        taken.append((np.tile(flat, ks.size), asked, p))
    rows = ks.size
    d = p.central.reshape(rows, n)
    s = (0.5 * (p.h_plus + p.h_minus)).reshape(rows, n)
    e = (2.0 * p.noise / (p.h_plus + p.h_minus)).reshape(rows, n)  # each quotient's rounding
    right, left = (q.reshape(rows, n) for q in p.sides(probe.f0))
    side_noise = (2.0 * p.noise / np.minimum(p.h_plus, p.h_minus)).reshape(rows, n)
    # Asymmetric moves (x + h and x - h rounded to the type's grid) leave a first-order term
    # f'' (h+ - h-) / 2 in a central quotient; f'' from the one-sided gap at the same step.
    asymmetry = (np.abs(p.h_plus - p.h_minus) / np.maximum(p.h_plus + p.h_minus, 1e-300)).reshape(rows, n)
    # Never beyond the params' own scale (as steps.largest_smooth_step): past it the loss
    # along a coordinate is another function, and agreement there proves nothing.
    scale = np.maximum(np.abs(probe.x[flat].astype(np.float64)), probe.x_scale)
    table = (d, s, e, right - left, side_noise, asymmetry, scale)
    # ``plain``: also windows without extrapolation (:func:`plain_windowed`), for quotients
    # that rounding rather than curvature limits.
    return Estimate.better(windowed(*table), plain_windowed(*table)) if plain else windowed(*table)


def windowed(d: np.ndarray, s: np.ndarray, e: np.ndarray, apart: np.ndarray, side_noise: np.ndarray,
             asymmetry: np.ndarray, limit: np.ndarray) -> Estimate:
    """The estimate of :func:`wide_estimate` from rows of central quotients ``d`` at steps
    ``s`` (each twice the last; rows x columns, a column per quantity estimated) with their
    rounding ``e``, the one-sided quotients' difference ``apart`` (right - left) and its
    rounding ``side_noise``, the moves' relative ``asymmetry``, and the largest step each
    column may use (``limit``)."""
    rows, n = d.shape
    gap = np.abs(apart)
    # The second difference over the step's square, f'' + f'''' s**2 / 12 + ...: the even part
    # of the loss along the coordinate, with its rounding.
    bend = apart / s
    bend_noise = 2.0 * side_noise / s
    e = e + gap * asymmetry

    def richardson(i: int) -> tuple[np.ndarray, np.ndarray]:
        a2, b2 = s[i] ** 2, s[i + 1] ** 2
        value = (b2 * d[i] - a2 * d[i + 1]) / (b2 - a2)
        noise = (b2 * e[i] + a2 * e[i + 1]) / (b2 - a2)
        return value, noise

    value = d[0].copy()
    error = np.full(n, np.inf)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        for w in range(rows - WIDE_ROWS + 1):
            i = np.arange(w, w + WIDE_ROWS)
            signed = [d[i[k + 1]] - d[i[k]] for k in range(3)]
            steps = [np.abs(x) for x in signed]
            noise = [e[i[k]] + e[i[k + 1]] for k in range(3)]
            follows = np.ones(n, dtype=bool)
            for k in range(2):
                room = 2.0 * WIDE_NOISE * (noise[k] + noise[k + 1])
                follows &= steps[k] <= SHRINK_LIMIT * steps[k + 1] + room
                # nor faster than fourfold twice over, and in the same direction: past the
                # scale on which the loss is smooth (an oscillation, a bend) quotients wander.
                follows &= steps[k] >= steps[k + 1] / 16.0 - room
                follows &= (signed[k] * signed[k + 1] > 0) | (np.minimum(steps[k], steps[k + 1]) <= room)
            # The one-sided gap grows in proportion to the step (curvature), not stays (a kink).
            first, last = i[0], i[-1]
            # And the even part follows its own model as the odd part does: its changes shrink
            # with the step too (a corner where only f'' jumps, between the window's steps, puts
            # every quotient off the model while its changes can shrink fourfold by chance).
            follows &= _shrinking([bend[i[k + 1]] - bend[i[k]] for k in range(3)],
                                  [bend_noise[i[k]] + bend_noise[i[k + 1]] for k in range(3)])
            follows &= gap[first] <= gap[last] * (s[first] / s[last]) * 2.0 + 2.0 * WIDE_NOISE * (side_noise[first] + side_noise[last])
            r12, n12 = richardson(i[0])
            r23, n23 = richardson(i[1])
            r34, n34 = richardson(i[2])
            s1, s2, s3, s4 = (s[k] for k in i)
            wa, wb = s2**2 * (s3**2 - s1**2), s3**2 * (s4**2 - s2**2)
            c4a, c4b = (r12 - r23) / wa, (r23 - r34) / wb
            slack_a, slack_b = (n12 + n23) / wa, (n23 + n34) / wb
            # The model predicts one c4: the two measures must agree (to a factor of two),
            # each moved by at most WIDE_NOISE times its own rounding; a corner or a kink
            # between the steps breaks that (a corner where only f'' jumps leaves a term in
            # s in every quotient: c4a is then 8 times c4b).
            follows &= _agree(c4a, slack_a, c4b, slack_b)
            c4a, c4b = np.abs(c4a) + slack_a, np.abs(c4b) + slack_b
            bound = WIDE_SAFETY * np.maximum(c4a, c4b) * s1**2 * s2**2 + WIDE_NOISE * n12
            # Every smaller step's quotient lies at least as close to the estimate as the
            # window's smallest does, within its own rounding: the window continues the loss
            # seen at small steps, not a regime past a bend or an oscillation.
            for j in range(w):
                follows &= np.abs(d[j] - r12) <= np.abs(d[i[0]] - r12) + WIDE_NOISE * e[j] + bound
            follows &= _ascending(s, i, limit)
            bound = np.where(follows & np.isfinite(bound), bound, np.inf)
            take = bound < error
            value = np.where(take, r12, value)
            error = np.where(take, bound, error)
    return Estimate(value, error)


def _agree(a: np.ndarray, slack_a: np.ndarray, b: np.ndarray, slack_b: np.ndarray) -> np.ndarray:
    """Two measures of one quantity agree to a factor of two once each may move by WIDE_NOISE
    times its rounding (``slack_a``, ``slack_b``): of one sign, or one within its rounding of 0."""
    room_a, room_b = WIDE_NOISE * slack_a, WIDE_NOISE * slack_b
    low_a, low_b = np.abs(a) - room_a, np.abs(b) - room_b
    high_a, high_b = np.abs(a) + room_a, np.abs(b) + room_b
    signs = (a * b > 0) | (low_a <= 0) | (low_b <= 0)
    return (low_a <= 2.0 * high_b) & (low_b <= 2.0 * high_a) & signs


def _ascending(s: np.ndarray, rows: np.ndarray, limit: np.ndarray) -> np.ndarray:
    """The window's steps ``s[rows]`` ascend as the model's do (each at least STEP_GROWTH
    times the last) up to at most ``limit``, and every row before the window has a smaller
    step than its first. Steps the pairs shrank (a loss not finite at the step asked: 16
    times smaller) repeat smaller ones out of order; a window across them is no window of
    the model, and its last step is not its widest."""
    ok = s[rows[-1]] <= limit
    for a, b in zip(rows[:-1], rows[1:]):
        ok &= s[b] >= STEP_GROWTH * s[a]
    for j in range(int(rows[0])):
        ok &= s[j] < s[rows[0]]
    return ok


def _shrinking(signed: list[np.ndarray], noise: list[np.ndarray]) -> np.ndarray:
    """Consecutive changes (smallest step first) shrink as the step halves, at most
    SHRINK_LIMIT of the next larger one and in the same direction, beyond their rounding."""
    ok = np.ones(signed[0].shape, dtype=bool)
    for k in range(len(signed) - 1):
        room = 2.0 * WIDE_NOISE * (noise[k] + noise[k + 1])
        small, large = np.abs(signed[k]), np.abs(signed[k + 1])
        ok &= small <= SHRINK_LIMIT * large + room
        ok &= (signed[k] * signed[k + 1] > 0) | (np.minimum(small, large) <= room)
    return ok


def plain_windowed(d: np.ndarray, s: np.ndarray, e: np.ndarray, apart: np.ndarray,
                   side_noise: np.ndarray, asymmetry: np.ndarray, limit: np.ndarray) -> Estimate:
    """As :func:`windowed` (the same arguments), from windows of three steps s1 < s2 < s3
    without extrapolation, for quotients that rounding rather than curvature limits (one
    extrapolation multiplies their rounding): the estimate D2 with c2 s2**2 measured from
    D3 - D2 (its rounding added), taken WIDE_SAFETY times, plus WIDE_NOISE times D2's own
    rounding. A window is used only where D2 - D1 is at most SHRINK_LIMIT of D3 - D2 and in
    the same direction, beyond rounding (the quotients follow c2 s**2), the one-sided gap
    shrinks with the step, and every smaller step's quotient lies as close to the estimate
    as its rounding allows."""
    rows, n = d.shape
    gap = np.abs(apart)
    e = e + gap * asymmetry
    value = d[0].copy()
    error = np.full(n, np.inf)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        for w in range(rows - 2):
            i1, i2, i3 = w, w + 1, w + 2
            lower, upper = d[i2] - d[i1], d[i3] - d[i2]
            follows = _shrinking([lower, upper], [e[i1] + e[i2], e[i2] + e[i3]])
            follows &= gap[i1] <= gap[i3] * (s[i1] / s[i3]) * 2.0 + 2.0 * WIDE_NOISE * (side_noise[i1] + side_noise[i3])
            width = s[i3] ** 2 - s[i2] ** 2
            bend = (np.abs(upper) + e[i2] + e[i3]) * s[i2] ** 2 / width
            bound = WIDE_SAFETY * bend + WIDE_NOISE * e[i2]
            for j in range(w):
                follows &= np.abs(d[j] - d[i2]) <= np.abs(d[i1] - d[i2]) + WIDE_NOISE * e[j] + bound
            follows &= _ascending(s, np.arange(w, w + 3), limit)
            bound = np.where(follows & np.isfinite(bound), bound, np.inf)
            take = bound < error
            value = np.where(take, d[i2], value)
            error = np.where(take, bound, error)
    return Estimate(value, error)
