"""Code judged on its own narrow arithmetic: its derivative from central quotients at wide
steps, where rounding no longer hides it, in windows whose error model is checked on the
quotients themselves (Richardson windows, and windows without extrapolation).
"""

from __future__ import annotations

import numpy as np

from .ladder import Estimate
from .probe import Pairs, TensorProbe
from .refine import Taken, pairs_reusing

WIDE_ROWS = 4  # a window of four steps s, 2s, 4s, 8s
WIDE_FIRST, WIDE_LAST = -2, 5  # windows start at the first step times 2**k, k in this range
WIDE_SAFETY = 2.0  # the measured higher-order term is taken twice
WIDE_NOISE = 2.0  # and the rounding it carries twice (as the ladder's tableau does)
SHRINK_LIMIT = 0.625  # differences of the quotients halve their steps' squares: 1/4, with room
# Where rounding is small (float64 code's chain on measured rounding), a first-order error's
# differences, which halve (a corner at the point), are told from a second-order one's.
FIRST_ORDER_LIMIT = 0.4
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
    ks = np.arange(WIDE_FIRST, WIDE_LAST + WIDE_ROWS)
    asked = probe.prior_steps(flat)[None, :] * 2.0 ** ks[:, None]
    p = pairs_reusing(probe, np.tile(flat, ks.size), asked.reshape(-1), taken or [])
    if taken is not None:  # for a second look at the same steps
        taken.append((np.tile(flat, ks.size), asked.reshape(-1), p))
    # Never beyond the params' own scale (as steps.largest_smooth_step): past it the loss
    # along a coordinate is another function, and agreement there proves nothing.
    table = wide_table(probe, p, ks.size, np.maximum(np.abs(probe.x[flat].astype(np.float64)), probe.x_scale))
    # ``plain``: also windows without extrapolation (:func:`plain_windowed`), for quotients
    # that rounding rather than curvature limits.
    return Estimate.better(windowed(*table), plain_windowed(*table)) if plain else windowed(*table)


def wide_table(probe: TensorProbe, p: Pairs, rows: int, limit: np.ndarray) -> tuple[np.ndarray, ...]:
    """The ``rows`` of wide-step pairs ``p`` (a row per step, a column per coordinate) as
    :func:`windowed` and :func:`plain_windowed` take them: central quotients, steps, their
    rounding, the one-sided gap, a side's rounding, the moves' asymmetry, and ``limit``."""
    n = p.f_plus.size // rows
    d = p.central.reshape(rows, n)
    s = (0.5 * (p.h_plus + p.h_minus)).reshape(rows, n)
    e = (2.0 * p.noise / (p.h_plus + p.h_minus)).reshape(rows, n)  # each quotient's rounding
    right, left = (q.reshape(rows, n) for q in p.sides(probe.f0))
    side_noise = (2.0 * p.noise / np.minimum(p.h_plus, p.h_minus)).reshape(rows, n)
    # Asymmetric moves (x + h and x - h rounded to the type's grid) leave a first-order term
    # f'' (h+ - h-) / 2 in a central quotient; f'' from the one-sided gap at the same step.
    asymmetry = (np.abs(p.h_plus - p.h_minus) / np.maximum(p.h_plus + p.h_minus, 1e-300)).reshape(rows, n)
    with np.errstate(invalid="ignore"):  # both sides overflowed: no gap, judged as such
        return d, s, e, right - left, side_noise, asymmetry, limit


def windowed(d: np.ndarray, s: np.ndarray, e: np.ndarray, apart: np.ndarray, side_noise: np.ndarray,
             asymmetry: np.ndarray, limit: np.ndarray, *, shrink: float = SHRINK_LIMIT) -> Estimate:
    """The estimate of :func:`wide_estimate` from rows of central quotients ``d`` at steps
    ``s`` (each twice the last; rows x columns, a column per quantity estimated) with their
    rounding ``e``, the one-sided quotients' difference ``apart`` (right - left) and its
    rounding ``side_noise``, the moves' relative ``asymmetry``, and the largest step each
    column may use (``limit``); consecutive differences shrink to ``shrink`` of the next."""
    return windowed_at(d, s, e, apart, side_noise, asymmetry, limit, shrink=shrink)[0]


def windowed_at(d: np.ndarray, s: np.ndarray, e: np.ndarray, apart: np.ndarray, side_noise: np.ndarray,
                asymmetry: np.ndarray, limit: np.ndarray, *, shrink: float = SHRINK_LIMIT) -> tuple[Estimate, np.ndarray]:
    """:func:`windowed`, and per column the row of the widest quotient its value takes (the
    window's second; -1 where no window bounds it)."""
    rows, n = d.shape
    top = np.full(n, -1)
    gap = np.abs(apart)
    # The second difference over the step's square, f'' + f'''' s**2 / 12 + ...: the even part
    # of the loss along the coordinate, with its rounding.
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):  # an overflowed side: judged as such
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
                follows &= steps[k] <= shrink * steps[k + 1] + room
                # nor faster than fourfold twice over, and in the same direction: past the
                # scale on which the loss is smooth (an oscillation, a bend) quotients wander.
                follows &= steps[k] >= steps[k + 1] / 16.0 - room
                follows &= (signed[k] * signed[k + 1] > 0) | (np.minimum(steps[k], steps[k + 1]) <= room)
            # The one-sided gap grows in proportion to the step (curvature), not stays (a kink).
            first, last = i[0], i[-1]
            # And the even part follows its own model as the odd part does: its changes shrink
            # with the step too (a corner where only f'' jumps, between the window's steps, puts
            # every quotient off the model while its changes can shrink fourfold by chance).
            follows &= shrinking([bend[i[k + 1]] - bend[i[k]] for k in range(3)],
                                  [bend_noise[i[k]] + bend_noise[i[k + 1]] for k in range(3)], shrink)
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
            follows &= agree(c4a, slack_a, c4b, slack_b)
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
            top = np.where(take, w + 1, top)
    return Estimate(value, error), top


