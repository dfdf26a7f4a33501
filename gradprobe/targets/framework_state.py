"""The framework state a check may touch, put back afterwards: torch's grad mode and default
dtype, the ``requires_grad`` and ``.grad`` of the caller's tensors, and JAX's 64-bit flag.
"""

from __future__ import annotations

import sys
from collections.abc import Iterator, Mapping
from contextlib import contextmanager, nullcontext
from typing import Any

from ..common.tensors import flatten


@contextmanager
def preserved(params: Mapping[str, Any], inputs: Mapping[str, Any]) -> Iterator[None]:
    """Puts back, whatever happens inside: torch's grad mode (inference mode is left inside) and
    default dtype, the ``requires_grad`` and ``.grad`` of the caller's tensors, and JAX's 64-bit
    flag (only for frameworks already imported: nothing here imports one)."""
    torch = sys.modules.get("torch")
    jax = sys.modules.get("jax")
    saved: list[tuple[Any, bool, Any]] = []
    if torch is not None:
        grad_mode, default = torch.is_grad_enabled(), torch.get_default_dtype()
        for what, tree in (("params", params), ("inputs", inputs)):
            for value in flatten(tree, what=what).values():
                if isinstance(value, torch.Tensor) and (value.is_leaf or value.retains_grad):
                    saved.append((value, value.requires_grad, value.grad))  # a non-leaf has no .grad
    x64 = jax.config.read("jax_enable_x64") if jax is not None and hasattr(jax, "config") else None
    # a caller in inference mode: the check's own tensors must still track writes and graphs
    inference = torch is not None and torch.is_inference_mode_enabled()
    try:
        with torch.inference_mode(False) if inference and torch is not None else nullcontext():
            yield
    finally:
        if torch is not None:
            torch.set_grad_enabled(grad_mode)
            torch.set_default_dtype(default)
            for tensor, flag, grad in saved:
                if tensor.requires_grad != flag and tensor.is_leaf:
                    tensor.requires_grad_(flag)
                if tensor.grad is not grad:
                    tensor.grad = grad
        if jax is not None and x64 is not None and jax.config.read("jax_enable_x64") != x64:
            jax.config.update("jax_enable_x64", x64)
