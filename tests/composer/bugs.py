"""One planted bug per network copy, and which tensors it makes wrong.

Kinds: ``sign`` (gradient negated), ``factor`` (x1.5 or x1.01), ``transpose`` (a square weight's
gradient transposed), ``element`` (one element 1% off or set to zero), ``accumulation`` (at a
value used twice, the later path's gradient assigns instead of adding), ``derivative`` (an
activation's derivative written wrong: ReLU from ``output >= 0``, leaky ReLU with its slopes
swapped, |x|' as 1, tanh' as 1 - y, softplus' as sigmoid(2x)).

Which tensors must then fail is decided by comparing the buggy backward with the correct one
(our own choice of bar, not a convention): the tensor the bug is written into, for the first
four kinds; for the last two, every tensor whose gradient moved by more than 1% of its own
largest entry and by more than 1e-4 of the largest gradient entry of the whole target. Of
these, only tensors where the error is not faint (:mod:`composer.scale`) must fail. A tensor
whose gradient did not move at all must not fail.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from .graph import Bug, Net
from .ops import WRONG_DERIVATIVE
from .scale import FAINT, sensitivity

KINDS = ("sign", "factor", "transpose", "element", "accumulation", "derivative")


@dataclass(frozen=True)
class Planted:
    net: Net
    required: frozenset[str]  # tensors that must fail
    untouched: frozenset[str]  # tensors whose gradient the bug cannot reach near the point
    index: tuple[int, ...] | None  # the wrong element, for one-element bugs in larger tensors


def _grads(net: Net, grad_output):
    return net.backward(net.params, net.inputs, grad_output)


def _big(grads: dict, floor: float) -> list[str]:
    """Tensors whose gradient is not negligible against the whole target's."""
    top = max(float(np.max(np.abs(g))) for g in grads.values())
    return [k for k, g in grads.items() if float(np.max(np.abs(g))) > floor * top]


def _unreached(net: Net, buggy: Net, good: dict, bad: dict, grad_output) -> frozenset[str]:
    """Tensors whose gradient the bug leaves bitwise unchanged at the point and at two points
    moved by about 1e-3 of each param's scale (a bug behind a kink, a unit switched off here,
    still reaches a tensor whose gradient changes at a nearby point: gradprobe's second look
    off the kinks may rightly fail it). Moves drawn from their own generator, so the cases
    drawn from the suite's seeds stay the same."""
    same = {k for k in good if np.array_equal(good[k], bad[k])}
    rng = np.random.default_rng(12345)
    for _ in range(2):
        moved = {k: v + (1e-3 * np.maximum(np.abs(v), np.sqrt(np.mean(np.square(v))))
                         * rng.choice([-1.0, 1.0], size=v.shape)).astype(v.dtype)
                 for k, v in net.params.items()}
        with np.errstate(all="ignore"):
            g = _grads(replace(net, params=moved), grad_output)
            b = _grads(replace(buggy, params=moved), grad_output)
        same &= {k for k in g if np.array_equal(g[k], b[k])}
    return frozenset(same)


def plant(rng: np.random.Generator, net: Net, kind: str, grad_output=None) -> Planted | None:
    """``net`` with one bug of ``kind``, or None when this network offers no place for it."""
    good = _grads(net, grad_output)
    big = sorted(_big(good, 1e-3))
    index = None
    if kind in ("sign", "factor"):
        if not big:
            return None
        bug = Bug(kind, tensor=str(rng.choice(big)),
                  factor=-1.0 if kind == "sign" else float(rng.choice([1.5, 1.01])))
    elif kind == "transpose":
        square = [k for k in big if good[k].ndim == 2 and good[k].shape[0] == good[k].shape[1]
                  and np.max(np.abs(good[k] - good[k].T)) > 1e-2 * np.max(np.abs(good[k]))]
        if not square:
            return None
        bug = Bug(kind, tensor=str(rng.choice(square)))
    elif kind == "element":
        large = [k for k in big if good[k].size >= 6 and k not in net.kink_tensors]
        if not large:
            return None
        name = str(rng.choice(large))
        g = good[name]
        picks = np.argwhere(np.abs(g) >= 0.3 * np.max(np.abs(g)))
        index = tuple(int(v) for v in picks[rng.integers(len(picks))])
        bug = Bug(kind, tensor=name, factor=float(rng.choice([1.01, 0.0])), index=index)
    elif kind == "accumulation":
        fanout = [n.key for n in net.nodes if sum(a == n.key for m in net.nodes for a in m.args) >= 2]
        if not fanout:
            return None
        bug = Bug(kind, node=str(rng.choice(fanout)))
    elif kind == "derivative":
        acts = [n.key for n in net.nodes if n.op in WRONG_DERIVATIVE]
        if not acts:
            return None
        bug = Bug(kind, node=str(rng.choice(acts)))
    else:
        raise ValueError(f"unknown bug kind {kind!r}")
    buggy = net.with_bug(bug)
    bad = _grads(buggy, grad_output)
    untouched = _unreached(net, buggy, good, bad, grad_output)
    if bug.tensor is not None:
        required = frozenset({bug.tensor})
    else:
        top = max(float(np.max(np.abs(g))) for g in good.values())
        required = frozenset(
            k for k in good
            if (d := float(np.max(np.abs(bad[k] - good[k])))) > 1e-2 * float(np.max(np.abs(good[k])))
            and d > 1e-4 * top)
    diff = {k: bad[k] - good[k] for k in required}
    required = frozenset(k for k, v in sensitivity(net, diff, grad_output).items() if v >= FAINT)
    if not required:
        return None
    return Planted(buggy, required, untouched, index)
