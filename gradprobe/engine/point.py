"""A target made ready for probing at one set of values.

Preflight's calls, the backward call, the type the code computes in (narrow code rerun in
float64 where it accepts it), the loss's measured rounding and the target-wide gradient
scale: everything a :class:`TensorProbe` of one tensor needs (the type and the float64 run
are found in :mod:`.numeric_side`). The check prepares the point it was given; a second look
off a kink (:mod:`.offpoint`) prepares a nearby one the same way.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import field, replace
from typing import Any

import numpy as np

from ..common.classes import dataclass
from ..common.heap import own_mappings, release_heap
from ..common.tensors import Workspace
from .evaluate import LossFunction
from .evaluator import Backend, Evaluator
from .gradients import Gradients, validate
from .narrow import propagated_rounding
from .numeric_side import Numerics, code_type, numeric_side
from .noise import measured_loss_scale, measured_rounding
from ..common.errors import ProbeError
from .domain import quiet
from .preflight import ForwardInfo, call_backward, inspect_forward
from .probe import TensorProbe
from .widened import Widened, root_mean_square
from .promote import agreement
from .sixteen import coarse
from ..common.roundoff import is_narrow, rounding_units
from .jitter_steps import JITTER_ULPS, Narrowed, add_into, measured_jitter, widened
from .sampling import tensor_rng


# 16-bit code on its own arithmetic: again at 3 and 2 units (a ripple whose period divides one
# spacing shows at another); not wider (every element moves: a smooth gradient's second
# differences grow), nor below a unit (the nearest point rounds back onto the point).
RIPPLE_ULPS = (3.0, 2.0)


@dataclass
class Point:
    """One set of values of a target, ready to be probed tensor by tensor (made by
    :func:`prepare`)."""

    ws: Workspace
    evaluator: Evaluator  # evaluates the numeric side's loss, through the backend if any
    info: ForwardInfo
    grads: Gradients
    numerics: Numerics
    backward: Callable[..., Any] | None
    seed: int  # the run's seed: the jitter's random signs draw from it
    loss_scale: float = 0.0
    target_scale: float = 0.0
    _jitter: dict[str, np.ndarray] | None = field(default=None, repr=False)
    _narrow_jitter: dict[str, np.ndarray] | None = field(default=None, repr=False)
    _coarse_jitter: dict[str, np.ndarray] | None = field(default=None, repr=False)
    _narrow_loss: tuple[float, float] | None = field(default=None, repr=False)
    _own_loss_scales: dict[str, float] = field(default_factory=dict, repr=False)
    _probed: set[str] = field(default_factory=set, repr=False)  # tensors a probe was made for
    _spread_kept: set[str] = field(default_factory=set, repr=False)  # measured in _narrow_jitter

    @property
    def gradients(self) -> dict[str, np.ndarray]:
        """The analytic gradient per checked tensor, flat (float64 run's where promoted)."""
        n = self.numerics
        return {name: n.analytic.get(name, g.reshape(-1)) for name, g in self.grads.values.items()}

    def _measure(self) -> None:
        """The loss's rounding (3 calls; 4 for narrow numerics, seen directly) and the
        target-wide gradient scale."""
        n = self.numerics
        rng = tensor_rng(self.seed, "", "noise")
        units = rounding_units(n.dtype)
        if is_narrow(n.dtype):
            seen = measured_rounding(self.evaluator, n.workspace, list(self.gradients), n.f0, rng, n.dtype)
            scale = seen / (units * float(np.finfo(n.dtype).eps))
        else:
            scale = measured_loss_scale(self.evaluator, n.workspace, self.gradients, n.f0, units, rng)
        self.loss_scale = max(n.terms, scale)
        self.target_scale = max((root_mean_square(g.reshape(-1))  # narrow ones kept in their type
                                 for g in self.grads.values.values() if g.size), default=0.0)

    def keep_gradients(self, names: set[str]) -> None:
        """Let go of the gradients of every tensor not in ``names`` (memory for a large
        target once its tensors are checked)."""
        for d in (self.grads.values, self.numerics.analytic, self.numerics.narrow):
            for name in [n for n in d if n not in names]:
                del d[name]

    def release(self) -> None:
        """Let go of the numeric side once every tensor is checked: the gradients, the
        measured spreads, and a float64 run's workspace (memory: a second look's moved point
        is prepared next). The point then evaluates its own workspace, sharing the count."""
        self.keep_gradients(set())
        self._jitter = self._narrow_jitter = self._coarse_jitter = None
        self._spread_kept = set()
        loss = self.evaluator.loss
        loss.release()
        if self.numerics.workspace is not self.ws:
            self.numerics = replace(self.numerics, workspace=self.ws)
            self.evaluator = self.evaluator.sibling(LossFunction(loss.forward, self.ws, loss.grad_output))

    def jitter(self, name: str) -> np.ndarray | None:
        """How much backward's rounding varies, per flat coordinate of ``name``, between points
        JITTER_ULPS units in the last place apart (every checked tensor moved, random signs):
        the analytic value is not defined more finely than this. Measured for the whole
        target on first use; None if backward fails there."""
        if self._jitter is None:
            n = self.numerics
            if n.reference_only:  # the narrow backward at its own values, on its own grid
                self._jitter = self._measured_jitter(self.ws, self.gradients, n.code_dtype)
            else:
                self._jitter = self._measured_jitter(n.workspace, self.gradients)
        return self._jitter.get(name)

    def coarse_jitter(self, name: str) -> np.ndarray | None:
        """As :meth:`jitter`, the points JITTER_ULPS units of the compute type's grid apart
        where it is coarser than the arrays' (code rounding to 16 bits inside): the rounding
        backward's own computation accumulates, which moves finer than its grid never show.
        16-bit code judged on its own arithmetic: the largest of that and the same at each of
        RIPPLE_ULPS units (a ripple of the loss below its rounding varies backward's value)."""
        if self._coarse_jitter is None:
            n = self.numerics
            self._coarse_jitter = self._measured_jitter(n.workspace, self.gradients, n.dtype)
            if is_narrow(n.dtype) and np.finfo(n.dtype).eps >= np.finfo(np.float16).eps and not n.reference_only:
                for ulps in RIPPLE_ULPS:
                    other = self._measured_jitter(n.workspace, self.gradients, n.dtype, ulps=ulps)
                    for k, v in other.items():
                        if k in self._coarse_jitter:
                            self._coarse_jitter[k] = np.maximum(widened(self._coarse_jitter[k]), widened(v))
        return self._coarse_jitter.get(name)

    def narrow_spread(self, name: str) -> np.ndarray | None:
        """For narrow code checked on its float64 run, per flat coordinate of ``name``: how far
        its narrow gradient may leave that run by rounding, measured (see narrow.py): how much
        the narrow backward's rounding varies at the narrow values, plus how much rounding of
        every value to the narrow type moves the float64 gradient. Once per target, on first
        use; None where neither could be measured. Every tensor moves, but only the spreads
        of ``name`` and of tensors not probed yet are kept: probes are made and checked one
        tensor at a time (one probed before that asks is measured then: the same draws)."""
        if self._narrow_jitter is None or name not in self._spread_kept:
            n = self.numerics
            keep = {k for k in n.narrow if k == name or k not in self._probed}
            with own_mappings():  # seven backward calls' whole-tensor arrays: no holes left
                fuzz = self._measured_jitter(self.ws, n.narrow, compact=True, keep=keep)
                moved = propagated_rounding(self.backward, n.workspace, self.info.grad_output, n.code_dtype,
                                            {k: v for k, v in n.analytic.items() if k in keep},
                                            tensor_rng(self.seed, "", "propagation"),
                                            source=self.ws) if self.backward else {}
            self._narrow_jitter = self._narrow_jitter or {}
            self._spread_kept |= keep | {name}
            for k in set(fuzz) | set(moved):  # their sum (a + b is b + a, bit for bit), float64
                jitter, spread = fuzz.pop(k, None), moved.pop(k, None)
                if spread is None:
                    assert jitter is not None  # k came from one of the two
                    self._narrow_jitter[k] = widened(jitter)
                    continue
                if jitter is not None:  # added in the float64 array, a block at a time
                    add_into(spread, jitter)
                self._narrow_jitter[k] = spread
        return self._narrow_jitter.get(name)

    def _measured_jitter(self, ws: Workspace, base: dict[str, np.ndarray],
                         grid: np.dtype | None = None, compact: bool = False,
                         keep: set[str] | None = None, ulps: float = JITTER_ULPS) -> dict[str, np.ndarray]:
        """How backward's rounding varies at this point (:func:`.jitter_steps.measured_jitter`)."""
        if self.backward is None:
            return {}
        other = self.numerics.workspace if ws is self.ws else self.ws  # the same values, another type
        return measured_jitter(self.backward, self.info.grad_output, ws, base, self.seed, grid, compact, keep, ulps,
                               source=None if other is ws else other)

    def beside(self, name: str, flat: np.ndarray, delta: np.ndarray) -> np.ndarray | None:
        """backward's value for ``name`` at each coordinate ``flat[i]`` moved alone by
        +``delta[i]`` and by -``delta[i]`` (rows: +, -), on the numeric side's workspace; None
        where backward fails there or has no value for ``name``. Two backward calls each."""
        if self.backward is None:
            return None
        ws = self.numerics.workspace
        moved = ws.owners[name].copy()  # one private copy, each element put back after its calls
        line = moved.reshape(-1)
        beside = ws.replacing({name: moved})
        out = np.empty((2, flat.size))
        try:
            for i, (k, d) in enumerate(zip(flat.tolist(), delta.tolist())):
                here = line[k].copy()
                for row, sign in enumerate((1.0, -1.0)):
                    line[k] = here + sign * d
                    with quiet():  # a moved point: the code's warnings there are not shown
                        raw = call_backward(self.backward, beside, self.info.grad_output, scratch=False)
                    g = validate(raw, ws, own_type=True).values.get(name)
                    if g is None:
                        return None
                    out[row, i] = float(np.asarray(g, dtype=np.float64).reshape(-1)[k])
                line[k] = here
        except ProbeError:
            return None
        return out

    def probe(self, name: str, threshold: float) -> TensorProbe:
        n = self.numerics
        self._probed.add(name)
        probe = TensorProbe(self.evaluator, name, n.workspace.owners[name].reshape(-1),
                            self.gradients[name], n.f0, n.dtype, threshold, self.target_scale,
                            loss_scale=self._tensor_loss_scale(name), narrow=self._narrow_probe(name),
                            jitter=lambda: self.jitter(name), own_rounding=lambda: self.coarse_jitter(name),
                            own_code=self._own_code_probe(name) if n.reference_only else None,
                            beside=lambda flat, delta: self.beside(name, flat, delta))
        if n.reference_only or coarse(probe):
            # A narrow backward rounds at u times the terms it combines, as large as the
            # tensor's typical gradient even where one coordinate's is far smaller (a
            # saturated tanh: 1 - t*t is 0 in 16 bits); moves of a few grid units do not show
            # it there. Each coordinate is judged relative to that scale at least, on a wider
            # run as on the 16-bit arithmetic itself (one model of the backward's rounding;
            # a float32 backward judged against its forward's float64 run alone too).
            probe.floor = max(probe.floor, probe.grad_scale)
        return probe

    def _tensor_loss_scale(self, name: str) -> float:
        """The loss's rounding scale for moves of ``name`` alone, where the target's (moving
        every tensor) rests on a measured rounding above the terms' size: the terms of the
        other tensors round as they did at the point when only this one moves (3 calls, 7
        where a slope the prediction misses is looked at; noise.measured_loss_scale)."""
        n = self.numerics
        if is_narrow(n.dtype) or self.loss_scale <= n.terms or len(self.gradients) < 2:
            return self.loss_scale
        if name not in self._own_loss_scales:
            own = measured_loss_scale(self.evaluator, n.workspace, {name: self.gradients[name]}, n.f0,
                                      rounding_units(n.dtype), tensor_rng(self.seed, name, "noise"))
            self._own_loss_scales[name] = max(n.terms, own)
        return self._own_loss_scales[name]

    def own_numerics(self) -> Point:
        """This point, or for narrow code judged against its float64 forward alone the same
        point on its narrow code (where second derivatives are judged, as with no float64 run:
        the narrow gradient's derivative has no float64 run either)."""
        n = self.numerics
        if not n.reference_only:
            return self
        own, f0, scale = self._narrow_loss_of(list(self.grads.values))
        narrow = replace(n, workspace=self.ws, f0=f0, dtype=n.code_dtype, reference_only=False)
        return replace(self, evaluator=own, numerics=narrow, loss_scale=scale, _own_loss_scales={})

    def _narrow_probe(self, name: str) -> TensorProbe | None:
        """For narrow code checked on its float64 run: the tensor probed on the narrow code
        itself, serially, for the coordinates whose narrow gradient leaves its float64 run;
        judged at the narrow type's own threshold, against the narrow backward's own fuzz."""
        n = self.numerics
        if name not in n.narrow:
            return None
        own, f0, scale = self._narrow_loss_of(list(n.narrow))
        probe = TensorProbe(own, name, self.ws.owners[name].reshape(-1), Widened(n.narrow[name]), f0,
                            n.code_dtype, agreement(n.code_dtype), loss_scale=scale,
                            jitter=lambda: self.narrow_spread(name))
        if coarse(probe):  # 16 bits: judged relative to the tensor's typical gradient at least (see probe)
            probe.floor = max(probe.floor, probe.grad_scale)
        return probe

    def _own_code_probe(self, name: str) -> TensorProbe:
        """For narrow code judged against its float64 forward alone: the tensor probed on the
        narrow code itself, with the gradient it returns, at the type's own threshold."""
        n = self.numerics
        own, f0, scale = self._narrow_loss_of(list(self.grads.values))
        return TensorProbe(own, name, self.ws.owners[name].reshape(-1), self.grads.values[name].reshape(-1),
                           f0, n.code_dtype, agreement(n.code_dtype), loss_scale=scale,
                           jitter=lambda: self.jitter(name))

    def _narrow_loss_of(self, names: list[str]) -> tuple[Evaluator, float, float]:
        """An evaluator of the narrow code itself, its loss and that loss's rounding (measured
        once per target, moving ``names``)."""
        n = self.numerics
        ev = self.evaluator
        own = ev.sibling(LossFunction(ev.loss.forward, self.ws, ev.loss.grad_output))
        if self._narrow_loss is None:  # the narrow loss and its rounding, once per target
            f0 = own.base()
            seen = measured_rounding(own, self.ws, names, f0, tensor_rng(self.seed, "", "narrow noise"))
            units = rounding_units(n.code_dtype) * float(np.finfo(n.code_dtype).eps)
            self._narrow_loss = (f0, max(n.terms, seen / units))
        f0, scale = self._narrow_loss
        return own, f0, scale


BackendFor = Callable[[Workspace, "np.ndarray | None"], "Backend | None"]


def prepare(
    forward: Callable[..., Any], backward: Callable[..., Any], ws: Workspace,
    evaluator: Evaluator, seed: int, scratch: bool = True, backend: BackendFor | None = None,
) -> Point:
    """Preflight, backward, the numeric side's type and the loss's rounding at the values in
    ``ws``. ``evaluator`` counts every call (preflight's run serially through it); the
    point's own evaluator, which shares its count, evaluates the numeric side's loss through
    ``backend(workspace, grad_output)`` (None: serially), chosen once the numeric side's
    workspace is known. ``scratch`` false skips the copies that name in-place writes (code
    already checked)."""
    rng = np.random.default_rng(seed)  # grad_output; tensors draw from their own
    info = inspect_forward(forward, ws, evaluator, rng, scratch)
    # The look for a hidden float32 type moves whole tensors: done before backward's
    # gradients exist, so that its moved copies and the gradients are not held at once.
    dtype, why = code_type(ws, evaluator, info)
    # Narrow gradients stay in their type until the float64 run is known (it replaces them
    # as the analytic side; they are widened where there is none).
    grads = validate(call_backward(backward, ws, info.grad_output, scratch), ws, own_type=True)
    release_heap()  # preflight's scratch copies and backward's temporaries: their pages back
    numerics, loss = numeric_side(backward, ws, evaluator, info, grads, dtype, why, seed)
    where = backend(numerics.workspace, info.grad_output) if backend is not None else None
    point = Point(ws, evaluator.sibling(loss, where), info, grads, numerics, backward, seed)
    point._measure()
    return point
