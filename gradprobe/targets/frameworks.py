"""Targets whose arrays belong to other libraries (protocol section 6), made ready for the engine.

:func:`frame` turns such a target into one the engine can run (numpy arrays; forward and
backward that convert at each call, see :mod:`.boundary`; the framework's reverse mode
where the target gives no backward, see :mod:`.autograd`), and says what the report shows
about it. :func:`preserved` puts back the framework state a check may touch.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import field, replace
from typing import TYPE_CHECKING, Any

import numpy as np

from ..common.classes import dataclass
from .boundary import Boundary, describe
from .libraries import NUMPY, Kind, rebuilt
from ..common.errors import TargetLoadError
from ..report.model import Report
from .second_rules import DOUBLE_FIX, no_double_backward
from .target import MISSING_FIX, Target
from ..common.tensors import flatten, is_float_dtype

if TYPE_CHECKING:  # loaded for a target with no backward only
    from .autograd import ReverseMode

AUTOGRAD_LIBRARIES = ("torch", "jax")
NO_RULE = ("no hand-written derivative rule lies on forward's path (no {what}): the "
           "derivatives checked are {lib}'s own")


@dataclass
class Framing:
    """What the report says about the arrays' library and where the gradient came from."""

    array_library: str = NUMPY
    gradient_source: str = "backward"
    devices: dict[str, str] = field(default_factory=dict)  # tensors not on the CPU
    reverse: ReverseMode | None = None
    double: Any = None  # a DoubleBackward (second_order = True), which calls forward too

    def notes(self) -> list[str]:
        if self.reverse is None or self.reverse.rules is not False:
            return []
        what = ("autograd Function" if self.reverse.library == "torch"
                else "custom_vjp or custom_jvp rule")
        return [NO_RULE.format(what=what, lib=self.reverse.library)]

    def annotate(self, report: Report) -> Report:
        """``report`` with the library, the gradient's source, devices and notes."""
        layers = tuple(replace(layer, tensors=tuple(
            replace(t, device=self.devices[t.name]) if t.name in self.devices else t
            for t in layer.tensors)) for layer in report.layers)
        # forward is called by the framework's reverse mode too (protocol 4: evaluations
        # counts every call of forward)
        calls = sum(getattr(source, "calls", 0) for source in (self.reverse, self.double))
        return replace(report, layers=layers, array_library=self.array_library,
                       gradient_source=self.gradient_source, evaluations=report.evaluations + calls,
                       notes=report.notes + tuple(self.notes()))


def frame(target: Target) -> tuple[Target, Framing]:
    """``target`` as the engine runs it, and what the report says about its arrays."""
    boundary = describe(target.params, target.inputs)
    if target.double_backward and (target.backward is not None
                                   or boundary.library not in AUTOGRAD_LIBRARIES):
        why = ("it gives its own backward" if target.backward is not None
               else f"its arrays are {boundary.library}'s")
        raise TargetLoadError(no_double_backward(why), fix=DOUBLE_FIX)
    if not boundary.kinds:
        if target.backward is None:
            raise TargetLoadError(
                "the target has no backward function (only a forward written with torch or "
                "jax arrays can go without one: its gradient is then the framework's)",
                fix=MISSING_FIX["backward"])
        return target, Framing()
    library = boundary.library
    framing = Framing(library, devices={n: k.device for n, k in boundary.kinds.items() if k.device})
    forward = Framed(target.forward, boundary, "forward", target.spec)
    if target.backward is not None:
        backward: Any = Framed(target.backward, boundary, "backward", target.spec)
    elif library in AUTOGRAD_LIBRARIES:
        from .autograd import ReverseMode  # a target with no backward only: loaded then

        backward = framing.reverse = ReverseMode(_quiet(target.forward, library), boundary, library)
        framing.gradient_source = "autograd"
        forward = Framed(_quiet(target.forward, library, numeric=True), boundary, "forward",
                         target.spec)
    else:
        raise TargetLoadError(
            f"the target has no backward function, and its arrays are {library}'s: only torch "
            "and jax targets can go without one (their gradient is then the framework's)",
            fix=MISSING_FIX["backward"])
    params = boundary.numpy_tree(target.params)
    inputs = boundary.numpy_tree(target.inputs)
    second = _second_order(target, boundary)
    framing.double = second.get("hvp") if target.double_backward else None
    return replace(target, forward=forward, backward=backward, params=params, inputs=inputs,
                   spec=None, **second), framing


