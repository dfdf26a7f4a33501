"""Coordinate-wise verdicts for one tensor: a first pair of calls, then more where needed.

Every coordinate gets one pair of calls at x +- h. Where the central difference agrees with
the analytic value to a hundredth of the threshold and the one-sided slopes show nothing
odd, that is the verdict (about 2 calls per coordinate). The others are re-estimated on a
ladder of steps chosen from what the first pair showed (rounding noise: larger steps;
curvature on the scale of the step: smaller ones; :mod:`.ladder_verdicts`) and judged by
:mod:`.verdict`: a coordinate fails only when its discrepancy exceeds both the threshold and
its error bound.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..common.classes import dataclass
from ..common.status import FAIL, INCONCLUSIVE, PASS
from .certify import certify
from .climbed import settled_on_levels
from .complex_step import NOT_COMPLEX_SAFE, complex_step
from .ladder import Estimate
from .probe import Pairs, TensorProbe
from .reconcile import narrow_reconciled, own_code_reconciled, unabsorbed, unfuzzed, zero_at_own_scale
from .unmoved import moved_at_own_scale
from .bounded_moves import rounding_only
from .moved_below import moved_below
from .zero_loss import zero_loss
from .grounds import judged_ladder
from .refine import Taken, climb
from .staircase import flat_through_sixteen_bits
from .steps import SETTLE_FRACTION, gap_suspects, start_steps, steps_down
from .wide_steps import wide_estimate
from .own_judged import judged_on_own_rounding
from .loose_passes import loose_note, tightened
from .promote import coarse_note, coarse_passes
from .sixteen_verdicts import measured_passes
from .steep_noise import on_measured_rounding
from .richardson import first_steps, joined, rows_of, settled, two_rows_settle
from ..common.roundoff import is_narrow, unit_roundoff
from .ladder_verdicts import ladder_verdicts
from .measured_failures import failures_on_measured_rounding
from .sliver import sliver_kinks
from .jump_at_point import jump_kinks
from .below_windows import kept_where_contradicted, kinks_beside
from .own_size import failures_within_reach
from .steady_difference import steady_moves
from .verdict import NOISE, Judged, judge_plain, scaleless

RECHECK_LIMIT = 400  # coordinates per tensor re-estimated on a ladder
SHORT_ROWS = 4  # rows of the short ladder beyond that budget (the fourth checks the third)


@dataclass(frozen=True)
class CoordinateOutcome:
    """Per checked coordinate (flat index order as given)."""

    flat: np.ndarray
    analytic: np.ndarray
    numeric: np.ndarray
    error_estimate: np.ndarray
    rel: np.ndarray
    abs: np.ndarray
    scale: np.ndarray  # the denominator of rel per coordinate
    status: np.ndarray
    reasons: tuple[str | None, ...]
    evaluations: int
    note: str | None = None  # said once for the tensor (a method fallen back from)


def _complex_checked(probe: TensorProbe, flat: np.ndarray, recheck: bool) -> CoordinateOutcome:
    """The complex step, never trusted alone: coordinates it does not pass are re-checked
    by central differences; where those pass, the forward is not complex-safe for this
    tensor and central differences decide every coordinate of it."""
    start_count = probe.evaluator.count
    judged = judge_plain(probe, flat, complex_step(probe, flat))
    doubtful = np.flatnonzero(judged.status != PASS)
    if doubtful.size == 0:
        return _outcome(probe, flat, judged, start_count, recheck)
    cross = check_coordinates(probe, flat[doubtful], "central", recheck)
    if np.any(cross.status[judged.status[doubtful] == FAIL] != FAIL):
        central = check_coordinates(probe, flat, "central", recheck)
        return replace(central, evaluations=probe.evaluator.count - start_count,
                       note=NOT_COMPLEX_SAFE.format(tensor=probe.tensor))
    redo = Judged(cross.status, Estimate(cross.numeric, cross.error_estimate), cross.reasons,
                  cross.status == INCONCLUSIVE)
    return _outcome(probe, flat, judged.merged(doubtful, redo), start_count, recheck)


def check_coordinates(
    probe: TensorProbe, flat: np.ndarray, method: str = "central", recheck: bool = True
) -> CoordinateOutcome:
    """Verdict per coordinate ``flat`` of the probed tensor."""
    if method == "complex":
        return _complex_checked(probe, flat, recheck)
    start_count = probe.evaluator.count
    if method == "richardson":
        judged = _richardson(probe, flat, recheck)
    else:
        judged = _central(probe, flat, recheck)
    return _outcome(probe, flat, judged, start_count, recheck)


def _central(probe: TensorProbe, flat: np.ndarray, recheck: bool) -> Judged:
    """A pair of calls per coordinate; a probed ladder where that does not settle it."""
    a = probe.a[flat]
    h = probe.prior_steps(flat)
    first = probe.pairs(flat, h)
    c = first.central
    judged = judge_plain(probe, flat, Estimate(c, 2 * first.noise / (first.h_plus + first.h_minus)))
    tol = probe.tolerance(flat, c)
    settled = np.abs(a - c) <= SETTLE_FRACTION * tol
    suspects = gap_suspects(probe, flat, first)
    # Only a tensor swept whole: its model is then measured on the same coordinates whatever
    # the seed, and a coordinate's numbers do not depend on which others are checked with it.
    if recheck and flat.size == probe.size and not settled.all():
        certified = certify(probe, flat, first, h, a, tol, suspects)
        if certified is not None:
            settled |= certified.passed
            which = certified.passed
            judged = judged.merged(np.flatnonzero(which), judge_plain(
                probe, flat[which], Estimate(certified.value[which], certified.bound[which])))
    if not recheck:  # no ladders; a failure still needs a bound checked on the coordinate
        return _validated_failures(probe, flat, first, h, judged)
    # Settled yet undecided: the first pair's rounding bound lies above the coordinate's scale
    # (a loss level along it, an analytic value of 0): the ladders and their later stages decide.
    todo = np.flatnonzero(~settled | suspects | (judged.status == INCONCLUSIVE))
    if todo.size == 0:
        return judged
    if todo.size > RECHECK_LIMIT:  # kinks the first pair flagged, then the worst, within budget
        # (a kink's central quotient can agree exactly, |a - c| = 0, and pass on the first pair
        # only where the budget ran short: pass or kink by how many others needed a ladder)
        order = np.lexsort((-np.abs(a[todo] - c[todo]), ~suspects[todo]))
        beyond = np.sort(todo[order[RECHECK_LIMIT:]])
        judged = judged.merged(beyond, _validated_failures(probe, flat[beyond], _pick(first, beyond),
                                                           h[beyond], judged.pick(beyond)))
        todo = np.sort(todo[order[:RECHECK_LIMIT]])
    taken = [(flat[todo], h[todo], _pick(first, todo))]  # every pair taken, for reuse
    start = start_steps(probe, flat[todo], _pick(first, todo), h[todo], taken)
    # Climbed past rounding noise: the levels climbed through may settle it (one pair more at most).
    on_levels, level_estimate = settled_on_levels(probe, flat[todo], h[todo], start, taken, suspects[todo])
    if on_levels.any():
        which = np.flatnonzero(on_levels)
        judged = judged.merged(todo[which], judge_plain(probe, flat[todo[which]], level_estimate.pick(which)))
        todo, start = todo[~on_levels], start[~on_levels]
    if todo.size:
        judged = judged.merged(todo, ladder_verdicts(probe, flat[todo], start, taken=taken))
    judged = on_measured_rounding(probe, flat, judged, taken)  # float64: the rounding seen along it
    if todo.size:  # float64 failures there stand where the ladders fail them on that rounding too
        judged = judged.merged(todo, failures_on_measured_rounding(
            probe, flat[todo], judged.pick(todo), start, taken,
            lambda view, where, steps, again: ladder_verdicts(view, where, steps, taken=again)))
    judged = sliver_kinks(probe, flat, judged)  # a sliver between kinks closer than any step?
    judged = jump_kinks(probe, flat, judged)  # the point itself on a kink, the ladders beyond close ones?
    judged = rounding_only(probe, flat, judged, taken)  # a loss moved by rounding alone, everywhere
    judged = unabsorbed(probe, flat, _widened(probe, flat, judged, taken), first)
    judged = moved_below(probe, flat, judged, taken)  # a loss unmoved by the steps taken, moved below them
    judged = zero_loss(probe, flat, judged)  # a loss exactly 0 throughout: rounding absorbed the slope?
    if unit_roundoff(probe.compute_dtype) >= unit_roundoff(np.float16):  # 16 bits: steps far past an element?
        judged = steady_moves(probe, flat, failures_within_reach(probe, flat, judged, taken), taken)
    return flat_through_sixteen_bits(probe, flat, judged)


def _widened(probe: TensorProbe, flat: np.ndarray, judged: Judged, taken: list[Taken]) -> Judged:
    """Narrow arithmetic on the numeric side (narrow code judged on its own, or 16-bit code on
    its float32 run): coordinates that rounding noise left undecided at every step of the
    ladders, judged on much wider steps (:func:`.wide_steps.wide_estimate`) where those
    decide them."""
    if not is_narrow(probe.compute_dtype):
        return _wide_steps(probe, flat, judged, taken, narrow=False)
    return tightened(probe, flat, judged, lambda j: _wide_steps(probe, flat, j, taken))


def _wide_steps(probe: TensorProbe, flat: np.ndarray, judged: Judged, taken: list[Taken],
                narrow: bool = True) -> Judged:
    """The stage of :func:`_widened` on ``judged``: coordinates undecided by rounding noise
    (``narrow``: narrow arithmetic, whose own measured rounding judges what stays undecided)."""
    noisy = np.flatnonzero((judged.status == INCONCLUSIVE) & np.array([r == NOISE for r in judged.reasons], dtype=bool))
    if noisy.size == 0:
        return judged
    before = judged
    wide = judge_plain(probe, flat[noisy], wide_estimate(probe, flat[noisy], taken))
    # float64 code: only agreement counts. Its ladders' kink and pole logic saw these
    # coordinates at steps far below the windows', and a window past a pole can follow the
    # model by chance (steep-880294 failed a correct coordinate at -2e9 against 6e5).
    decided = np.flatnonzero(wide.status != INCONCLUSIVE if narrow else wide.status == PASS)
    judged = judged.merged(noisy[decided], wide.pick(decided))
    if narrow:
        judged = judged_on_own_rounding(probe, flat, judged, taken)
    if unit_roundoff(probe.compute_dtype) < unit_roundoff(np.float16):
        # What the wide steps decided stands where the smaller steps' quotients agree with it
        # (16-bit quotients below the wide steps are a staircase, not a rounding to allow for).
        judged = kept_where_contradicted(probe, flat, before, judged, noisy, taken)
    if not narrow:
        return judged
    judged = measured_passes(probe, flat, judged, taken)  # 16-bit arithmetic: passes on its measured rounding
    return kinks_beside(probe, flat, before, judged, noisy, taken)  # a kink at the point explains the discrepancy?


def _validated_failures(probe: TensorProbe, flat: np.ndarray, first: Pairs, h: np.ndarray, plain: Judged) -> Judged:
    """Coordinates given no ladder (beyond the ladders' budget, or under --no-recheck). The
    first pair's bound is its rounding noise alone: it knows nothing of truncation, so it may pass a coordinate (a discrepancy
    within the threshold needs no bound) but never fail one. Those it would fail get a short
    ladder from the same step (three more pairs; the first pair is its top row), whose bound
    the tableau checks on the coordinate (from a smaller step where the slope changes much
    across the first); what that does not decide stays inconclusive."""
    doubtful = np.flatnonzero(plain.status == FAIL)
    if doubtful.size == 0:
        return plain
    judged = plain
    down = steps_down(probe, _pick(first, doubtful))
    for shrunk in (False, True):  # from the first step (reusing its pair), or below the bend
        which = doubtful[(down > 0) == shrunk]
        if which.size == 0:
            continue
        known = None if shrunk else _pick(first, which)
        start = h[which] * 2.0 ** -down[(down > 0) == shrunk]
        short = climb(probe, flat[which], start, SHORT_ROWS, known)
        judged = judged.merged(which, judged_ladder(probe, flat[which], short))
    return judged


def _richardson(probe: TensorProbe, flat: np.ndarray, recheck: bool) -> Judged:
    """Two rows of a ladder per coordinate (4 calls) from a step measured for the tensor
    (:func:`.richardson.first_steps`, whose measured coordinates reuse its rows); a third
    (6 calls) where two do not settle it (:func:`.richardson.two_rows_settle`)."""
    first = first_steps(probe, flat)
    if first.rows is None:
        return _from_rows(probe, flat, first.h, None, recheck)
    mine = first.measured
    others = np.setdiff1d(np.arange(flat.size), mine)
    measured = _from_rows(probe, flat[mine], first.h[mine], first.rows, recheck)
    rest = _from_rows(probe, flat[others], first.h[others], None, recheck)
    return joined((others, rest), (mine, measured))


def _from_rows(probe: TensorProbe, flat: np.ndarray, h: np.ndarray, known: Pairs | None, recheck: bool) -> Judged:
    """Two rows from ``h`` (``known``: rows already evaluated), a third where they do not settle."""
    two = climb(probe, flat, h, 2, known)
    early = two_rows_settle(probe, flat, two, probe.tolerance(flat, two.central.value))
    judged = judge_plain(probe, flat, two.central)
    rest = np.flatnonzero(~early)
    if rest.size == 0:
        return judged
    rows = rows_of(known, flat.size, rest) if known is not None else two.rows_of(rest)
    return judged.merged(rest, _three_rows(probe, flat[rest], h[rest], rows, recheck))


def _three_rows(probe: TensorProbe, flat: np.ndarray, h: np.ndarray, known: Pairs, recheck: bool) -> Judged:
    """Three rows of a ladder per coordinate (6 calls; the first two ``known``), extrapolated
    to sixth order; coordinates they do not settle (:func:`.richardson.settled`) go the central
    way (under --no-recheck those it does not pass: three rows check one rate of the tableau,
    which quotients aliased by a loss oscillating far faster than the steps can meet by
    chance)."""
    ladder = climb(probe, flat, h, 3, known)
    judged = judged_ladder(probe, flat, ladder)
    if not recheck:  # no longer ladders: what the rows do not pass goes the central way
        return _central_decides(probe, flat, judged, np.flatnonzero(judged.status != PASS), recheck)
    # Not settled for want of smaller steps (not for rounding, which smaller steps only make
    # worse): the same ladder two rows further down (4 calls).
    wide = np.flatnonzero(~settled(probe, flat, judged) & ~judged.noise_limited)
    if wide.size:
        longer = judged_ladder(probe, flat[wide], climb(probe, flat[wide], h[wide], 5, ladder.rows_of(wide)))
        better = np.flatnonzero((longer.estimate.error < judged.estimate.error[wide]) | (judged.status[wide] != PASS))
        judged = judged.merged(wide[better], longer.pick(better))
    loose = ~settled(probe, flat, judged)
    return _central_decides(probe, flat, judged, np.flatnonzero((judged.status != PASS) | loose), recheck)


def _central_decides(probe: TensorProbe, flat: np.ndarray, judged: Judged, todo: np.ndarray,
                     recheck: bool) -> Judged:
    """The positions ``todo`` of the ladder's verdicts ``judged`` checked the central way."""
    if todo.size == 0:
        return judged
    again = _central(probe, flat[todo], recheck)
    # The central path's steps were chosen from the bend measured on the coordinate; the
    # ladder's were not (a fixed share of |x|, which can alias a loss that oscillates on a
    # much finer scale). Where the two verdicts differ, one of the bounds was not valid, so
    # the central path's verdict stands; where they agree, the tighter estimate is kept.
    keep = (again.status != judged.status[todo]) | (again.estimate.error < judged.estimate.error[todo])
    return judged.merged(todo[keep], again.pick(np.flatnonzero(keep)))


