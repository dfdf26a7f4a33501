"""The directional part of a sampled tensor's check: random directions, localisation of
what they show, and a sweep of what localisation leaves undecided.

A random unit direction weighs every element, so one wrong element shows along it as long
as its share of the discrepancy exceeds the direction's bound. A significant direction is
localised at once (:mod:`.locate`); once its candidates plainly carry a discrepancy beyond
the threshold no further direction is drawn (the tensor fails on them). Parts of the
tensor whose share no check resolved are swept coordinate-wise when they are small enough;
what remains unresolved makes the tensor inconclusive, with the smallest element error the
directions could have seen.
"""

from __future__ import annotations


import numpy as np

from ..common.classes import dataclass
from ..report.model import DirectionResult
from .directions import DIRECTION_SIGNIFICANCE as SIGNIFICANCE
from .directions import ELEMENT_AIM, DirectionCheck, check_direction
from .drawn import Vector, unit_direction, without
from .kink_split import BUDGET as KINK_BUDGET
from .kink_split import split_kinks
from .locate import locate
from .move_noise import moved_loss_scale
from .probe import TensorProbe
from .sampling import tensor_rng

EXTRA_DIRECTIONS = 2  # drawn per direction that kinks hid
SWEEP_UNDECIDED = 4096  # coordinates left undecided by localisation that are swept
PLAIN = 2.0  # candidates whose share shows at least twice the tolerance need no more directions


@dataclass(frozen=True)
class Directional:
    """What the directions found: results, coordinates to check, and what stays unresolved."""

    results: tuple[DirectionResult, ...]
    candidates: np.ndarray  # flat indices to check coordinate-wise (localised and swept)
    located_evaluations: int | None
    unresolved: str | None  # why a significant direction stays unexplained, or None
    note: str | None = None  # what one element's error the directions could not show, if much


def _enough(probe: TensorProbe) -> float:
    """The bound at which a direction needs no larger steps: a tenth of what one element
    wrong by the threshold, at the tensor's typical gradient, adds along a random unit
    direction (rms(a) * threshold / sqrt(n))."""
    return 0.1 * probe.threshold * probe.grad_scale / max(probe.size, 1) ** 0.5


def _result(probe: TensorProbe, d: DirectionCheck) -> DirectionResult:
    numeric = d.analytic + d.discrepancy
    scale = max(abs(d.analytic), abs(numeric), probe.floor)
    return DirectionResult(
        analytic=d.analytic, numeric=numeric, error_estimate=d.error,
        rel_error=abs(d.discrepancy) / scale, ok=not (d.significant or d.unresolved),
        evaluations=d.evaluations, kink=d.kink,
    )


def _plain(probe: TensorProbe, u: Vector, check: DirectionCheck, candidates: np.ndarray) -> bool:
    """The candidates' share of the discrepancy is beyond PLAIN tolerances of the largest of
    them, however it is split among them: the tensor will fail on them."""
    if candidates.size == 0:
        return False
    weight = float(np.sum(np.abs(u[candidates])))
    least = (abs(check.discrepancy) - SIGNIFICANCE * check.error) / max(weight, 1e-300)
    a = np.abs(probe.a[candidates])
    return bool(least > PLAIN * probe.threshold * max(float(a.max()), probe.floor))


def _resolution(probe: TensorProbe, checks: list[DirectionCheck]) -> float:
    """The smallest error of one element, at a typical weight in a random direction
    (1/sqrt(n)), that the least uncertain direction shows beyond its bound."""
    bounds = [c.error for c in checks if not c.kink]
    if not bounds:
        return float("inf")
    return SIGNIFICANCE * min(bounds) * max(probe.size, 1) ** 0.5


def _steep(check: DirectionCheck) -> bool:
    """A direction whose bound cannot resolve the threshold for its steps' size (truncation,
    which smaller steps, or a coordinate's, can resolve), not for the loss's rounding."""
    return check.unresolved and not check.significant and not check.rounding


def _evidence(checks: list[DirectionCheck]) -> int:
    """Directions that decided something: a significant discrepancy, or agreement."""
    return sum(1 for c in checks if c.significant or c.agrees)


