"""Nested mappings of arrays: flattening to dotted names, private copies, read-only views.

The user's arrays are never handed to their own code: a :class:`Workspace` holds private
copies, gives forward/backward read-only views of them, and perturbs the copies only.
"""

from __future__ import annotations

import copy
from collections.abc import Iterator, Mapping
from typing import Any

import numpy as np

from .errors import TargetLoadError

INPUT_LAYER = "inputs"


def flatten(tree: Mapping[str, Any], prefix: str = "", what: str = "the mapping",
            _open: tuple[int, ...] = ()) -> dict[str, Any]:
    """Flatten a nested mapping to ``{"hidden.W": leaf, ...}`` in insertion order.

    A mapping that contains itself (at any depth), or two entries giving one name, is a
    TargetLoadError naming where.
    """
    flat: dict[str, Any] = {}
    inside = (*_open, id(tree))
    for key, value in tree.items():
        name = f"{prefix}{key}"
        if isinstance(value, Mapping):
            if id(value) in inside:
                raise TargetLoadError(
                    f"{what} contains itself at {name!r}, so it has no end to flatten into "
                    "arrays", value=name)
            inner = flatten(value, prefix=f"{name}.", what=what, _open=inside)
        else:
            inner = {name: value}
        for twice in inner.keys() & flat.keys():
            raise TargetLoadError(
                f"{what} names two entries {twice!r} (a key with a dot and a nesting give the "
                "same name)", value=twice, fix="rename one so that each tensor has a name of its own")
        flat.update(inner)
    return flat


class Handed(dict[str, Any]):
    """A mapping gradprobe built from what the user's code returned (the array boundary's
    conversions): nothing else holds it, so whoever reads it may let go of its arrays one at a
    time as it reads them (memory: a large gradient's converted copy is not held beside it).
    ``fresh``: its arrays were made by a framework's reverse mode for this call and nothing of
    the user's holds them (no user code returned them), so they may be kept without a copy."""

    fresh = False


def emptied(tree: Mapping[str, Any], built: bool = False) -> None:
    """Clear ``tree`` and the dicts nested in it, if gradprobe built them (a :class:`Handed`
    mapping and what it nests); anything else is left as it is."""
    if isinstance(tree, dict) and (built or isinstance(tree, Handed)):
        for value in tree.values():
            emptied(value, built=True) if isinstance(value, dict) else None
        tree.clear()


def unflatten(flat: Mapping[str, Any], shape_of: Mapping[str, Any]) -> dict[str, Any]:
    """Rebuild the nesting of ``shape_of`` (a nested mapping) with leaves taken from ``flat``."""
    out: dict[str, Any] = {}
    for key, value in shape_of.items():
        if isinstance(value, Mapping):
            out[key] = unflatten(
                {k[len(key) + 1 :]: v for k, v in flat.items() if k.startswith(f"{key}.")}, value
            )
        else:
            out[key] = flat[str(key)]
    return out


