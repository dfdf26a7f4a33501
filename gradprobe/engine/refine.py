"""Spending more evaluations on coordinates whose first estimate is not conclusive.

A coordinate is re-estimated on a ladder of steps h, h/2, h/4, ... (one batch for all its
rows): central quotients extrapolated in even powers of h, and the left and right one-sided
quotients extrapolated each on its own, so that a kink's sides are known to O(h**k) rather
than biased by h |f''| / 2. Where the loss is smooth the two sides agree and the central
tableau (or, at a corner where only f'' jumps, the sides' mean) gives the derivative;
where they disagree a pair of much smaller steps tells a kink at the point from one near it.
"""

from __future__ import annotations


import numpy as np

from ..common.classes import dataclass
from .ladder import NOISE_UNITS, Estimate, column_rates, drifting, tableau
from .probe import Pairs, TensorProbe
from .sides_gap import extrapolations_apart, gap_turns

RATIO = 2.0
ONE_SIDE_STILL = 0.125  # a side that moves under 1/8 of the other's move, as the step halves, is still
ROWS = 5
NOISE_SHARE_UNITS = 2.0  # the rounding share of a bound counts twice the quotients' noise
TINY_NOISE_UNITS = 80.0  # the tiny step's one-sided noise (2 delta / t) is 1/40 of the jump


@dataclass(frozen=True)
class Ladder:
    """Estimates from one ladder of steps, per coordinate."""

    central: Estimate
    left: Estimate
    right: Estimate
    noise_share: np.ndarray  # share of the central bound that is rounding noise
    smallest: np.ndarray  # the smallest step of the ladder
    pairs: Pairs | None = None  # every row's pairs, row-major
    sides_steady: np.ndarray | None = None  # the sides' gap shrinks with the step (see below)
    sides_vanish: np.ndarray | None = None  # ... and is seen to, above the noise
    # Each side's quotients crossed a kink among the steps (:func:`crossed_kinks`).
    left_crossed: np.ndarray | None = None
    right_crossed: np.ndarray | None = None
    # How far the sides' mean may lie from f' when the corner (a jump of f'') is not at the
    # point but anywhere within the smallest step: |f''(right) - f''(left)| times that step,
    # the jump read off the central quotients' last change (see :func:`corner_reach`).
    corner_reach: np.ndarray | None = None
    # The sides' gap took both signs beyond its rounding, and how far the sides' first-order
    # extrapolations lie apart beyond it (:mod:`.sides_gap`): kinks or corners within the steps.
    gap_turned: np.ndarray | None = None
    sides_apart_by: np.ndarray | None = None
    # The steps the ladder really started from: the ones asked for, or, where a domain edge
    # lay within them, a restart below it (:func:`below_the_edge`).
    start: np.ndarray | None = None

    def pick(self, which: np.ndarray) -> Ladder:
        steady = None if self.sides_steady is None else self.sides_steady[which]
        vanish = None if self.sides_vanish is None else self.sides_vanish[which]
        crossed = [None if c is None else c[which] for c in (self.left_crossed, self.right_crossed)]
        return Ladder(self.central.pick(which), self.left.pick(which), self.right.pick(which),
                      self.noise_share[which], self.smallest[which],
                      sides_steady=steady, sides_vanish=vanish,
                      left_crossed=crossed[0], right_crossed=crossed[1],
                      corner_reach=None if self.corner_reach is None else self.corner_reach[which],
                      gap_turned=None if self.gap_turned is None else self.gap_turned[which],
                      sides_apart_by=None if self.sides_apart_by is None else self.sides_apart_by[which],
                      start=None if self.start is None else self.start[which])

    def rows_of(self, which: np.ndarray) -> Pairs:
        """The pairs of every row for the coordinates at positions ``which``."""
        assert self.pairs is not None
        n = self.smallest.size
        rows = self.pairs.f_plus.size // n
        index = (np.arange(rows)[:, None] * n + which[None, :]).reshape(-1)
        return Pairs(*(f[index] for f in self.pairs.fields()))


