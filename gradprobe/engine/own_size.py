"""16-bit failures read only at steps far past an element's own size.

16-bit arithmetic shows a slope only at wide steps, set by the tensor's scale (the first
guess eps**(1/3) max(1, |x|): a quarter for bfloat16, the wide-step windows from a sixteenth).
An element far smaller than its tensor may lie on a feature of its own size: an RMS norm over
rows of meters reading about 1e-4, beside rows reading about 1, is flat beyond 1e-4, and
moved across 0 and far past it the loss is another function there (its quotients halve as
the step doubles, each within its rounding of a smooth model). Failures read there failed
correct elements at -505 and -5373 against 0.3 +- 5.2 and -5.6 +- 5.5.

So a 16-bit failure of a nonzero element OWN_SIZE times smaller than its tensor's scale and
than its first step stands only where a look within CLOSE times its own size disagrees with
the analytic value: the pair taken at the smallest step there whose rounding could show the
discrepancy (below 1/SIGNIFICANCE of it), beyond SIGNIFICANCE times that rounding. Farther
out truncation on the element's own scale still rules: the quotients at 8, 4, 2 and 1 times
such an element's size read -176, -320, -480 and -575 for a correct -586. Elsewhere the
failure is undecided and says why. An element at exactly 0 has no size of its own and keeps
its verdict (a bias at its first value). Along a direction (:mod:`.along`) the share of the
analytic slope such elements carry at the estimate's steps is what they may leave out of the
loss's slope there (:func:`moved_beyond_own_size`).
"""

from __future__ import annotations

import numpy as np

from ..common.status import FAIL
from .probe import TensorProbe
from .refine import Taken
from .verdict import SIGNIFICANCE, Judged

OWN_SIZE = 16.0  # an element this many times smaller than its tensor's scale and its first step
CLOSE = 2.0  # is failed only by a look within this many times its own size
BEYOND_OWN_SIZE = (
    "rounding noise in the loss is above the threshold at every step tried: the steps wide enough for "
    "{dtype} to show the slope move the element, {size:.2g}, far past its own size, across 0, where the loss "
    "may be another function, and no step within {times:g} times that size resolves the discrepancy")


def far_from_own_size(probe: TensorProbe, flat: np.ndarray) -> np.ndarray:
    """Per coordinate ``flat``: a nonzero element OWN_SIZE times smaller than its tensor's
    scale and than its first step."""
    size = np.abs(probe.x[flat].astype(np.float64))
    return (size > 0) & (OWN_SIZE * size < np.minimum(probe.prior_steps(flat), probe.x_scale))


def failures_within_reach(probe: TensorProbe, flat: np.ndarray, judged: Judged, taken: list[Taken]) -> Judged:
    """``judged`` with the failures of elements far smaller than their tensor and their steps
    undecided where no pair ``taken`` within CLOSE times the element's size bears them out
    (see the module)."""
    failed = np.flatnonzero(judged.status == FAIL)
    failed = failed[far_from_own_size(probe, flat[failed])]
    if failed.size == 0:
        return judged
    reach = CLOSE * np.abs(probe.x[flat[failed]].astype(np.float64))
    a = probe.a[flat[failed]]
    gap = np.abs(a - judged.estimate.value[failed])
    position = {int(k): j for j, k in enumerate(flat[failed])}
    closest: list[tuple[float, float, float] | None] = [None] * failed.size  # (step, quotient, rounding)
    for where, _, pairs in taken:
        steps = 0.5 * (pairs.h_plus + pairs.h_minus)
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            rounding = 2.0 * pairs.noise / (pairs.h_plus + pairs.h_minus)
        for i, k in enumerate(where.tolist()):
            j = position.get(int(k))
            if j is None or not steps[i] <= reach[j]:
                continue
            q, r = float(pairs.central[i]), float(rounding[i])
            seen = closest[j]
            # the smallest step within reach whose rounding could show the discrepancy
            if np.isfinite(q) and SIGNIFICANCE * r < gap[j] and (seen is None or steps[i] < seen[0]):
                closest[j] = (float(steps[i]), q, r)
    shown = np.array([c is not None and abs(c[1] - a[j]) > SIGNIFICANCE * c[2] for j, c in enumerate(closest)],
                     dtype=bool)
    undecided = failed[~shown]
    return judged.undecided(undecided, tuple(
        BEYOND_OWN_SIZE.format(dtype=probe.compute_dtype, size=float(abs(probe.x[flat[k]])), times=CLOSE)
        for k in undecided.tolist()))


def moved_beyond_own_size(probe: TensorProbe, d: np.ndarray, smallest: float) -> np.ndarray:
    """A mask over the tensor: nonzero elements OWN_SIZE times smaller than its scale that
    ``smallest``, the estimate's smallest step along the unit direction ``d``, moves more
    than OWN_SIZE times their own size (the loss's slope along those steps may miss their
    share of a . d)."""
    x = np.abs(probe.x.astype(np.float64))
    return (x > 0) & (OWN_SIZE * x < probe.x_scale) & (smallest * np.abs(d) > OWN_SIZE * x)
