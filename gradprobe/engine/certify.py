"""Certifying coordinates with their first pair of calls, from a model measured on the tensor.

Used where a tensor is swept whole (the same coordinates, whatever the seed).

The central quotient at step h differs from the derivative by its truncation, C h**2 (C is
f'''/6 along the coordinate), and by the loss's rounding, at most noise / h. The rounding is
measured once per target (:mod:`.noise`); the truncation's scale is measured once per tensor:
on SAMPLE coordinates (those whose second difference is largest, where the loss bends most,
and others spread over the tensor) two more pairs at 4h and 16h give the quotient's change,
which in the regime the error model assumes is 15 C h**2 and 240 C h**2 (the larger reading,
times SAFETY, is taken: noise and higher orders only make it larger). A coordinate whose own
second difference lies within what the sample saw, whose one-sided slopes show nothing odd,
and whose discrepancy plus twice that bound is within the tolerance passes on its first pair:
its error bound is a real one under assumptions checked on the tensor and on the coordinate.
Where the sample does not show the regime (the changes do not grow as h**2), nothing is
certified this way.
"""

from __future__ import annotations


import numpy as np

from ..common.classes import dataclass
from .probe import Pairs, TensorProbe
from .steps import SETTLE_FRACTION as SETTLED

SAMPLE = 8  # coordinates per tensor the truncation scale is measured on (half: the most bent)
MIN_SIZE = 32  # smaller tensors are re-estimated coordinate by coordinate as before
MIN_OPEN = 4  # the sample's 32 calls are spent only where this many passable coordinates would climb
SAFETY = 10.0  # the measured truncation scale is taken this many times larger
GROWTH = 16.0  # the quotient's change from 4h to 16h against the change from h to 4h, ideally
GROWTH_SLACK = 4.0  # ... within this factor either way
WIDEST = 16.0  # a wider pair's step is at most this many first steps (the range measured)
CAN_PASS_SLACK = 1e-9  # a wider pair is spent unless its least bound misses by more than this


@dataclass(frozen=True)
class Certified:
    passed: np.ndarray  # bool per coordinate: passes on its first pair (or the wider one)
    bound: np.ndarray  # the error bound of the pair it passed on (inf where not covered)
    value: np.ndarray  # that pair's central quotient


def _second(probe: TensorProbe, p: Pairs) -> np.ndarray:
    width = 0.5 * (p.h_plus + p.h_minus)
    return np.abs(p.f_plus - 2.0 * probe.f0 + p.f_minus) / width**2


def certify(
    probe: TensorProbe, flat: np.ndarray, first: Pairs, h: np.ndarray, a: np.ndarray,
    tol: np.ndarray, suspects: np.ndarray,
) -> Certified | None:
    """Which of ``flat`` pass on their ``first`` pairs (steps ``h``) under the tensor's
    measured truncation scale; None where the scale cannot be measured."""
    n = flat.size
    off = np.abs(a - first.central)
    open_ = int(np.count_nonzero(~suspects & (off > SETTLED * tol) & (off < tol)))  # could pass
    if n < MIN_SIZE or open_ < MIN_OPEN:
        return None
    bend = _second(probe, first)
    top = np.argsort(-bend, kind="stable")[: SAMPLE // 2]
    spread = np.linspace(0, n - 1, SAMPLE // 2).astype(np.int64)
    both = np.sort(np.concatenate([top, spread]))  # unique, sorted (np.unique loads numpy.ma)
    sample = both[np.concatenate(([True], both[1:] != both[:-1]))]
    steps = h[sample]
    wider = probe.pairs(np.tile(flat[sample], 2), np.concatenate([4.0 * steps, 16.0 * steps]))
    c1 = first.central[sample]
    c4, c16 = wider.central[: sample.size], wider.central[sample.size:]
    noise = 2.0 * np.maximum(first.noise[sample], wider.noise[: sample.size]) / steps
    d1, d2 = np.abs(c4 - c1), np.abs(c16 - c4)
    # The regime: the change grows like h**2 (16-fold) wherever it stands above the noise.
    visible = d2 > 8.0 * noise
    ratio = d2 / np.maximum(d1, 1e-300)
    if np.any(visible & ((ratio < GROWTH / GROWTH_SLACK) | (ratio > GROWTH * GROWTH_SLACK)) & (d1 > 8.0 * noise)):
        return None
    # d1 carries the first quotient's rounding (1.25 noise); where it is no more than that,
    # the change from 4h to 16h (whose rounding is a quarter of it) reads the truncation.
    first_change = np.where(d1 > 2.5 * noise, d1 / 15.0, 0.0)
    scale = SAFETY * float(np.max(np.maximum(first_change, d2 / 240.0) / steps**2))
    covered = bend <= np.max(bend[sample]) * (1.0 + 1e-9)
    bound = scale * h**2 + 2.0 * first.noise / (first.h_plus + first.h_minus)
    bound = np.where(covered, bound, np.inf)
    value = first.central.copy()
    passed = covered & ~suspects & (np.abs(a - value) + 2.0 * bound <= tol)
    # Rounding hides the threshold at h: one pair at a wider step, within the 16h up to which
    # the sample showed the truncation model to hold, where that bound makes room.
    noisy = np.flatnonzero(covered & ~suspects & ~passed & (np.abs(a - value) <= 0.5 * tol))
    if noisy.size:
        noise_h = 2.0 * first.noise[noisy] / (first.h_plus[noisy] + first.h_minus[noisy]) * h[noisy]
        best = np.cbrt(noise_h / (2.0 * max(scale, 1e-300)))
        wide = np.clip(best, h[noisy], WIDEST * h[noisy])
        x = np.abs(probe.x[flat[noisy]].astype(np.float64))
        wide = np.minimum(wide, np.maximum(np.maximum(x, probe.x_scale), h[noisy]))
        # Not spent where the pair cannot pass: its bound at the distances it would really
        # move, with no rounding above the loss's own scale, already exceeds the threshold.
        _, _, h_plus, h_minus = probe.moved(flat[noisy], wide)
        least = scale * (0.5 * (h_plus + h_minus)) ** 2 \
            + 2.0 * probe.loss_noise(np.zeros(noisy.size)) / (h_plus + h_minus)
        can = 2.0 * least * (1.0 - CAN_PASS_SLACK) <= tol[noisy]
        noisy, wide = noisy[can], wide[can]
    if noisy.size:
        again = probe.pairs(flat[noisy], wide)
        wide_bound = scale * (0.5 * (again.h_plus + again.h_minus)) ** 2 \
            + 2.0 * again.noise / (again.h_plus + again.h_minus)
        ok = np.abs(a[noisy] - again.central) + 2.0 * wide_bound <= tol[noisy]
        took = noisy[ok]
        passed[took] = True
        bound[took] = wide_bound[ok]
        value[took] = again.central[ok]
    return Certified(passed, bound, value)