def nested(tree: Mapping[str, Any], flat: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    """``flat`` (dotted names) in the nesting of ``tree``, keeping only the names in ``flat``."""
    out: dict[str, Any] = {}
    for key, value in tree.items():
        name = f"{prefix}{key}"
        if isinstance(value, Mapping):
            inner = nested(value, flat, prefix=f"{name}.")
            if inner:
                out[key] = inner
        elif name in flat:
            out[key] = flat[name]
    return out


def layer_of(name: str) -> str:
    """The layer of a param: its name up to the last dot (a name without a dot is its own)."""
    return name.rpartition(".")[0] or name


def is_float_dtype(dtype: np.dtype) -> bool:
    """True for real floating types: numpy's own, and extension types that numpy knows the
    rounding of (``ml_dtypes.bfloat16``, which numpy files under kind ``V``)."""
    dtype = np.dtype(dtype)
    if dtype.kind == "f":
        return True
    if dtype.kind != "V" or dtype.fields is not None or dtype.subdtype is not None:
        return False
    try:
        np.finfo(dtype)
    except (TypeError, ValueError):
        return False
    return True


def is_numeric_dtype(dtype: np.dtype) -> bool:
    """Numbers (ints, floats, complex, bool, extension floats), not strings or objects."""
    return bool(np.issubdtype(dtype, np.number) or dtype == np.bool_ or is_float_dtype(dtype))


def is_float(array: np.ndarray) -> bool:
    """True for real floating-point arrays, the only ones gradprobe perturbs."""
    return is_float_dtype(array.dtype)


ALIGNMENT = 64  # bytes: a library that shares host memory through DLPack (JAX on the CPU)
# takes an array this aligned without a copy, and copies any other
ALIGNED_FROM = 1 << 16  # bytes: arrays this large are made aligned (a few bytes more each)


def aligned_copy(array: np.ndarray, dtype: Any = None) -> np.ndarray:
    """A copy of ``array`` (converted to ``dtype``) whose data starts on an ALIGNMENT-byte
    boundary, in the array's own order (C, or Fortran for a Fortran-ordered one); a plain
    copy for a small or non-contiguous array."""
    dtype = np.dtype(array.dtype if dtype is None else dtype)
    nbytes = array.size * dtype.itemsize
    if nbytes < ALIGNED_FROM or not (array.flags.c_contiguous or array.flags.f_contiguous):
        return array.astype(dtype, order="K")  # a copy, always
    raw = np.empty(nbytes + ALIGNMENT, dtype=np.uint8)
    start = -raw.ctypes.data % ALIGNMENT
    order = "C" if array.flags.c_contiguous else "F"
    out = raw[start:start + nbytes].view(dtype).reshape(array.shape, order=order)
    np.copyto(out, array, casting="unsafe")
    return out


def as_array(value: Any, what: str) -> np.ndarray:
    """``value`` as a private numeric array, or a TargetLoadError naming ``what``."""
    if isinstance(value, np.ndarray) and is_numeric_dtype(value.dtype) and value.nbytes >= ALIGNED_FROM:
        return aligned_copy(value)
    try:
        array = np.array(value, copy=True, order="K")
    except Exception as exc:  # numpy raises many types for ragged or odd input
        raise TargetLoadError(f"{what} cannot be made into an array ({exc})", value=value) from exc
    if not is_numeric_dtype(array.dtype):
        raise TargetLoadError(
            f"{what} is not a numeric array (it is {type(value).__name__} of dtype {array.dtype})",
            value=value,
        )
    return array


def format_index(index: tuple[int, ...]) -> str:
    """``(1, 0)`` as ``[1, 0]`` for messages."""
    return "[" + ", ".join(str(i) for i in index) + "]"


class Workspace:
    """Private copies of params and inputs, with the read-only trees the user's code sees.

    ``owners`` are writable copies that only gradprobe touches; ``params_tree`` and
    ``inputs_tree`` hold read-only views of them with the user's nesting, so a perturbation
    written into an owner is seen by the next forward call, and an in-place write by the
    user's code raises instead of corrupting the check.
    """

    def __init__(self, params: Mapping[str, Any], inputs: Mapping[str, Any]) -> None:
        self._param_shape = params
        self._input_shape = inputs
        flat_params = {n: as_array(v, f"param {n}") for n, v in flatten(params, what="params").items()}
        flat_inputs = {n: as_array(v, f"input {n}") for n, v in flatten(inputs, what="inputs").items()}
        clash = sorted(set(flat_params) & set(flat_inputs))
        if clash:
            raise TargetLoadError(f"a param and an input share the name {clash[0]!r}", value=clash,
                                  fix="rename one of them, so that each tensor has a name of its own")
        self.param_names = list(flat_params)
        self._params = set(flat_params)
        self.input_names = list(flat_inputs)
        self._own({**flat_params, **flat_inputs})

    def _own(self, owners: dict[str, np.ndarray]) -> None:
        # Arithmetic on a 0-d array gives a numpy scalar, which has no flags and no views:
        # every owner is an ndarray, whatever shape, however it was computed.
        self.owners = {n: a if isinstance(a, np.ndarray) else np.asarray(a) for n, a in owners.items()}
        self.views: dict[str, np.ndarray] = {}
        for name, owner in self.owners.items():
            view = owner.view()
            view.flags.writeable = False
            self.views[name] = view
        self.params_tree = unflatten({n: self.views[n] for n in self.param_names}, self._param_shape)
        self.inputs_tree = unflatten({n: self.views[n] for n in self.input_names}, self._input_shape)

    def replacing(self, replaced: Mapping[str, np.ndarray]) -> Workspace:
        """The same target at other values of some tensors: a workspace that owns the arrays
        ``replaced`` (the caller hands them over) and shares every other array with this one
        (read only for both: only the tensors being perturbed are ever written)."""
        other = copy.copy(self)
        other._own({**self.owners, **replaced})
        return other

    def names(self) -> Iterator[str]:
        yield from self.owners

    def kind(self, name: str) -> str:
        return "param" if name in self._params else "input"

    def layer(self, name: str) -> str:
        return layer_of(name) if self.kind(name) == "param" else INPUT_LAYER

    def scratch_trees(self) -> tuple[dict[str, Any], dict[str, Any], dict[str, np.ndarray]]:
        """Fresh writable copies in the user's nesting, to see what a call writes into."""
        flat = {n: a.copy() for n, a in self.owners.items()}
        params = unflatten({n: flat[n] for n in self.param_names}, self._param_shape)
        inputs = unflatten({n: flat[n] for n in self.input_names}, self._input_shape)
        return params, inputs, flat

    def changed(self, flat: Mapping[str, np.ndarray]) -> list[str]:
        """Names whose array in ``flat`` is no longer bitwise equal to the private copy."""
        return [n for n, a in flat.items() if not same_bits(a, self.owners[n])]

    def trees_with(self, replaced: Mapping[str, np.ndarray]) -> tuple[dict, dict]:
        """The user-facing trees with some tensors swapped for other arrays (complex step)."""
        flat = {**self.views, **replaced}
        return (
            unflatten({n: flat[n] for n in self.param_names}, self._param_shape),
            unflatten({n: flat[n] for n in self.input_names}, self._input_shape),
        )


def same_bits(a: np.ndarray, b: np.ndarray) -> bool:
    """Bitwise equality of two arrays (NaNs with the same payload compare equal)."""
    if a.shape != b.shape or a.dtype != b.dtype:
        return False
    if not (a.flags.c_contiguous and b.flags.c_contiguous) or a.dtype.hasobject:
        return a.tobytes() == b.tobytes()
    x, y = a.reshape(-1).view(np.uint8), b.reshape(-1).view(np.uint8)
    # A chunk at a time: no copy of a large tensor's bytes.
    return all(np.array_equal(x[k:k + SAME_BITS_CHUNK], y[k:k + SAME_BITS_CHUNK])
               for k in range(0, x.size, SAME_BITS_CHUNK))


SAME_BITS_CHUNK = 1 << 20  # bytes compared at a time by same_bits