def _quotients(probe: TensorProbe, p: Pairs) -> tuple[np.ndarray, ...]:
    width = p.h_plus + p.h_minus
    right, left = p.sides(probe.f0)
    return p.central, 2 * p.noise / width, right, 2 * p.noise / p.h_plus, left, 2 * p.noise / p.h_minus


Taken = tuple[np.ndarray, np.ndarray, Pairs]  # coordinates, the steps asked for, their pairs


def climb(
    probe: TensorProbe, flat: np.ndarray, start: np.ndarray, rows: int = ROWS,
    known: Pairs | None = None, taken: list[Taken] | None = None,
) -> Ladder:
    """Central and one-sided estimates from steps ``start / RATIO**k``, k < rows. ``known``
    holds the pairs of a ladder's first rows from the same start (row-major), which are
    not evaluated again (all ``rows`` of them, or fewer); nor is any pair ``taken`` before at
    the same coordinate and step (the loss at the same points: the same values)."""
    n = flat.size
    done = 0 if known is None else known.f_plus.size // n
    if known is not None and done >= rows:
        p = Pairs(*(f[:rows * n] for f in known.fields()))
    else:
        steps = np.concatenate([start / RATIO**k for k in range(done, rows)])
        p = pairs_reusing(probe, np.tile(flat, rows - done), steps, taken or [])
        if known is not None:
            p = Pairs(*(np.concatenate([a, b]) for a, b in zip(known.fields(), p.fields())))
    p, start = below_the_edge(probe, flat, start, rows, p, taken or [])
    qc, nc, qr, nr, ql, nl = (q.reshape(rows, n) for q in _quotients(probe, p))
    central = tableau(qc, nc, RATIO, 2)
    steady, vanish = sides_steady(qr, ql, nr + nl)
    # A turn at wider rows says nothing where the last rows show the gap vanishing like h
    # above the noise: what the wider steps crossed lies beyond the last ones.
    turned = gap_turns(qr, ql, nr + nl) & ~vanish
    noise_share = np.minimum(1.0, NOISE_SHARE_UNITS * nc.max(axis=0) / np.maximum(central.error, 1e-300))
    return Ladder(
        central=central,
        left=tableau(ql, nl, RATIO, 1),
        right=tableau(qr, nr, RATIO, 1),
        noise_share=noise_share,
        smallest=start / RATIO ** (rows - 1),
        pairs=p,
        sides_steady=steady,
        sides_vanish=vanish,
        left_crossed=crossed_kinks(ql, nl),
        right_crossed=crossed_kinks(qr, nr),
        corner_reach=corner_reach(qc),
        gap_turned=turned,
        sides_apart_by=extrapolations_apart(qr, ql, nr + nl),
        start=start,
    )


EDGE_SHRINK = 4.0  # a row that moved less than a quarter of its step was shrunk at an edge
EDGE_MARGIN = 8.0  # the ladder restarts this many times below the widest finite step


def below_the_edge(probe: TensorProbe, flat: np.ndarray, start: np.ndarray, rows: int, p: Pairs,
                   taken: list[Taken]) -> tuple[Pairs, np.ndarray]:
    """The ladder's pairs (row-major) and the steps it starts from, restarted below a domain
    edge where one lies within its steps.

    Where the loss is not finite at a row's step (a log or a pole closer than the step),
    :meth:`.probe.TensorProbe.pairs` shrinks that row 16-fold until it is: the rows no longer
    halve from one to the next, and the shrunk ones sit just inside the edge, where the
    quotients are furthest from the derivative. The edge lies beyond the widest step at
    which the loss was finite on both sides; a ladder starting EDGE_MARGIN times below that
    step halves, as the tableau assumes, on steps a fraction of the distance to the edge,
    where a loss smooth up to the edge converges (a pole at distance d adds terms in
    (h/d)**2 to a central quotient). Coordinates whose rows all moved as asked are left."""
    n = flat.size
    asked = np.stack([start / RATIO**k for k in range(rows)])
    moved = (0.5 * (p.h_plus + p.h_minus)).reshape(rows, n)
    edge = np.flatnonzero((moved < asked / EDGE_SHRINK).any(axis=0))
    if edge.size == 0:
        return p, start
    start = start.copy()
    start[edge] = moved[:, edge].max(axis=0) / EDGE_MARGIN
    steps = np.concatenate([start[edge] / RATIO**k for k in range(rows)])
    again = pairs_reusing(probe, np.tile(flat[edge], rows), steps, taken)
    fields = []
    for mine, new in zip(p.fields(), again.fields()):
        mine = mine.reshape(rows, n).copy()
        mine[:, edge] = new.reshape(rows, edge.size)
        fields.append(mine.reshape(-1))
    return Pairs(*fields), start