def _undecided_reason(probe: TensorProbe, checks: list[DirectionCheck], rounding: bool = False,
                      hidden: str | None = None) -> str:
    """Why no direction decided a tensor too large to sweep (``rounding``: or one whose
    directions only the loss's rounding kept from the threshold, which a sweep resolves less;
    ``hidden``: why leaving out the elements at kinks at the point did not help)."""
    if hidden is not None:
        return (f"{hidden}; the tensor has {probe.size} elements, more than are swept ({SWEEP_UNDECIDED}), "
                f"so no element's error outside the checked coordinates could be resolved")
    kinked = sum(1 for c in checks if c.kink)
    smooth = [c for c in checks if not c.kink]
    said = f"{len(checks)} random-direction checks could not resolve the threshold"
    if smooth:
        def scale(c: DirectionCheck) -> float:
            return max(abs(c.analytic), probe.grad_scale, probe.floor)
        c = min(smooth, key=lambda c: c.error / scale(c))
        said += (f": the best bound, {c.error:.1e}, is {c.error / scale(c):.0e} of the directional "
                 f"derivative's scale {scale(c):.1e} (threshold {probe.threshold:.0e}), at every step tried")
    if kinked:
        said += f"{',' if smooth else ':'} {kinked} crossed kinks at every step tried"
    seen = _resolution(probe, checks)
    missed = (f"one element's error below about {seen:.1e} ({seen / max(probe.grad_scale, 1e-300):.0e} "
              f"of the tensor's typical gradient)" if np.isfinite(seen) else "no element's error")
    if rounding:
        return (said + f", for the loss's rounding, which weighs more on each element's own steps than "
                f"on a direction's, so no sweep of its {probe.size} elements resolves more: {missed} "
                f"could not be resolved")
    return (said + f"; the tensor has {probe.size} elements, more than are swept ({SWEEP_UNDECIDED}), "
            f"so {missed} could not be resolved")


def _moved_rounding(probe: TensorProbe, seed: int) -> bool:
    """Measure the loss's rounding on a move of the whole tensor (4 calls); True where it
    is clearly above the probe's model and the directions now use it (move_noise)."""
    scale = moved_loss_scale(probe, tensor_rng(seed, probe.tensor, "moved noise"))
    probe.moved_scale = max(probe.moved_scale, scale)
    return scale > 0.0


@dataclass
class _Drawn:
    """The checks drawn so far, what their localisation found, and what it left undecided."""

    checks: list[DirectionCheck]
    found: list[np.ndarray]
    undecided: list[tuple[int, int]]
    located: int | None = None
    moved_measured: bool = False
    kinked: Vector | None = None  # the first direction kinked at every step


def _draw(probe: TensorProbe, count: int, rng: np.random.Generator, seed: int, stop_early: bool,
          drawn: _Drawn, holes: np.ndarray | None = None) -> None:
    """Draw directions (with ``holes``: their elements left at 0) until ``count`` of them
    decide something or the budget of replacements is spent; localise each significant one."""
    everything = slice(0, probe.size)
    small = probe.size <= SWEEP_UNDECIDED
    start = len(drawn.checks)
    budget = count * (1 + EXTRA_DIRECTIONS)
    while _evidence(drawn.checks[start:]) < count and len(drawn.checks) - start < budget:
        u = unit_direction(probe.size, rng)
        if holes is not None:
            u = without(u, holes)
        check = check_direction(probe, everything, u, enough=_enough(probe), threshold=True)
        if not check.agrees and not drawn.moved_measured:
            drawn.moved_measured = True  # once per tensor, where a direction first fails to agree
            if _moved_rounding(probe, seed):
                check = check_direction(probe, everything, u, enough=_enough(probe), threshold=True)
        drawn.checks.append(check)
        if check.kink and drawn.kinked is None:
            drawn.kinked = u
        if _steep(check) and small:
            break  # steeper than any step resolves: the coordinates decide (swept below)
        if not check.significant:
            continue
        where = locate(probe, u, check.discrepancy, check.error)
        drawn.located = (drawn.located or 0) + where.evaluations
        drawn.found.append(where.candidates)
        drawn.undecided.extend(where.undecided)
        if stop_early and not where.undecided and _plain(probe, u, check, where.candidates):
            break


SPLIT_ROUNDS = 3  # splits of a kinked direction, each after directions that left out the last's finds


def _hidden_by_kinks(probe: TensorProbe, count: int, rng: np.random.Generator, seed: int,
                     stop_early: bool, drawn: _Drawn) -> tuple[bool, str | None]:
    """Where kinks hid every direction: find their elements (:mod:`.kink_split`), check them
    coordinate-wise, and draw directions that leave them out; where those are kinked still
    (an element whose weight in the split direction hid its kink), split one of them too.
    (still blind, why)."""
    if (drawn.kinked is None or _evidence(drawn.checks) > 0
            or any(c.significant for c in drawn.checks)):
        return False, None
    holes = np.empty(0, dtype=np.int64)
    spent = 0
    for _ in range(SPLIT_ROUNDS):
        split = split_kinks(probe, drawn.kinked, KINK_BUDGET - spent)
        spent += split.evaluations
        drawn.located = (drawn.located or 0) + split.evaluations
        holes = np.union1d(holes, split.kinked)
        drawn.found.append(split.kinked)
        if not split.complete:
            return True, (f"random directions crossed kinks at the point at every step, at more elements "
                          f"than {spent} evaluations could find (found {holes.size})")
        if holes.size >= probe.size:
            return False, None  # every element is kinked: the coordinates decide alone
        start = len(drawn.checks)
        drawn.kinked = None
        _draw(probe, count, rng, seed, stop_early, drawn, holes=holes)
        if (_evidence(drawn.checks[start:]) >= count or any(c.significant for c in drawn.checks[start:])
                or drawn.kinked is None or split.kinked.size == 0):
            break
    again = drawn.checks[start:]
    if _evidence(again) < count and not any(c.significant for c in again):
        if any(c.kink for c in again):
            return True, (f"random directions crossed kinks at every step, also without the "
                          f"{holes.size} elements found at kinks at the point")
        return True, (f"random directions without the {holes.size} elements found at kinks at the "
                      f"point could not resolve the threshold")
    return False, None


