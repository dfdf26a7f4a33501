"""The array boundary: arrays of other libraries in, numpy copies for the engine, and back.

The engine works on numpy arrays only. When ``setup()`` gives arrays of another library
(PyTorch, JAX, CuPy, array-api-strict, anything with ``__array_namespace__`` and DLPack),
:func:`frame` returns the same target with numpy params and inputs and with forward and
backward wrapped: every call converts the engine's numpy arrays to the library, dtype and
device each tensor came in (zero-copy on the CPU where the library allows), calls the
user's code, and converts what it returns back to numpy, through one adapter per library
(:mod:`.libraries`).
"""

from __future__ import annotations

from collections.abc import Mapping
from contextlib import contextmanager
from typing import Any, Iterator

import numpy as np

from ..common.errors import InPlaceWriteError, ProbeError, TargetLoadError, summarise
from ..common.tensors import Handed, flatten, unflatten
from .libraries import NUMPY, Kind, adapter, library_of

class Boundary:
    """The libraries, dtypes and devices of one target's tensors, and the conversions."""

    def __init__(self, kinds: dict[str, Kind], adapters: dict[str, Any]) -> None:
        self.kinds = kinds
        self.adapters = adapters
        self.output: Kind | None = None  # forward's result, once seen

    @property
    def shared(self) -> bool:
        """Every converted array shares the engine's memory (CPU torch, array-api-strict)."""
        return all(k.device is None and k.library in ("torch", "array_api_strict")
                   for k in self.kinds.values())

    @property
    def library(self) -> str:
        """One name for the report: the library of the tensors (numpy when none other)."""
        found = [k.library for k in self.kinds.values()]
        return max(set(found), key=found.count) if found else NUMPY

    def numpy_tree(self, tree: Mapping[str, Any]) -> dict[str, Any]:
        """``tree`` with every foreign array as a numpy array (a view where possible)."""
        flat = flatten(tree)
        out = {}
        for name, value in flat.items():
            kind = self.kinds.get(name)
            if kind is None:
                out[name] = value
                continue
            try:
                out[name] = self.adapters[kind.library].to_numpy(value)
            except ProbeError:
                raise
            except Exception as exc:  # a meta tensor (no data), a sparse layout, ...
                raise TargetLoadError(f"{name} is a {kind.library} array whose values cannot be read "
                                      f"({summarise(exc)})", value=value,
                                      fix="give it as a dense array of values on the CPU or a GPU") from exc
        return unflatten(out, tree)

    def user_tree(self, tree: Mapping[str, Any], made: dict[str, Any], prefix: str = "") -> dict[str, Any]:
        """The engine's numpy ``tree`` as the user's arrays; ``made`` collects what was built.
        ``prefix`` places a sub-tree (a stack layer's params) among the target's names."""
        flat = flatten(tree)
        for name, value in flat.items():
            kind = self.kinds.get(prefix + name)
            if kind is not None and isinstance(value, np.ndarray):
                made[prefix + name] = flat[name] = self.adapters[kind.library].from_numpy(value, kind)
        return unflatten(flat, tree)

    def like(self, value: Any, name: str, made: dict[str, Any]) -> Any:
        """A numpy array (an activation, an upstream gradient) in the library and device of
        the tensor ``name``, its own dtype."""
        kind = self.kinds.get(name)
        if kind is None or not isinstance(value, np.ndarray):
            return value
        made[name] = converted = self.adapters[kind.library].from_numpy(value, kind)
        return converted

    def wide(self, flat: Mapping[str, Any]) -> bool:
        """Some JAX array is asked for in 64 bits (the engine's wider run)."""
        return any(k.library == "jax" and np.asarray(flat[n]).dtype.itemsize >= 8
                   for n, k in self.kinds.items() if n in flat and isinstance(flat[n], np.ndarray))

    @contextmanager
    def precision(self, params: Mapping[str, Any], inputs: Mapping[str, Any]) -> Iterator[None]:
        """JAX's 64-bit mode for a call on float64 arrays (restored afterwards)."""
        if "jax" in self.adapters and self.wide({**flatten(params), **flatten(inputs)}):
            import jax

            with jax.enable_x64(True):
                yield
        else:
            yield

    def result(self, value: Any, record: bool = False) -> Any:
        """A result of the user's code with foreign arrays as numpy (nested mappings too)."""
        if isinstance(value, Mapping):
            return Handed((k, self.result(v)) for k, v in value.items())
        library = library_of(value)
        if library == NUMPY:
            return value
        ad = self.adapters.get(library) or adapter(library, value)
        self.adapters.setdefault(library, ad)
        if record:
            self.output = ad.kind(value)
        try:
            return ad.to_numpy(value)
        except ProbeError:
            raise
        except Exception as exc:
            raise TargetLoadError(f"an array of {library} cannot be read back ({summarise(exc)})",
                                  value=value) from exc

    def grad_output(self, g: np.ndarray) -> Any:
        """The upstream gradient in forward's own library, dtype and device."""
        kind = self.output
        if kind is None or kind.library not in self.adapters:
            return g
        return self.adapters[kind.library].from_numpy(g.astype(self.dtype_of(kind), copy=False), kind)

    def dtype_of(self, kind: Kind) -> np.dtype:
        try:
            return np.dtype(kind.dtype)
        except TypeError:
            import ml_dtypes

            return np.dtype(getattr(ml_dtypes, kind.dtype))

    def check_writes(self, made: dict[str, Any], who: str) -> None:
        written = [n for n, t in made.items() if self.adapters[self.kinds[n].library].written(t)]
        if written:
            raise InPlaceWriteError(f"{who} writes into the arrays it is given ({', '.join(written)})",
                                    value=written)


def describe(params: Mapping[str, Any], inputs: Mapping[str, Any]) -> Boundary:
    """The boundary of a target whose arrays are ``params`` and ``inputs``."""
    kinds: dict[str, Kind] = {}
    adapters: dict[str, Any] = {}
    for what, tree in (("params", params), ("inputs", inputs)):
        for name, value in flatten(tree, what=what).items():
            library = library_of(value)
            if library == NUMPY:
                continue
            if library not in adapters:
                adapters[library] = adapter(library, value)
            kinds[name] = adapters[library].kind(value)
    return Boundary(kinds, adapters)