def ladder_taken(flat: np.ndarray, start: np.ndarray, ladder: Ladder) -> Taken:
    """A ladder's pairs as taken from ``start`` over ``flat`` (for :func:`climb`; from the
    steps the ladder really started from, where it restarted below a domain edge)."""
    assert ladder.pairs is not None
    if ladder.start is not None:
        start = ladder.start
    rows = ladder.pairs.f_plus.size // flat.size
    return np.tile(flat, rows), np.concatenate([start / RATIO**k for k in range(rows)]), ladder.pairs


def pairs_reusing(probe: TensorProbe, flat: np.ndarray, steps: np.ndarray, taken: list[Taken]) -> Pairs:
    """``probe.pairs(flat, steps)``, with the pairs already taken at the same coordinate and
    step copied rather than evaluated again."""
    seen: dict[tuple[int, float], tuple[int, int]] = {}
    for j, (where, asked, _) in enumerate(taken):
        for k, key in enumerate(zip(where.tolist(), asked.tolist())):
            seen.setdefault(key, (j, k))
    found = [seen.get(key) for key in zip(flat.tolist(), steps.tolist())]
    new = np.array([f is None for f in found], dtype=bool)
    if new.all():
        return probe.pairs(flat, steps)
    fields = [np.empty(flat.size) for _ in range(5)]
    for i, f in enumerate(found):
        if f is not None:
            for mine, old in zip(fields, taken[f[0]][2].fields()):
                mine[i] = old[f[1]]
    if new.any():
        got = probe.pairs(flat[new], steps[new])
        for mine, value in zip(fields, got.fields()):
            mine[new] = value
    return Pairs(*fields)


def corner_reach(central: np.ndarray) -> np.ndarray:
    """Per coordinate, from the central quotients (rows, coordinates): a bound on how far the
    sides' mean lies from f' where f'' jumps (from A on the left to B on the right) somewhere
    within the smallest step h. One-sided quotients are f' + B h/2 and f' - A h/2 when the
    jump is at the point, and their extrapolations meet at f'; a jump at a distance d < h on
    one side shifts that side's extrapolation by (A - B) d, which its quotients do not show.
    The central quotients change by (B - A) dh / 4 from row to row (their first-order term):
    |B - A| h = 4 |change| h / dh (the change's rounding is in the sides' own bounds)."""
    with np.errstate(over="ignore", invalid="ignore"):  # quotients near the type's range
        return 4.0 * np.abs(central[-1] - central[-2]) / (RATIO - 1.0)


def crossed_kinks(side: np.ndarray, noise: np.ndarray) -> np.ndarray:
    """Per coordinate, from one side's quotients (rows, coordinates): some change between
    rows is larger than the one before it, beyond the rounding noise, or the quotients drift
    like 1/h at any size (:func:`.ladder.drifting` with no noise allowance). A smooth side's
    quotients change less and less as the step shrinks (by h f''/2, then h**2 ...); a
    change that grows is a kink between the point and the step, crossed, and a drift like
    1/h one closer than the steps (or, below the rounding, a fixed rounding offset: taken as
    a kink all the same, since this only withholds a failure at a kink)."""
    return np.asarray(drifting(side, np.zeros_like(side), RATIO).any(axis=0)) | grown_changes(side, noise)