def _second_order(target: Target, boundary: Boundary) -> dict[str, Any]:
    """hvp and hessian (protocol section 7) called with the user's arrays, ``v`` included."""
    out: dict[str, Any] = {}
    if target.hessian is not None:
        out["hessian"] = Framed(target.hessian, boundary, "hessian")
    if target.hvp is not None:
        framed = Framed(target.hvp, boundary, "hvp")
        out["hvp"] = lambda p, i, v: framed(p, i, boundary.user_tree(v, {}))
    if target.double_backward:
        from .autograd_hvp import DoubleBackward  # second derivatives by double backward only

        out["hvp"] = DoubleBackward(target.forward, boundary, boundary.library)
    return out


class Framed:
    """The user's forward or backward as a function of the engine's numpy arrays.

    Picklable for worker processes: with an entry point (``spec``) the function itself is not
    sent but loaded again in the worker."""

    def __init__(self, fn: Callable[..., Any] | None, boundary: Boundary, who: str,
                 spec: str | None = None) -> None:
        self.fn = fn
        self.boundary = boundary
        self.who = who
        self.spec = spec
        # The user's trees last built, for the engine's trees they were built from: where
        # every tensor shares the engine's memory (torch, array-api-strict on the CPU), a
        # perturbation written into the engine's copy is seen through them as they are.
        self._last: tuple[Any, Any, Any, Any, dict[str, Any]] | None = None

    def __getstate__(self) -> dict[str, Any]:
        state = dict(self.__dict__)
        state["_last"] = None
        if self.spec is not None:
            state["fn"] = None
        # Device objects of some libraries do not pickle: a CPU tensor needs none, and a
        # device array lands on the library's default device (torch's devices pickle).
        def portable(k: Kind) -> Kind:
            return k if k.library == "torch" else replace(k, handle=None)

        state["boundary"] = Boundary({n: portable(k) for n, k in self.boundary.kinds.items()}, {})
        output = self.boundary.output
        state["boundary"].output = None if output is None else portable(output)
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__dict__.update(state)
        kinds = self.boundary.kinds
        # Adapters are rebuilt in the worker from the library names alone.
        self.boundary.adapters = {k.library: rebuilt(k.library) for k in kinds.values()}

    def _function(self) -> Callable[..., Any]:
        if self.fn is None:
            from .loading import load_functions

            forward, backward = load_functions(self.spec or "")
            self.fn = forward if self.who == "forward" else backward
        assert self.fn is not None
        return self.fn

    def __call__(self, params: Any, inputs: Any, *rest: Any) -> Any:
        fn = self._function()
        b = self.boundary
        if "jax" in b.adapters:
            with b.precision(params, inputs):
                return self._call(fn, params, inputs, rest)
        return self._call(fn, params, inputs, rest)

    def forget(self, params: Any) -> None:
        """Let go of the user's trees built for ``params`` (a tree the caller will not hand
        over again, such as a whole tensor moved for one call): they share its memory."""
        if self._last is not None and self._last[0] is params:
            self._last = None

    def _call(self, fn: Callable[..., Any], params: Any, inputs: Any, rest: tuple[Any, ...]) -> Any:
        b = self.boundary
        last = self._last
        if last is not None and last[0] is params and last[1] is inputs:
            user_params, user_inputs, made = last[2], last[3], last[4]
        else:
            made = {}
            user_params, user_inputs = b.user_tree(params, made), b.user_tree(inputs, made)
            keep = b.shared and self.who == "forward"  # backward is called a few times only
            self._last = (params, inputs, user_params, user_inputs, made) if keep else None
        out = fn(user_params, user_inputs,
                 *(b.grad_output(r) if isinstance(r, np.ndarray) else r for r in rest))
        b.check_writes(made, self.who)
        return b.result(out, record=self.who == "forward")


