"""Each side of the point on its own: the last resort for coordinates the ladders leave
undecided.

Beside a kink a two-sided ladder's steps keep crossing it, and steps small enough not to
reach it drown in rounding noise. Each side alone, on steps growing 4-fold away from the
point (:func:`one_sided_rows`, :func:`side_estimate`), reaches on the side away from the kink steps that beat
the noise; :func:`judge_sides_apart` gives the verdicts from the two sides' derivatives
(a kink where they differ and the value lies between them). :mod:`.coordinates` uses both
after its ladders.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from ..common.status import FAIL, INCONCLUSIVE, KINK
from .kink_evidence import kink_evidence, within_kink
from .kinks_at_point import NEAR_SAFETY, one_clean_side
from .ladder import Estimate, drifting, tableau
from .probe import TensorProbe
from .verdict import NEAR_KINK, SHARED_POINT, SIGNIFICANCE, Judged, verdicts

SIDE_ROWS = 5
SIDE_RATIO = 4.0
SIDE_NOISE = 1024.0


class SideRows(NamedTuple):
    """One side's rows (SIDE_ROWS, coordinates), the largest step first: the losses, the
    distances the forward saw, the quotients."""

    values: np.ndarray
    moved: np.ndarray
    quotients: np.ndarray


def one_sided_rows(probe: TensorProbe, flat: np.ndarray, smallest: np.ndarray, sign: float) -> SideRows:
    """The quotients from one side only, on steps growing 4-fold from ``smallest``, or from
    the step that beats rounding noise where that is larger (as far as the params' own
    scale): for a point beside a kink, the side away from it reaches
    steps large enough to beat rounding noise, which a two-sided ladder cannot."""
    n = flat.size
    cap = np.maximum(np.abs(probe.x[flat].astype(np.float64)), probe.x_scale)
    # The top step beats rounding noise: its quotient's noise is a SIDE_NOISE-th of the
    # tolerance (the tableau's bound is built from the rows below it, each noisier).
    tol = probe.tolerance(flat, probe.a[flat])
    with np.errstate(over="ignore"):  # a tolerance near the smallest float: an infinite step, capped below
        beats_noise = SIDE_NOISE * 2.0 * probe.loss_noise(np.full(n, probe.f0)) / np.maximum(tol, 1e-300)
    top = np.minimum(np.maximum(smallest * SIDE_RATIO ** (SIDE_ROWS - 1), beats_noise),
                     np.maximum(cap, smallest))
    steps = np.concatenate([top / SIDE_RATIO**k for k in range(SIDE_ROWS)])
    values, moved = probe.one_side(np.tile(flat, SIDE_ROWS), steps, sign)
    values, moved = values.reshape(SIDE_ROWS, n), moved.reshape(SIDE_ROWS, n)
    with np.errstate(invalid="ignore", divide="ignore"):
        quotients = sign * (values - probe.f0) / moved
    return SideRows(values, moved, quotients)


def side_estimate(probe: TensorProbe, rows: SideRows, rounding: np.ndarray | None = None
                  ) -> tuple[Estimate, np.ndarray]:
    """The tableau's estimate of one side's ``rows`` and whether they drift like c/h, with
    each loss value's rounding the target's figure, or ``rounding`` (per coordinate)."""
    values = np.nan_to_num(rows.values)
    one = probe.loss_noise(values) if rounding is None else np.broadcast_to(rounding, values.shape)
    noise = 2.0 * one / rows.moved
    q = np.nan_to_num(rows.quotients)
    estimate = tableau(q, noise, SIDE_RATIO, 1)
    bad = ~np.isfinite(rows.values).all(axis=0)
    drift = np.asarray(drifting(q, np.zeros_like(q), SIDE_RATIO).any(axis=0))
    return Estimate(estimate.value, np.where(bad, np.inf, estimate.error)), drift


def judge_sides_apart(
    probe: TensorProbe, flat: np.ndarray, left: Estimate, right: Estimate
) -> Judged:
    """Verdicts from one-sided derivatives taken apart (:func:`one_sided`): both sides
    decided and agreeing, the better decides; a side that decides alone decides (the other
    met a kink); sides that disagree are a kink at the point. A failure is a kink where the
    sides are seen to differ and a kink between them could give the value, undecided where
    they are not and the value agrees with one side within its bound (:func:`kink_evidence`)."""
    a = probe.a[flat]
    tol = probe.tolerance(flat, a)
    left = Estimate(left.value, NEAR_SAFETY * left.error)
    right = Estimate(right.value, NEAR_SAFETY * right.error)
    decides_left, decides_right = left.error <= tol, right.error <= tol
    agree = np.abs(left.value - right.value) <= SIGNIFICANCE * (left.error + right.error) + tol
    chosen = one_clean_side(decides_left, decides_right, left, right, Estimate.better(left, right))
    status = verdicts(probe, a, chosen, probe.tolerance(flat, chosen.value))
    both = decides_left & decides_right
    # Sides that disagree show a kink at the point; a value outside them is one several kinks
    # meeting there beside a smooth part can give (see kinks_at_point.judge_sides): undecided, not failed.
    shared = both & ~agree & ~within_kink(a, left, right, tol)
    status[both & ~agree] = np.where(shared, INCONCLUSIVE, KINK)[both & ~agree]
    status[~(decides_left | decides_right)] = INCONCLUSIVE
    explained, undecided = kink_evidence(a, left, right, tol)
    status[(status == FAIL) & explained] = KINK
    status[(status == FAIL) & undecided] = INCONCLUSIVE
    reasons = tuple((SHARED_POINT if shared[k] else NEAR_KINK) if s == INCONCLUSIVE else None
                    for k, s in enumerate(status))
    return Judged(status, chosen, reasons, status == INCONCLUSIVE)


def outside_sides(probe: TensorProbe, flat: np.ndarray, left: Estimate, right: Estimate) -> np.ndarray:
    """Both sides resolved within the tolerance (each bound widened NEAR_SAFETY-fold, as
    :func:`judge_sides_apart` takes them) and apart beyond SIGNIFICANCE times those bounds (a
    kink at or near the point, however small its jump against the tolerance), and the
    analytic value outside every value a kink between them could give (:func:`within_kink`,
    on the sides' own bounds): one only several kinks meeting at the point could give."""
    a = probe.a[flat]
    tol = probe.tolerance(flat, a)
    e_left, e_right = NEAR_SAFETY * left.error, NEAR_SAFETY * right.error
    with np.errstate(invalid="ignore"):
        shown = ((e_left <= tol) & (e_right <= tol)
                 & (np.abs(left.value - right.value) > SIGNIFICANCE * (e_left + e_right)))
    return shown & ~within_kink(a, left, right, tol)


__all__ = ["SideRows", "judge_sides_apart", "one_sided_rows", "outside_sides", "side_estimate"]
