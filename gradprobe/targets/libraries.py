"""One adapter per array library: where a tensor lives (:class:`Kind`) and the conversions
to and from numpy. PyTorch is addressed directly (it has no ``__array_namespace__``;
bfloat16 and the version counter need it); every other library through its own namespace and
DLPack, which needs no extra dependency. A library is imported only here, and only when the
user's arrays are of it (:mod:`.boundary` holds one target's tensors and uses these).
"""

from __future__ import annotations

from dataclasses import field
from typing import Any

import numpy as np

from ..common.classes import dataclass
from ..common.errors import TargetLoadError
from ..common.tensors import ALIGNMENT

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


def rebuilt(library: str) -> Any:
    """A library's adapter from its name alone (in a worker process)."""
    if library == "torch":
        return _Torch()
    import importlib

    return _Namespace(library, importlib.import_module("jax.numpy" if library == "jax" else library))
