"""Checking narrow code (float32, float16, ...) with float64 numerics, when it accepts float64
(16-bit code that refuses float64 but takes float32, as many kernels do: float32 numerics).

The numeric side of a narrow check is limited by the type's rounding (central differences
reach about u**(2/3) at best, u its unit roundoff, and sums with cancellation lose far more).
When forward and backward, given the same values as float64 arrays, compute in float64, the
check runs on that float64 run: numeric derivatives in float64 at the narrow values, against
the float64 gradient of the same backward, at the float64 threshold. A bug in the backward's
formulas is in both runs and fails at that threshold. The narrow gradient the user's code
really returns must then agree with its float64 run to the narrow type's own threshold
(:func:`.roundoff.default_threshold`) or to what its rounding is measured to vary by (the
caller's); a coordinate beyond both is checked on the narrow code itself (overflow,
underflow or a branch taken only in the narrow type).

Where forward runs in float64 but backward returns its narrow gradient whatever it is given
(a cast at its end), forward's float64 run alone is the numeric reference (``reference_only``):
the narrow gradient is judged against float64 numeric derivatives at the narrow values, at
the narrow type's threshold relative to at least the tensor's typical gradient (a narrow
backward rounds at u times the terms it combines), a failure there checked on the narrow code
itself (reconcile.own_code_reconciled). float32 and 16-bit code alike: the float32 loss's own
rounding leaves many small networks undecided that float64 numerics resolve.

16-bit code whose forward or backward raises on float64 (a kernel written for the types a
GPU computes in), or whose float64 run is not float64, gets the same check on a float32 run
where that one is float32 throughout: float32's unit roundoff is 2**-16 of bfloat16's, so its
numeric derivatives resolve the float32 threshold (:func:`.roundoff.default_threshold`) where
16-bit arithmetic resolves no threshold at all, and a bug in the backward's formulas is in
both runs. The wider run is judged on float32 arithmetic (its own rounding measured, as for
float32 code), the 16-bit gradient against it as above.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

from ..common.classes import dataclass
from ..common.errors import ProbeError
from ..common.heap import release_heap
from ..common.tensors import Workspace, aligned_copy, is_float, is_float_dtype
from .evaluate import LossFunction
from .evaluator import Evaluator
from .gradients import Gradients, validate
from .precision import narrower_compute_type
from .preflight import call_backward
from ..common.roundoff import default_threshold, is_narrow, unit_roundoff
from ..common.status import INCONCLUSIVE, PASS
from .verdict import NOISE

# Narrow and float64 losses may differ by this share of |f| (narrow rounding in sums with
# cancellation reaches percents; beyond this the float64 run computes something else), or by
# the narrow loss's own rounding, measured (a sum of terms far larger than itself).
AGREEMENT = 0.1


@dataclass(frozen=True)
class Promoted:
    workspace: Workspace
    loss: LossFunction
    f0: float
    analytic: dict[str, np.ndarray]  # the float64 run's gradient per tensor, flat
    narrow: dict[str, np.ndarray]  # the narrow gradient per tensor, flat
    # narrow code whose backward returns its narrow gradient whatever it is given: only
    # forward has a float64 run (analytic and narrow are then empty), see reference_only
    reference_only: bool = False
    dtype: np.dtype = np.dtype(np.float64)  # the wider run's type


# The wider runs tried, widest first; float32 only for 16-bit code (float32 code has none).
WIDER = (np.dtype(np.float64), np.dtype(np.float32))


def _narrow_names(ws: Workspace) -> list[str]:
    return [n for n in ws.names() if is_float(ws.owners[n]) and is_narrow(ws.owners[n].dtype)]


def promote(
    evaluator: Evaluator, backward: Callable[..., Any], ws: Workspace,
    grads: Gradients, f0: float, rounding: Callable[[], float] | None = None, *,
    code_dtype: Any = None,
) -> Promoted | None:
    """float64 numerics for a narrow target, else for 16-bit code float32 numerics
    (:func:`wider_types`), or None when its code takes neither.

    Costs, per wider type tried, four forward calls (counted by ``evaluator``: the run, and three that look for a
    narrower type inside, :func:`.precision.narrower_compute_type`) and one backward call;
    ``rounding`` (the narrow loss's rounding, measured) is called where the two losses differ
    by more than AGREEMENT of |f|: within it they are the same computation still.
    Narrow code (``code_dtype``) whose forward runs in float64 (16-bit code: or float32) but
    whose backward returns its narrow gradient whatever it is given gets a Promoted that is
    ``reference_only`` (:func:`_forward_reference`)."""
    names = _narrow_names(ws)
    if not names:
        return None
    for wide_dtype in wider_types(ws, names, code_dtype):
        found = _promoted(evaluator, backward, ws, grads, f0, rounding, code_dtype, names, wide_dtype)
        if found is not None:
            return found
    return None


def wider_types(ws: Workspace, names: list[str], code_dtype: Any) -> tuple[np.dtype, ...]:
    """The wider runs to try: float64, and float32 where the code computes in a 16-bit type
    and some of its tensors are narrower than float32 (those are run in float32, the
    others in their own type)."""
    coarse = code_dtype is not None and reference_only(np.dtype(code_dtype))
    narrower = any(unit_roundoff(ws.owners[n].dtype) > unit_roundoff(np.float32) for n in names)
    return WIDER if coarse and narrower else WIDER[:1]


def _promoted(
    evaluator: Evaluator, backward: Callable[..., Any], ws: Workspace, grads: Gradients, f0: float,
    rounding: Callable[[], float] | None, code_dtype: Any, names: list[str], wide_dtype: np.dtype,
) -> Promoted | None:
    """:func:`promote` on a run in ``wide_dtype``."""
    # The float64 copies are the new workspace's own (no second copy of them); its other
    # floating tensors are copies too, as a workspace's are (they are perturbed there).
    widened = [n for n in names if unit_roundoff(ws.owners[n].dtype) > unit_roundoff(wide_dtype)]
    wide = ws.replacing({n: aligned_copy(ws.owners[n], wide_dtype) if n in widened else aligned_copy(ws.owners[n])
                         for n in ws.names() if is_float(ws.owners[n])})
    grad_output = evaluator.loss.grad_output
    loss = LossFunction(evaluator.loss.forward, wide, grad_output)
    try:
        wide_evaluator = evaluator.sibling(loss)
        f64, dtype = wide_evaluator.base_with_type()
        if dtype != wide_dtype:
            return None
        if narrower_compute_type(wide_evaluator, wide, f64, dtype, source=ws) is not None:
            return None  # it casts to a narrower type inside: the float64 run is not float64
        apart = abs(f64 - f0) > AGREEMENT * max(abs(f0), abs(f64))
        # backward was seen not to write into its arrays (the narrow call): no scratch copies.
        release_heap()  # the looks' moved copies: their pages back before the float64 backward's
        # Called before any narrow forward call: a framework's upstream gradient takes the
        # type of the last forward's result (bfloat16 would round it).
        raw = call_backward(backward, wide, grad_output, scratch=False)
        if apart and (rounding is None or abs(f64 - f0) > rounding()):
            return None  # another computation, beyond the narrow loss's own rounding
        if not _all_of(raw, wide_dtype):
            # backward rounds to the narrow type itself: no float64 run of it to compare with;
            # forward's wider run is still the reference (a 16-bit loss's own staircase cannot
            # tell a factor of 2 from rounding, a float32 loss's rounding often hides the
            # threshold)
            if code_dtype is not None and _forward_reference(np.dtype(code_dtype), wide_dtype):
                return Promoted(wide, loss, f64, {}, {}, reference_only=True, dtype=wide_dtype)
            return None
        grads64 = validate(raw, wide)
    except (ProbeError, Exception):  # float64 is outside what this code accepts
        return None
    analytic: dict[str, np.ndarray] = {}
    narrow: dict[str, np.ndarray] = {}
    for name, g in grads.values.items():
        g64 = grads64.values.get(name)
        if g64 is None or g64.shape != g.shape:
            return None
        analytic[name] = g64.reshape(-1)
        narrow[name] = g.reshape(-1)
    return Promoted(wide, loss, f64, analytic, narrow, dtype=wide_dtype)


def _forward_reference(code_dtype: np.dtype, wide_dtype: np.dtype) -> bool:
    """Narrow code whose backward returns its narrow gradient whatever it is given: its
    forward's wider run is the numeric reference where that run is float64 (float32 code
    too: its own loss's rounding left 382 of 1,661 correct targets of the adversarial
    generator's float32back category undecided, float64 numerics none), or float32 for 16-bit
    code (one model of unit roundoff: the wider run resolves what the narrow arithmetic
    cannot)."""
    return is_narrow(code_dtype) and (wide_dtype == np.dtype(np.float64) or reference_only(code_dtype))


def reference_only(dtype: np.dtype) -> bool:
    """16-bit types (float16, bfloat16): judged against a float64 forward's numeric
    derivatives where backward has no float64 run (coarser than float16's unit roundoff)."""
    return unit_roundoff(dtype) >= unit_roundoff(np.float16)


def _all_of(tree: Any, dtype: np.dtype) -> bool:
    """Every floating array of ``tree`` is ``dtype`` (ml_dtypes' bfloat16 counts as floating)."""
    if isinstance(tree, Mapping):
        return all(_all_of(v, dtype) for v in tree.values())
    array = np.asarray(tree)
    return not is_float_dtype(array.dtype) or array.dtype == dtype


def agreement(dtype: np.dtype) -> float:
    """The share of a coordinate's scale by which a gradient computed in ``dtype`` may leave
    its float64 run: the type's own threshold."""
    return default_threshold(dtype)


def coarse_passes(wide_dtype: np.dtype, code_dtype: np.dtype, a: np.ndarray, numeric: np.ndarray,
                  error: np.ndarray, status: np.ndarray, reasons: tuple[str | None, ...],
                  scale: np.ndarray) -> tuple[np.ndarray, tuple[str | None, ...], int]:
    """16-bit code checked on its float32 run: coordinates whose float32 numeric estimate
    rounding leaves undecided at float32's threshold pass at the 16-bit type's (the threshold
    the 16-bit code is held to on its own arithmetic) where the estimate's bound and its
    distance from the float32 gradient both lie within that threshold times the coordinate's
    scale (the derivative then lies within twice of it). The 16-bit gradient is still held to
    the float32 one afterwards (narrow_reconciled). Returns the statuses, the reasons and how
    many passed so."""
    if not (is_narrow(wide_dtype) and reference_only(code_dtype)):
        return status, reasons, 0
    tol = agreement(code_dtype) * scale
    noisy = np.array([s == INCONCLUSIVE and r is not None and r.startswith(NOISE)
                      for s, r in zip(status.tolist(), reasons)], dtype=bool)
    with np.errstate(invalid="ignore"):
        passed = noisy & np.isfinite(error) & (error <= tol) & (np.abs(a - numeric) <= tol)
    if not passed.any():
        return status, reasons, 0
    status = status.copy()
    status[passed] = PASS
    return status, tuple(None if p else r for p, r in zip(passed.tolist(), reasons)), int(passed.sum())


def coarse_note(tensor: str, passed: int, wide_dtype: np.dtype, code_dtype: np.dtype) -> str:
    """What :func:`coarse_passes` did, for the report's notes."""
    which = f"{passed} coordinates" if passed > 1 else "1 coordinate"
    return (f"{tensor}: {which} that {wide_dtype} rounding leaves undecided at {wide_dtype}'s threshold "
            f"passed at {code_dtype}'s ({agreement(code_dtype):.2g}), the threshold its own arithmetic "
            f"is held to: the {wide_dtype} estimate bounds the derivative within it")


def disagreeing(narrow: np.ndarray, wide: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    """Coordinates whose narrow gradient is further from its float64 run than ``allowed``."""
    return np.abs(narrow - wide) > allowed