def directional(
    probe: TensorProbe, count: int, seed: int, stop_early: bool = True, sampled: bool = False
) -> Directional:
    """``count`` directional checks of the probed tensor (a direction hidden by kinks or
    whose bound cannot resolve the threshold is replaced, twice at most), each significant
    one localised; with ``stop_early`` (the default plan, not a count the user asked for),
    none after one whose candidates plainly fail. Where kinks at the point hid every
    direction, their elements are found and left out of directions drawn again. Where too
    few directions decide anything (``sampled``: coordinates are sampled beside them, which
    stand for directions kinked a step away), the tensor is swept when small enough, else
    left unresolved with the reason."""
    rng = tensor_rng(seed, probe.tensor, "directions")
    drawn = _Drawn([], [], [])
    _draw(probe, count, rng, seed, stop_early, drawn)
    hidden, why = _hidden_by_kinks(probe, count, rng, seed, stop_early, drawn)
    checks, undecided, located = drawn.checks, drawn.undecided, drawn.located
    small = probe.size <= SWEEP_UNDECIDED
    candidates = np.unique(np.concatenate(drawn.found)) if drawn.found else np.empty(0, dtype=np.int64)
    unresolved = None
    blind = any(c.unresolved for c in checks)
    steep = any(_steep(c) for c in checks)
    if (_evidence(checks) < count and not any(c.significant for c in checks)
            and (not sampled or blind or hidden)) or (small and steep):
        # Too few directions decided anything (bounds that cannot resolve the threshold,
        # kinks with no sampled coordinate beside them, or kinks at the point that could not
        # be left out), or a small tensor had a steep direction: none of them counts as
        # agreement. The whole tensor is undecided.
        if blind and not steep and not any(c.kink for c in checks):
            # Only the loss's rounding kept the bounds from the threshold: a coordinate's
            # steps stay within its element's own scale while a direction's reach sqrt(n)
            # times further, so the same rounding weighs more on every coordinate than on a
            # direction, and a sweep would spend a ladder per coordinate to resolve less.
            return Directional(tuple(_result(probe, c) for c in checks), candidates, located,
                               _undecided_reason(probe, checks, rounding=True))
        undecided.append((0, probe.size))
    if undecided:
        ranges = sorted(set(undecided))
        size = sum(b - a for a, b in ranges)
        if size <= SWEEP_UNDECIDED:
            swept = np.concatenate([np.arange(a, b, dtype=np.int64) for a, b in ranges])
            candidates = np.union1d(candidates, swept)
        elif not any(c.significant for c in checks):
            unresolved = _undecided_reason(probe, checks, hidden=why)
        else:
            worst = max((c for c in checks if c.significant), key=lambda c: abs(c.discrepancy) / c.error)
            seen = _resolution(probe, checks)
            unresolved = (
                f"a random-direction check disagrees by {abs(worst.discrepancy):.1e} "
                f"(+- {worst.error:.1e}), but localisation left {size} coordinates undecided, "
                f"more than are swept ({SWEEP_UNDECIDED}): errors spread over many elements, "
                f"each below about {seen:.1e} ({seen / max(probe.grad_scale, 1e-300):.0e} of the "
                f"tensor's typical gradient), could not be resolved"
            )
    return Directional(tuple(_result(probe, c) for c in checks), candidates, located, unresolved,
                       None if unresolved else _blind_note(probe, checks))


def _blind_note(probe: TensorProbe, checks: list[DirectionCheck]) -> str | None:
    """Where the directions' tightest bound cannot show one element ELEMENT_AIM off at the
    tensor's typical gradient (a typical weight, 1/sqrt(n)), the smallest error of one element
    they could have shown: beyond the sampled coordinates, such an error passes unseen."""
    seen = _resolution(probe, checks)
    typical = max(probe.grad_scale, 1e-300)
    if not np.isfinite(seen) or seen <= ELEMENT_AIM * typical:
        return None
    return (f"{probe.tensor}: its random-direction checks, at the tightest bound the loss's rounding "
            f"and their steps allowed, show one element's error only above about {seen:.1e} "
            f"({seen / typical:.0e} of its typical gradient); a smaller one outside the sampled "
            f"coordinates was not resolved")