def grown_changes(side: np.ndarray, noise: np.ndarray) -> np.ndarray:
    """Per coordinate, from one side's quotients (rows, coordinates): some change between
    rows is larger than the one before it beyond the rounding noise (a kink crossed between
    the point and the step; see :func:`crossed_kinks`)."""
    out = np.zeros(side.shape[1:], dtype=bool)
    with np.errstate(over="ignore", invalid="ignore"):  # quotients near the type's range
        change = np.abs(np.diff(side, axis=0))
        for k in range(1, change.shape[0]):
            room = 2.0 * NOISE_UNITS * (noise[k + 1] + noise[k] + noise[k - 1])
            out |= change[k] > change[k - 1] + room
    return out


def sides_steady(right: np.ndarray, left: np.ndarray, noise: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per coordinate, from the gap between the one-sided quotients (rows, coordinates): does
    it behave at the last rows as a smooth loss's does, h f'' + O(h**2), its change at that
    model's rate and, extrapolated to a step of 0, no larger than its last change (a gap that
    stays, as at a kink at the point, does not vanish so)? Within the rounding noise, or shown
    above it with both sides moving alike (the second array: positive evidence of no kink
    among the steps).

    The central tableau assumes a loss smooth on the steps; where the sides do not agree in
    this way (a kink at or near the point: the gap stays, or changes like 1/h as the steps
    cross it), its bound is not used."""
    with np.errstate(over="ignore", invalid="ignore"):  # quotients of a steep loss can be huge
        gap = right - left
        change = gap[-1] - gap[-2]
        slack = 2.0 * NOISE_UNITS * (noise[-1] + noise[-2])
        at_rate = column_rates(gap, noise, 1.0 / RATIO)[-1]
        vanishes = np.abs(gap[-1] + change) <= np.abs(change)
        # A smooth loss's sides move apart alike (by -+h f''/4 as the step halves, their mean
        # by O(h**2)); one side all but steady (under ONE_SIDE_STILL of the other's move) while
        # the other moves is a kink crossed on that side, however the gap shrinks.
        moved = np.abs(right[-1] - right[-2]), np.abs(left[-1] - left[-2])
        alike = (np.minimum(*moved) > ONE_SIDE_STILL * np.maximum(*moved)) | (np.maximum(*moved) <= slack)
        return at_rate & (vanishes | (np.abs(gap[-1] + change) <= np.abs(change) + slack)), \
            at_rate & vanishes & alike & (np.abs(gap[-1]) > slack)



@dataclass(frozen=True)
class Tiny:
    """One-sided and central quotients at a step far below the ladder's."""

    right: np.ndarray  # one-sided quotients at the tiny step
    left: np.ndarray
    central: Estimate
    one_sided_noise: np.ndarray
    step: np.ndarray | None = None  # the tiny step taken (the wider of its two sides)

    @property
    def gap(self) -> np.ndarray:
        return self.right - self.left


def tiny_pair(probe: TensorProbe, flat: np.ndarray, smallest: np.ndarray, jump: np.ndarray) -> Tiny:
    """A pair at the smallest step at which rounding noise still leaves ``jump`` (the gap
    between the sides) plain to see, between 2**-30 and 2**-4 of the ladder's smallest."""
    delta = probe.loss_noise(np.full(flat.size, probe.f0))
    visible = TINY_NOISE_UNITS * delta / np.maximum(np.abs(jump), 1e-300)
    step = np.clip(visible, smallest * 2.0**-30, smallest * 2.0**-4)
    p = probe.pairs(flat, step)
    qc, nc, qr, nr, ql, nl = _quotients(probe, p)
    return Tiny(right=qr, left=ql, central=Estimate(qc, 2.0 * nc),
                one_sided_noise=np.maximum(nr, nl), step=np.maximum(p.h_plus, p.h_minus))