def agree(a: np.ndarray, slack_a: np.ndarray, b: np.ndarray, slack_b: np.ndarray) -> np.ndarray:
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


def shrinking(signed: list[np.ndarray], noise: list[np.ndarray], limit: float = SHRINK_LIMIT) -> np.ndarray:
    """Consecutive changes (smallest step first) shrink as the step halves, at most
    ``limit`` of the next larger one and in the same direction, beyond their rounding."""
    ok = np.ones(signed[0].shape, dtype=bool)
    for k in range(len(signed) - 1):
        room = 2.0 * WIDE_NOISE * (noise[k] + noise[k + 1])
        small, large = np.abs(signed[k]), np.abs(signed[k + 1])
        ok &= small <= limit * large + room
        ok &= (signed[k] * signed[k + 1] > 0) | (np.minimum(small, large) <= room)
    return ok


def plain_windowed(d: np.ndarray, s: np.ndarray, e: np.ndarray, apart: np.ndarray,
                   side_noise: np.ndarray, asymmetry: np.ndarray, limit: np.ndarray,
                   *, shrink: float = SHRINK_LIMIT) -> Estimate:
    """As :func:`windowed` (the same arguments), from windows of three steps s1 < s2 < s3
    without extrapolation, for quotients that rounding rather than curvature limits (one
    extrapolation multiplies their rounding): the estimate D2 with c2 s2**2 measured from
    D3 - D2 (its rounding added), taken WIDE_SAFETY times, plus WIDE_NOISE times D2's own
    rounding. A window is used only where D2 - D1 is at most SHRINK_LIMIT of D3 - D2 and in
    the same direction, beyond rounding (the quotients follow c2 s**2), the one-sided gap
    shrinks with the step, and every smaller step's quotient lies as close to the estimate
    as its rounding allows."""
    return plain_windowed_at(d, s, e, apart, side_noise, asymmetry, limit, shrink=shrink)[0]


def plain_windowed_at(d: np.ndarray, s: np.ndarray, e: np.ndarray, apart: np.ndarray, side_noise: np.ndarray,
                      asymmetry: np.ndarray, limit: np.ndarray,
                      *, shrink: float = SHRINK_LIMIT) -> tuple[Estimate, np.ndarray]:
    """:func:`plain_windowed`, and per column the row of the quotient its value is (the
    window's second; -1 where no window bounds it)."""
    rows, n = d.shape
    top = np.full(n, -1)
    gap = np.abs(apart)
    e = e + gap * asymmetry
    value = d[0].copy()
    error = np.full(n, np.inf)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        for w in range(rows - 2):
            i1, i2, i3 = w, w + 1, w + 2
            lower, upper = d[i2] - d[i1], d[i3] - d[i2]
            follows = shrinking([lower, upper], [e[i1] + e[i2], e[i2] + e[i3]], shrink)
            follows &= gap[i1] <= gap[i3] * (s[i1] / s[i3]) * 2.0 + 2.0 * WIDE_NOISE * (side_noise[i1] + side_noise[i3])
            width = s[i3] ** 2 - s[i2] ** 2
            bend = (np.abs(upper) + e[i2] + e[i3]) * s[i2] ** 2 / width
            # The change below D2 measures the same c2 s2**2 (D2 - f' = c2 s2**2, and D2 - D1 =
            # c2 (s2**2 - s1**2)): the bound holds what either change shows beyond rounding, as
            # the room the test above grants lets D2 - D1 exceed what D3 - D2 predicts.
            shown = np.maximum(np.abs(lower) - e[i1] - e[i2], 0.0)
            below = shown * s[i2] ** 2 / (s[i2] ** 2 - s[i1] ** 2)
            bound = WIDE_SAFETY * np.maximum(bend, below) + WIDE_NOISE * e[i2]
            for j in range(w):
                follows &= np.abs(d[j] - d[i2]) <= np.abs(d[i1] - d[i2]) + WIDE_NOISE * e[j] + bound
            follows &= _ascending(s, np.arange(w, w + 3), limit)
            bound = np.where(follows & np.isfinite(bound), bound, np.inf)
            take = bound < error
            value = np.where(take, d[i2], value)
            error = np.where(take, bound, error)
            top = np.where(take, i2, top)
    return Estimate(value, error), top