class FramedLayer:
    """A stack layer (protocol section 5) called with its own library's arrays: its params,
    the activation and upstream gradient (in the library and device of the stack's input x),
    and ``inputs``; what it returns comes back as numpy."""

    def __init__(self, layer: Any, name: str, boundary: Boundary) -> None:
        self.layer = layer
        self.name = name
        self.boundary = boundary
        self.out_dtypes: dict[np.dtype, np.dtype] = {}  # the dtype of y, per dtype of x seen

    def _args(self, p: Any, x: Any, inputs: Any, made: dict[str, Any]) -> tuple[Any, Any, Any]:
        b = self.boundary
        return (b.user_tree(p, made, prefix=f"{self.name}.") if isinstance(p, Mapping) else p,
                b.like(x, "x", made), b.user_tree(inputs, made))

    def forward(self, p: Any, x: Any, inputs: Any) -> Any:
        made: dict[str, Any] = {}
        out = self.layer.forward(*self._args(p, x, inputs, made))
        self.boundary.check_writes({n: t for n, t in made.items() if n in self.boundary.kinds},
                                   f"layer {self.name}'s forward")
        y = self.boundary.result(out)
        if isinstance(x, np.ndarray) and isinstance(y, np.ndarray):
            self.out_dtypes[x.dtype] = y.dtype
        return y

    def backward(self, p: Any, x: Any, inputs: Any, grad_y: Any) -> Any:
        made: dict[str, Any] = {}
        args = self._args(p, x, inputs, made)
        g = grad_y
        if isinstance(grad_y, np.ndarray):
            # the upstream gradient in the dtype of the layer's output (the engine draws it
            # in float64; a float32 torch layer's matmul refuses it)
            own = np.dtype(self.out_dtypes.get(x.dtype, x.dtype) if isinstance(x, np.ndarray) else grad_y.dtype)
            if is_float_dtype(own) and is_float_dtype(grad_y.dtype) and own != grad_y.dtype:
                grad_y = grad_y.astype(own)
            g = self.boundary.like(grad_y, "x", {})
        out = self.layer.backward(*args, g)
        if isinstance(out, tuple) and len(out) == 2:
            return self.boundary.result(out[0]), self.boundary.result(out[1])
        return out


def frame_stack(st: Any) -> tuple[Any, Framing]:
    """A stack whose arrays belong to another library, as the engine runs it (numpy arrays,
    layers that convert at each call)."""
    boundary = describe(st.params, st.inputs)
    if not boundary.kinds:
        return st, Framing()
    layers = tuple(FramedLayer(layer, name, boundary) for name, layer in zip(st.names, st.layers))
    framing = Framing(boundary.library, devices={n: k.device for n, k in boundary.kinds.items() if k.device})
    return replace(st, layers=layers, params=boundary.numpy_tree(st.params),
                   inputs=boundary.numpy_tree(st.inputs), spec=None), framing


class _Quiet:
    """forward as given; for numeric evaluations of a torch target with no backward, under
    torch.no_grad (no graph is built for a value only)."""

    def __init__(self, forward: Any, library: str, numeric: bool) -> None:
        self.forward = forward
        self.numeric = numeric and library == "torch"

    def __call__(self, *args: Any) -> Any:
        if not self.numeric:
            return self.forward(*args)
        import torch

        with torch.no_grad():
            return self.forward(*args)


def _quiet(forward: Any, library: str, numeric: bool = False) -> Any:
    return _Quiet(forward, library, numeric) if numeric else forward
