"""The array boundary: arrays of other libraries in, numpy copies for the engine, and back.

The engine works on numpy arrays only. When ``setup()`` gives arrays of another library
(PyTorch, JAX, CuPy, array-api-strict, anything with ``__array_namespace__`` and DLPack),
:func:`frame` returns the same target with numpy params and inputs and with forward and
backward wrapped: every call converts the engine's numpy arrays to the library, dtype and
device each tensor came in (zero-copy on the CPU where the library allows), calls the
user's code, and converts what it returns back to numpy. PyTorch is addressed directly (it
has no ``__array_namespace__``; bfloat16 and the version counter need it); every other
library through its own namespace and DLPack, which needs no extra dependency. A library is
imported only here, and only when the user's arrays are of it.
"""

from __future__ import annotations

from collections.abc import Mapping
from contextlib import contextmanager
from dataclasses import field
from typing import Any, Iterator

import numpy as np

from ..common.classes import dataclass
from ..common.errors import InPlaceWriteError, ProbeError, TargetLoadError, summarise
from ..common.tensors import ALIGNMENT, Handed, flatten, unflatten

NUMPY = "numpy"
LIBRARIES = {"torch": "torch", "jax": "jax", "jaxlib": "jax", "cupy": "cupy",
             "array_api_strict": "array_api_strict"}


def library_of(value: Any) -> str:
    """The library an array belongs to: numpy for numpy arrays and plain Python values."""
    if isinstance(value, (np.ndarray, np.generic, int, float, complex, bool, list, tuple)):
        return NUMPY
    root = type(value).__module__.partition(".")[0]
    if root in LIBRARIES:
        return LIBRARIES[root]
    if hasattr(value, "__array_namespace__") or hasattr(value, "__dlpack__"):
        return root
    return NUMPY  # anything else numpy.asarray may accept


@dataclass(frozen=True)
class Kind:
    """Where one tensor lives: its library, the library's dtype name, its device (None: CPU)."""

    library: str
    dtype: str
    device: str | None = None
    handle: Any = field(default=None, compare=False, repr=False)  # the library's device object


def _is_cpu(device: Any) -> bool:
    text = str(device).lower()
    return "cpu" in text


class _Torch:
    """PyTorch tensors: DLPack-free, through torch's own numpy bridge (bfloat16 as int16 bits)."""

    def __init__(self) -> None:
        import torch

        self.torch = torch
        try:
            import ml_dtypes

            self.bfloat16: np.dtype | None = np.dtype(ml_dtypes.bfloat16)
        except ImportError:  # needed for bfloat16 tensors only
            self.bfloat16 = None

    def kind(self, x: Any) -> Kind:
        device = None if x.device.type == "cpu" else str(x.device)
        return Kind("torch", str(x.dtype).removeprefix("torch."), device, x.device)

    def to_numpy(self, x: Any) -> np.ndarray:
        t = x.detach()
        if t.device.type != "cpu":
            t = t.cpu()
        if t.dtype == self.torch.bfloat16:
            if self.bfloat16 is None:
                raise TargetLoadError("bfloat16 tensors need ml_dtypes, which is not installed here; "
                                      "install it with pip install 'gradprobe[torch]'")
            return t.view(self.torch.int16).numpy().view(self.bfloat16)
        return t.resolve_conj().resolve_neg().numpy()

    def from_numpy(self, a: np.ndarray, kind: Kind) -> Any:
        if not a.flags.writeable:
            # torch has no read-only tensors: share the memory (writes are caught by the
            # version counter, see written()) where the array's owner allows, else copy.
            try:
                a = a.view()
                a.flags.writeable = True
            except ValueError:
                a = a.copy()
        if self.bfloat16 is not None and a.dtype == self.bfloat16:
            t = self.torch.from_numpy(a.view(np.int16)).view(self.torch.bfloat16)
        else:
            t = self.torch.from_numpy(a)
        return t if kind.handle is None else t.to(kind.handle)

    def written(self, made: Any) -> bool:
        return bool(made._version)


class _Namespace:
    """Any library with ``__array_namespace__`` and DLPack (JAX, CuPy, array-api-strict)."""

    def __init__(self, name: str, xp: Any) -> None:
        self.name = name
        self.xp = xp

    def kind(self, x: Any) -> Kind:
        device = getattr(x, "device", None)
        if callable(device):
            device = device()
        if device is None and hasattr(x, "devices"):
            device = next(iter(x.devices()))
        where = None if device is None or _is_cpu(device) else str(device)
        return Kind(self.name, str(x.dtype).rpartition(".")[2], where, device)

    def to_numpy(self, x: Any) -> np.ndarray:
        if self.name == "cupy":
            return x.get()
        try:
            return np.from_dlpack(x)
        except (TypeError, RuntimeError, BufferError, ValueError):
            if self.name == "array_api_strict":  # its simulated devices refuse DLPack
                return np.from_dlpack(self.xp.asarray(x, device=self.xp.Device("CPU_DEVICE")))
            return np.asarray(x)

    def from_numpy(self, a: np.ndarray, kind: Kind) -> Any:
        if kind.device is None or kind.handle is None:
            if self.name == "jax":
                shared = _shared_with_jax(self.xp, a)
                if shared is not None:
                    return shared
            return self.xp.asarray(a)  # zero-copy where the library shares host memory
        return self.xp.asarray(a, device=kind.handle)

    def written(self, made: Any) -> bool:
        return False  # its arrays are immutable, or share numpy's read-only memory


def _shared_with_jax(jnp: Any, a: np.ndarray) -> Any:
    """A JAX CPU array on ``a``'s own memory (DLPack), or None where JAX would copy anyway or
    cannot take it: JAX shares host memory aligned to 64 bytes only, and DLPack carries no
    read-only flag, so a read-only view of a writable array is shared through a writable
    view of it (JAX arrays are immutable: the user's code cannot write through it). What
    asarray would make otherwise is the same array, copied."""
    if a.size == 0 or a.ctypes.data % ALIGNMENT or not (a.flags.c_contiguous or a.flags.f_contiguous):
        return None
    if not a.flags.writeable:
        try:
            a = a.view()
            a.flags.writeable = True
        except ValueError:
            return None
    try:
        out = jnp.from_dlpack(a)
    except (TypeError, BufferError, ValueError, RuntimeError):  # bfloat16 has no DLPack code
        return None
    return out if out.dtype == a.dtype else None  # JAX's 32-bit mode narrows: asarray does too


def adapter(library: str, sample: Any) -> Any:
    return _Torch() if library == "torch" else _Namespace(library, sample.__array_namespace__())


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


def rebuilt(library: str) -> Any:
    """A library's adapter from its name alone (in a worker process)."""
    if library == "torch":
        return _Torch()
    import importlib

    return _Namespace(library, importlib.import_module("jax.numpy" if library == "jax" else library))