def _outcome(probe: TensorProbe, flat: np.ndarray, judged: Judged, start_count: int,
             recheck: bool) -> CoordinateOutcome:
    a = probe.a[flat].copy()
    numeric = judged.estimate.value
    scale = probe.denominators(flat, numeric)
    status = judged.status
    error_estimate = judged.estimate.error
    reasons = judged.reasons
    note = None
    if probe.narrow is not None:  # 16-bit code on its float32 run: undecided there, at 16 bits?
        status, reasons, passed = coarse_passes(probe.compute_dtype, probe.narrow.compute_dtype, a, numeric,
                                                error_estimate, status, reasons, scale)
        if passed:
            note = coarse_note(probe.tensor, passed, probe.compute_dtype, probe.narrow.compute_dtype)
    if probe.narrow is not None:  # narrow code judged on its float64 run
        a, numeric, error_estimate, status, reasons, scale = narrow_reconciled(
            probe, flat, a, numeric, error_estimate, status, reasons, scale,
            lambda own, where: _central(own, where, recheck))
    if probe.own_code is not None:  # narrow code judged against its float64 forward alone
        numeric, error_estimate, status, reasons, scale = own_code_reconciled(
            probe.own_code, flat, numeric, error_estimate, status, reasons, scale,
            lambda own, where: _central(own, where, recheck))
    if probe.own_code is None:  # a zero gradient read off a loss that did not move: at larger steps?
        numeric, error_estimate, status, scale = moved_at_own_scale(
            probe, flat, a, numeric, error_estimate, status, scale)
    status, scale = zero_at_own_scale(probe, flat, a, numeric, error_estimate, status, scale)
    status, reasons = unfuzzed(probe, flat, a, numeric, error_estimate, status, reasons)
    reasons = scaleless(status, reasons, scale)
    err = np.abs(a - numeric)
    own = probe.narrow is None and probe.own_code is None  # judged on its own narrow arithmetic
    return CoordinateOutcome(
        flat=flat, analytic=a, numeric=numeric, error_estimate=error_estimate,
        rel=err / scale, abs=err, scale=scale, status=status,
        reasons=reasons, evaluations=probe.evaluator.count - start_count,
        note=loose_note(probe, status, error_estimate, scale) if own else note,
    )


def _pick(p: Pairs, which: np.ndarray) -> Pairs:
    return Pairs(p.f_plus[which], p.f_minus[which], p.h_plus[which], p.h_minus[which], p.noise[which])


__all__ = ["FAIL", "INCONCLUSIVE", "PASS", "CoordinateOutcome", "check_coordinates"]
