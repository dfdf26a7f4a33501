"""Where the analytic second derivatives and the gradient come from, as flat vectors.

The Hessian is seen only through one function, ``hv(w) -> H w`` on flat vectors in the
protocol's order (floating-point params in params' order, each row-major): the ``hvp`` form
calls the target's ``hvp``, the dense form multiplies by the matrix ``hessian`` returned
once. A framework's double backward is a third such function, for later. The gradient at a
moved point is backward called on a copy of the workspace with the moved tensors swapped in.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

from ..common.classes import dataclass
from ..common.errors import BadOutputError, ProbeError, UserCodeError, summarise
from ..common.tensors import Workspace, flatten, is_float, is_float_dtype, nested
from .gradients import validate
from .preflight import call_backward

HVP_FIX = "return H v as a dict nested like the params, e.g. return {'w': hv_w}"
HESSIAN_FIX = ("return a finite square array of side n, n the number of floating-point param "
               "elements")


@dataclass(frozen=True)
class Layout:
    """The floating-point params in order, their shapes and places in the flat vector."""

    names: tuple[str, ...]
    shapes: tuple[tuple[int, ...], ...]
    offsets: tuple[int, ...]  # start of each tensor; the last entry is n

    @classmethod
    def of(cls, ws: Workspace) -> Layout:
        names = tuple(n for n in ws.param_names if is_float(ws.owners[n]))
        shapes = tuple(ws.owners[n].shape for n in names)
        sizes = [int(np.prod(s, dtype=np.int64)) for s in shapes]
        return cls(names, shapes, tuple(int(k) for k in np.concatenate(([0], np.cumsum(sizes)))))

    @property
    def n(self) -> int:
        return self.offsets[-1]

    def part(self, name: str) -> slice:
        k = self.names.index(name)
        return slice(self.offsets[k], self.offsets[k + 1])

    def size(self, name: str) -> int:
        s = self.part(name)
        return s.stop - s.start

    def shape(self, name: str) -> tuple[int, ...]:
        return self.shapes[self.names.index(name)]

    def split(self, vec: np.ndarray) -> dict[str, np.ndarray]:
        return {n: vec[self.part(n)].reshape(s) for n, s in zip(self.names, self.shapes)}

    def join(self, parts: Mapping[str, np.ndarray]) -> np.ndarray:
        out = np.zeros(self.n)
        for name in self.names:
            if name in parts:
                out[self.part(name)] = np.asarray(parts[name], dtype=np.float64).reshape(-1)
        return out


class GradientField:
    """backward at the base point moved by flat vectors; counts its calls."""

    def __init__(self, backward: Callable[..., Any], ws: Workspace, layout: Layout) -> None:
        self.backward, self.ws, self.layout = backward, ws, layout
        self.calls = 0

    def moved(self, d: np.ndarray) -> tuple[dict[str, np.ndarray], np.ndarray]:
        """The tensors moved by ``d`` in their own dtype, and the move really made (flat)."""
        moved, real = {}, np.zeros(self.layout.n)
        for name in self.layout.names:
            part = self.layout.part(name)
            if not np.any(d[part]):
                continue
            owner = self.ws.owners[name]
            new = (owner.astype(np.float64) + d[part].reshape(owner.shape)).astype(owner.dtype)
            moved[name] = np.asarray(new)
            real[part] = (new.astype(np.float64) - owner.astype(np.float64)).reshape(-1)
        return moved, real

    def at(self, moved: Mapping[str, np.ndarray]) -> np.ndarray:
        """The gradient (flat) with the tensors ``moved`` swapped in: one backward call."""
        self.calls += 1
        ws = self.ws.replacing(dict(moved)) if moved else self.ws
        grads = validate(call_backward(self.backward, ws, None, scratch=False), ws)
        missing = [n for n in self.layout.names if n not in grads.values]
        if missing:
            raise BadOutputError(f"backward gave no usable gradient for {missing[0]} at a point "
                                 "moved to check second derivatives",
                                 fix="backward must return a finite gradient for every param there too")
        return self.layout.join(grads.values)


class HessianSource:
    """``hv(w)``: the analytic Hessian times a flat vector; ``problems``: what is unusable."""

    form = ""

    def __init__(self) -> None:
        self.calls = 0
        self.problems: dict[str, str] = {}  # row tensor -> sentence

    def hv(self, w: np.ndarray) -> np.ndarray:
        raise NotImplementedError


class HvpSource(HessianSource):
    """The ``hvp(params, inputs, v)`` form; ``v`` nested like the floating-point params."""

    def __init__(self, fn: Callable[..., Any], ws: Workspace, layout: Layout,
                 form: str = "hvp") -> None:
        super().__init__()
        self.fn, self.ws, self.layout, self.form = fn, ws, layout, form

    def hv(self, w: np.ndarray) -> np.ndarray:
        self.calls += 1
        pieces = {n: v.astype(self.ws.owners[n].dtype) for n, v in self.layout.split(w).items()}
        for v in pieces.values():
            v.flags.writeable = False
        v_tree = nested(self.ws._param_shape, pieces)
        try:
            out = self.fn(self.ws.params_tree, self.ws.inputs_tree, v_tree)
        except ProbeError:
            raise
        except Exception as exc:
            raise UserCodeError(f"{self.form} raised {summarise(exc)}") from exc
        if not isinstance(out, Mapping):
            raise BadOutputError(f"hvp must return a mapping nested like the params, not a "
                                 f"{type(out).__name__}", value=out, fix=HVP_FIX)
        flat = flatten(out)
        result = np.zeros(self.layout.n)
        for name, shape in zip(self.layout.names, self.layout.shapes):
            if name not in flat:
                self.problems[name] = f"hvp returned no value for {name}"
                continue
            value = np.asarray(flat[name])
            if value.shape != shape or not (np.issubdtype(value.dtype, np.number) or is_float_dtype(value.dtype)):
                self.problems[name] = (f"hvp returned shape {value.shape} for {name}, whose "
                                       f"shape is {shape}")
                continue
            if not np.all(np.isfinite(value)):
                self.problems[name] = f"hvp returned non-finite values for {name}"
                continue
            result[self.layout.part(name)] = value.astype(np.float64).reshape(-1)
        return result


class DenseSource(HessianSource):
    """The ``hessian(params, inputs)`` form: one call, then products with the matrix."""

    form = "hessian"

    def __init__(self, fn: Callable[..., Any], ws: Workspace, layout: Layout) -> None:
        super().__init__()
        self.calls = 1
        try:
            out = fn(ws.params_tree, ws.inputs_tree)
        except ProbeError:
            raise
        except Exception as exc:
            raise UserCodeError(f"hessian raised {summarise(exc)}") from exc
        n = layout.n
        try:
            matrix = np.asarray(out, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise BadOutputError(f"hessian returned {type(out).__name__}, not a square array "
                                 f"of side {n}", value=out, fix=HESSIAN_FIX) from exc
        if matrix.shape != (n, n):
            raise BadOutputError(
                f"hessian returned shape {matrix.shape}, but the params have {n} floating-point "
                f"elements, so it must be ({n}, {n}) in the order params are flattened",
                value=out, fix="")  # the message says the fix
        if not np.all(np.isfinite(matrix)):
            raise BadOutputError("hessian returned non-finite values", value=out, fix=HESSIAN_FIX)
        self.matrix = matrix

    def hv(self, w: np.ndarray) -> np.ndarray:
        return self.matrix @ w

