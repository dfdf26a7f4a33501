"""16-bit coordinates where the loss moves by the same amount at every step.

A smooth loss moves across the point by f(x + h) - f(x - h) = 2 h f' + O(h**3): in proportion
to the step. A jump, or a feature far narrower than one unit of the 16-bit grid, moves it by
the same amount at every step: a layer norm over a row whose features all round to the same
bfloat16 value (a spread of 1e-5 about 1.0, below its spacing of 0.0078) is flat beyond
sqrt(eps) = 1e-3, and a step of one grid unit already carries the element past it; the
central quotients at 1, 2, 4 ... 32 units read -38, -21, -8, -4, -2, -1.06, the loss moving by
0.5 to 0.66 at each, and the wide steps failed a correct -94 against -1.26 +- 0.67.

So a 16-bit failure stands only where the loss's moves across the point grow with the step
as a slope's do at the narrowest steps that show them. Read at the steps taken on the
coordinate where the move exceeds two units of the loss's grid (4 u |f|: a rounding's),
from the narrowest such step up to SPAN times it: where there are STEADY or more, spanning
half that or more, MAJORITY of them of one sign at least (rounding alone takes either sign
as often; a jump's own rounding of a few units may flip a small one), and they grow more
slowly than the step to the power GROWTH (a least-squares fit of log |move| on log step: a
slope's grow with exponent 1, a jump's with 0), the slope is seen at no step: the
coordinate is undecided (an undecided one too, with this reason), saying why. (Wider steps may see a loss that levels off, a saturated tanh: that is no jump.) A loss
that keeps its value, or moves by rounding of either sign, keeps its verdict (a slope claimed
where the loss is flat still fails). Along a direction (:mod:`.along`) the share of the
analytic slope that such elements carry is what the loss's slope may miss at any step.
"""

from __future__ import annotations

import numpy as np

from ..common.roundoff import unit_roundoff
from ..common.status import FAIL, INCONCLUSIVE
from .probe import TensorProbe
from .refine import Taken
from .verdict import Judged

GROWTH = 0.5  # moves growing more slowly than step**GROWTH: no slope's (exponent 1)
STEADY = 4  # at this many distinct steps at least
MAJORITY = 0.8  # this share of them of one sign at least (rounding's moves take either)
SPAN = 16.0  # read up to this factor above the narrowest step that shows a move
STEADY_START = ("rounding noise in the loss is above the threshold at every step tried: the loss moves across "
                "the point by about the same amount")
STEADY_MOVES = STEADY_START + (
    ", {move:.2g}, at every step from {low:.2g} to {high:.2g}, as across a jump or a feature narrower than "
    "the smallest of them, not in proportion to the step as along a slope: no step shows its slope")


def steady_moves(probe: TensorProbe, flat: np.ndarray, judged: Judged, taken: list[Taken]) -> Judged:
    """``judged`` with the failed and undecided coordinates the module's note names undecided,
    with its reason."""
    unsettled = np.flatnonzero((judged.status == FAIL) | (judged.status == INCONCLUSIVE))
    if unsettled.size == 0:
        return judged
    position = {int(k): j for j, k in enumerate(flat[unsettled])}
    moves: list[dict[float, float]] = [{} for _ in unsettled]  # step -> the loss's move across the point
    for where, _, pairs in taken:
        steps = 0.5 * (pairs.h_plus + pairs.h_minus)
        with np.errstate(over="ignore", invalid="ignore"):
            moved = pairs.f_plus - pairs.f_minus
        for i, k in enumerate(where.tolist()):
            j = position.get(int(k))
            if j is not None and np.isfinite(moved[i]):
                moves[j][float(steps[i])] = float(moved[i])
    # Two units of the loss's grid (2 u |f| each, about): moves of a unit or two are a rounding's
    # at any step, and of the sign the slope gives them (a bias whose loss barely moves).
    grain = 4.0 * unit_roundoff(probe.compute_dtype) * abs(probe.f0)
    which, reasons = [], []
    for j, seen in enumerate(moves):
        steps = np.array(sorted(seen))
        values = np.array([seen[s] for s in steps])
        if jump_like(steps, values, grain):
            steps, values = narrowest(steps, values, grain)
            which.append(int(unsettled[j]))
            reasons.append(STEADY_MOVES.format(move=float(np.median(values)), low=float(steps[0]),
                                               high=float(steps[-1])))
    return judged.undecided(np.array(which, dtype=np.int64), tuple(reasons))


def jump_like(steps: np.ndarray, moves: np.ndarray, grain: float) -> bool:
    """Whether the loss's ``moves`` across the point at ascending ``steps`` are a jump's, not a
    slope's (see the module), read at :func:`narrowest` of them."""
    steps, moves = narrowest(steps, moves, grain)
    if steps.size < STEADY or steps[-1] < SPAN / 2.0 * steps[0]:
        return False
    if max(np.mean(moves > 0), np.mean(moves < 0)) < MAJORITY:
        return False
    x, y = np.log(steps), np.log(np.abs(moves))
    x = x - x.mean()
    return float(np.sum(x * (y - y.mean())) / np.sum(x * x)) < GROWTH


def narrowest(steps: np.ndarray, moves: np.ndarray, grain: float) -> tuple[np.ndarray, np.ndarray]:
    """The ascending ``steps`` and their ``moves`` where the moves exceed ``grain`` (the most a
    rounding moves the loss), from the narrowest such step up to SPAN times it."""
    beyond = np.isfinite(moves) & (np.abs(moves) > grain)
    steps, moves = steps[beyond], moves[beyond]
    near = steps <= SPAN * steps[0] if steps.size else np.zeros(0, dtype=bool)
    return steps[near], moves[near]


def jumping(flat: np.ndarray, reasons: tuple[str | None, ...], size: int) -> np.ndarray:
    """A mask over a tensor of ``size`` elements: the coordinates ``flat`` whose ``reasons``
    are this module's (the loss moving as across a jump at every step)."""
    out = np.zeros(size, dtype=bool)
    out[flat[[i for i, r in enumerate(reasons) if r is not None and r.startswith(STEADY_START)]]] = True
    return out
