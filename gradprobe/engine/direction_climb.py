"""For a directional check that rounding, not the steps' size, still limits: how wide its
steps may go, and ladders averaged over jittered steps.

Along a random unit direction u over n elements each element moves by about t / sqrt(n), so
a direction can take steps far wider than a coordinate's before its elements leave their
own scale (:func:`widest_step`); the loss's rounding, fixed in size, weighs 1/t as much.
Where rounding still limits at the widest ladder that directions.py kept, JITTERS ladders
at that step times 1 + SPREAD * s, s evenly over [-1/2, 1/2], are averaged row by row
(:func:`jittered`). Every row of a ladder jitters by the same share, so the mean rows keep
the tableau's error model (each power of the step carries a constant factor, the mean of
the shares' powers) while roundings that are independent from one point to the next shrink
sqrt(JITTERS) times in the mean. Each row's rounding is judged as :mod:`.averaged` judges a
coordinate's: the scatter about the row's line in the step's square, two checks that it is
rounding that averages out, and never less than the loss's last place over the step.
Neighbouring jittered points must change the loss, by the slope the analytic gradient
predicts, by CHANGE_ULPS units of its last place (a loss that keeps one value across them
rounds alike at each: nothing averages out).
"""

from __future__ import annotations

import numpy as np

from .ladder import Estimate, tableau
from .probe import TensorProbe
from .widened import root_mean_square

MOVE_SHARE = 0.5  # the widest step moves the part's elements by this share of their rms
JITTERS = 12  # ladders averaged where rounding still limits at the widest ladder
SPREAD = 0.25  # the jittered steps span this share of the step
SCATTER_UNITS = 2.0  # a mean row's rounding: this many times its quotients' seen scatter over sqrt(JITTERS)
CHANGE_ULPS = 2.0  # neighbouring jittered points change the loss by this many units of its last place


BLOCK = 1 << 16  # a direction drawn again where read is summed this many values at a time


def _norm(u) -> float:
    """The Euclidean norm of ``u`` (a direction drawn again where read: a block at a time)."""
    if hasattr(u, "blocks"):
        return float(np.sqrt(sum(float(b @ b) for b in u.blocks(BLOCK))))
    return float(np.linalg.norm(u))


def widest_step(probe: TensorProbe, part: slice, u) -> float:
    """The widest step along ``u`` over ``part``: its elements move by MOVE_SHARE of their
    root mean square (the tensor's where the part's is 0) on average, so the moved point
    stays among the values the params take."""
    size = max(part.stop - part.start, 1)
    scale = root_mean_square(probe.x[part]) or probe.x_scale
    spread = _norm(u) / size ** 0.5  # the rms of u's elements
    return MOVE_SHARE * scale / spread if spread > 0 else 0.0


def jittered(probe: TensorProbe, part: slice, u, t: float, rows: int, ratio: float
             ) -> tuple[Estimate, Estimate, Estimate] | None:
    """The central, left and right tableaux over ``rows`` mean rows of JITTERS ladders
    (steps shrinking by ``ratio``) from ``t`` times 1 + SPREAD * s, or None where the
    jittered points are too close for their roundings to differ or their rows fail a check. Each row's quotients are fitted by a line in the step's
    square (the truncation the jitter moves them by); the scatter about it, SCATTER_UNITS
    times its root mean square, is the rounding seen (as :mod:`.averaged` takes it for a
    coordinate). A row counts only where its quotients scatter about the line by no more than
    twice one quotient's rounding and the means of every other jitter agree within twice
    their own rounding (roundings that average out, not move together); its mean's rounding
    is the lesser of one quotient's and the seen one, never below the loss's last place
    over the step, over sqrt(JITTERS)."""
    shares = 1.0 + SPREAD * np.linspace(-0.5, 0.5, JITTERS)
    steps = t * shares[:, None] * ratio ** -np.arange(rows)[None, :]  # (JITTERS, ROWS)
    values, predicted = probe.along(part, u, np.stack([steps, -steps], axis=2).reshape(-1))
    f_plus, f_minus = values[0::2].reshape(steps.shape), values[1::2].reshape(steps.shape)
    p_plus, p_minus = predicted[0::2].reshape(steps.shape), predicted[1::2].reshape(steps.shape)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        right = (f_plus - probe.f0 - p_plus) / steps
        left = (probe.f0 - f_minus + p_minus) / steps
        q = (right + left) / 2.0
        if not (np.all(np.isfinite(q)) and np.all(np.isfinite(right)) and np.all(np.isfinite(left))):
            return None
        # Neighbouring jittered points change the loss by CHANGE_ULPS of its last place at least.
        last = probe.eps * np.maximum(np.abs(f_plus), np.abs(f_minus)).max(axis=0)  # per row
        if not np.all(np.abs(np.diff(p_plus, axis=0)) >= CHANGE_ULPS * last[None, :]):
            return None
        one = (probe.moved_noise(f_plus, f_minus) / steps).max(axis=0)  # one quotient's rounding
        s2 = steps**2
        ds2, dq = s2 - s2.mean(axis=0), q - q.mean(axis=0)
        beta = (ds2 * dq).sum(axis=0) / (ds2**2).sum(axis=0)
        resid = dq - beta * ds2
        seen = SCATTER_UNITS * np.sqrt((resid**2).sum(axis=0) / (JITTERS - 2))
        halves = np.abs(q[0::2].mean(axis=0) - q[1::2].mean(axis=0))
        trend = np.abs(beta * (s2[0::2].mean(axis=0) - s2[1::2].mean(axis=0)))
        ok = (np.abs(resid).max(axis=0) <= 2.0 * one) & (halves <= trend + 2.0 * one / np.sqrt(JITTERS / 2.0))
        if not np.all(ok):
            return None
        size = np.sqrt(s2.mean(axis=0))
        noise = np.maximum(np.minimum(one, seen), last / size) / np.sqrt(JITTERS)
        side_noise = np.maximum(2.0 * noise, 2.0 * last / size)
    return (tableau(q.mean(axis=0)[:, None], noise[:, None], ratio, 2),
            tableau(left.mean(axis=0)[:, None], side_noise[:, None], ratio, 1),
            tableau(right.mean(axis=0)[:, None], side_noise[:, None], ratio, 1))
