"""Random correct networks: dense layers, broadcasting, reductions, softmax, fan-out, products of
branches, kinked and smooth activations, four losses, float64/float32, scalar and array outputs.

Scales are drawn over many decades: params ``10**U(-4, 3)``, loss multiplier ``10**U(-6, 6)``.
A point can be placed

- ``at`` a kink: one row of the input ``x`` is zero, so that row's first pre-activation is the
  bias alone, and one bias element is set to the kink exactly (0 for ReLU/leaky/abs, the upper
  bound for clip, equal biases for a max of two branches), or an absolute-error residual is made
  exactly 0, or two output columns are made equal so that a max over the output axis ties
  (ties go to the first). Exact in float32 and float64 alike: ``0 * w`` sums to 0 and
  ``0 + b == b``; equal columns give equal dot products (in the mpmath reference exactly; in
  numpy to rounding, which the expectations allow: kink or pass).
- ``near`` a kink: the same zero row with the bias element ``+-1e-9`` or ``+-1e-7`` (the
  derivative exists there; it is the true derivative the backward returns).
- at a ``corner``: a Huber residual exactly at its switch point (first derivative continuous,
  second one jumps: not a kink).
"""

from __future__ import annotations

import numpy as np

from .backend import NUMPY
from .graph import Net, Node, evaluate

SMOOTH = ("tanh", "softplus")
ACTIVATIONS = ("relu", "leaky", "abs", "clip", "tanh", "softplus")
BLOCKS = ("dense", "residual", "product", "max2", "scale", "softmax")
LOSSES = ("squared", "absolute", "huber", "xent", "max_squared")
OUTPUTS = ("pred", "softmax", "mean0", "maxax", "tanh")


class _Builder:
    def __init__(self, rng: np.random.Generator, dtype: np.dtype, scale: float):
        self.rng, self.dtype, self.scale = rng, np.dtype(dtype), scale
        self.nodes: list[Node] = []
        self.params: dict[str, np.ndarray] = {}
        self.inputs: dict[str, np.ndarray] = {}
        self.parts: list[str] = []
        self.kinks: set[str] = set()
        self.hairline: set[str] = set()  # a kink 1e-9 away: below what rounding may resolve

    def node_attr(self, key: str, name: str):
        return dict(next(n for n in self.nodes if n.key == key).attrs)[name]

    def add(self, op: str, *args: str, **attrs) -> str:
        key = f"n{len(self.nodes)}:{op}"
        self.nodes.append(Node(key, op, args, tuple(sorted(attrs.items()))))
        return key

    def param(self, name: str, shape, scale: float) -> str:
        self.params[name] = (scale * self.rng.normal(size=shape)).astype(self.dtype)
        return f"p:{name}"

    def dense(self, h: str, d_in: int, d_out: int) -> tuple[str, str]:
        """``h @ W + b`` (the bias broadcast over the batch); returns (output, layer name)."""
        name = f"d{sum(1 for k in self.params if k.endswith('.W')) + 1}"
        w = self.param(f"{name}.W", (d_in, d_out), self.scale / np.sqrt(d_in))
        b = self.param(f"{name}.b", (d_out,), 0.5 * self.scale)
        return self.add("add_bias", self.add("matmul", h, w), b), name

    def activation(self, h: str, kind: str) -> str:
        if kind == "leaky":
            return self.add("leaky", h, alpha=0.1)
        if kind == "clip":
            bound = float(2.0 ** np.round(np.log2(self.scale)))  # exact in float32 too
            return self.add("clip", h, lo=-bound, hi=bound)
        return self.add(kind, h)

    def values(self) -> dict:
        net = Net(self.nodes, self.params, self.inputs, "", True, self.dtype)
        return evaluate(net, NUMPY, self.params, self.inputs)


def _first_layer(b: _Builder, x: str, d0: int, d1: int, kink: str) -> str:
    """The first layer; when ``kink`` is ``at`` or ``near`` it carries the placed kink."""
    rng = b.rng
    kinds = ("relu", "leaky", "abs") if kink == "near" else ("relu", "leaky", "abs", "clip", "max2")
    if kink == "none":
        kinds = ACTIVATIONS + ("max2",)
    kind = str(rng.choice(kinds))
    if kind == "max2":
        (ha, na), (hb, nb) = b.dense(x, d0, d1), b.dense(x, d0, d1)
        out = b.add("max2", ha, hb)
    else:
        h, na = b.dense(x, d0, d1)
        out = b.activation(h, kind)
    b.parts.append(f"dense+{kind}")
    if kink in ("at", "near"):
        row, j = int(rng.integers(b.inputs["x"].shape[0])), int(rng.integers(d1))
        b.inputs["x"][row] = 0
        bias = b.params[f"{na}.b"]
        if kink == "near":
            bias[j] = float(rng.choice([-1.0, 1.0]) * rng.choice([1e-9, 1e-7]))
            if abs(bias[j]) < 1e-8:
                b.hairline.add(f"{na}.b")
            b.parts.append(f"pre-activation {bias[j]:.0e} from the kink at x[{row}], unit {j}")
        elif kind == "max2":
            b.params[f"{nb}.b"][j] = bias[j]
            b.kinks.update({f"{na}.b", f"{nb}.b"})
            b.parts.append(f"max tie at x[{row}], unit {j}")
        else:
            bias[j] = b.node_attr(out, "hi") if kind == "clip" else 0.0
            b.kinks.add(f"{na}.b")
            b.parts.append(f"{kind} kink at x[{row}], unit {j}")
    return out


def _block(b: _Builder, h: str, d: int, kind: str) -> tuple[str, int]:
    """One middle block on ``h`` of width ``d``; returns the new value and its width."""
    rng = b.rng
    act = str(rng.choice(ACTIVATIONS))
    if kind == "dense":
        d2 = int(rng.integers(2, 6))
        out = b.activation(b.dense(h, d, d2)[0], act)
        b.parts.append(f"dense+{act}")
        return out, d2
    if kind == "residual":  # h used twice: h + act(h @ W + b), W square
        out = b.add("add", h, b.activation(b.dense(h, d, d)[0], act))
        b.parts.append(f"residual({act})")
        return out, d
    if kind == "product":  # two branches of h, multiplied elementwise
        left = b.dense(h, d, d)[0]
        right = b.activation(b.dense(h, d, d)[0], act)
        b.parts.append(f"product(dense, {act})")
        return b.add("mul", left, right), d
    if kind == "max2":
        out = b.add("max2", b.dense(h, d, d)[0], b.dense(h, d, d)[0])
        b.parts.append("max(dense, dense)")
        return out, d
    if kind == "scale":  # a per-feature scale broadcast over the batch
        s = b.param(f"s{len(b.params)}", (d,), 1.0)
        b.parts.append("scale")
        return b.add("scale", h, s), d
    b.parts.append("softmax")
    return b.add("softmax", h), d


def _target(b: _Builder, pred: str, like: np.ndarray) -> str:
    """A regression target near the prediction: residuals of the prediction's own size."""
    spread = float(np.std(like)) or float(np.max(np.abs(like))) or 1.0
    b.inputs["y"] = (like + spread * b.rng.normal(size=like.shape)).astype(b.dtype)
    return "i:y"


def _scalar_head(b: _Builder, pred: str, k: int, kink: str) -> tuple[str, str]:
    rng = b.rng
    forced = {"loss": "absolute", "corner": "huber", "tie": "max_squared"}
    loss = forced.get(kink) or str(rng.choice(LOSSES))
    values = b.values()
    p = np.asarray(values[pred])
    if loss == "xent":
        b.inputs["labels"] = rng.integers(0, k, size=p.shape[0])
        per = b.add("xent", pred, "i:labels")
    elif loss == "max_squared":
        m = b.add("maxax", pred, axis=1)
        per = b.add("square", b.add("sub", m, _target(b, m, np.max(p, axis=1))))
    else:
        _target(b, pred, p)
        r = (int(rng.integers(p.shape[0])), int(rng.integers(k)))
        # not the median itself: with an odd count that is a residual, exactly at the corner
        delta = (float(np.median(np.abs(p - b.inputs["y"]))) or 1.0) * float(rng.uniform(0.6, 1.6))
        if kink == "loss":  # residual exactly zero: a kink of every param upstream
            b.inputs["y"][r] = p[r]
            b.kinks.update(b.params)
            b.parts.append(f"absolute residual exactly 0 at {r}")
        if kink == "corner":  # residual exactly at the Huber switch point
            b.inputs["y"][r] = p[r] - b.dtype.type(delta)
            delta = float(p[r] - b.inputs["y"][r])
            b.parts.append(f"Huber residual exactly at its switch point {delta:.3g} at {r}")
        diff = b.add("sub", pred, "i:y")
        per = {"squared": lambda: b.add("square", diff), "absolute": lambda: b.add("abs", diff),
               "huber": lambda: b.add("huber", diff, delta=delta)}[loss]()
    red = str(rng.choice(["sum", "mean", "sum over the batch, then mean"]))
    if red.startswith("sum over"):
        total = b.add("mean", b.add("sum", per, axis=0), axis=None)
    else:
        total = b.add(red, per, axis=None)
    b.parts.append(f"{loss} loss ({red})")
    return total, loss


def _array_head(b: _Builder, pred: str, kind: str | None = None) -> str:
    kind = kind or str(b.rng.choice(OUTPUTS))
    b.parts.append(f"array output {kind}")
    if kind == "pred":
        return pred
    if kind == "mean0":
        return b.add("mean", pred, axis=0)
    if kind == "maxax":
        return b.add("maxax", pred, axis=1)
    return b.add(kind, pred)


def build(rng: np.random.Generator, dtype=np.float64, scalar: bool = True, kink: str = "none",
          require: str | None = None) -> Net:
    """A random correct network.

    ``kink``: none, at (an activation or an absolute-error residual exactly at its kink), near,
    corner (a Huber residual at its switch point). ``require``: "square" (a square weight) or
    "fanout" (a value used twice) or None.
    """
    scale = float(10 ** rng.uniform(-4, 3))
    multiplier = float(10 ** rng.uniform(-6, 6))
    b = _Builder(rng, dtype, scale)
    batch, d0, d1, k = (int(v) for v in rng.integers([3, 2, 2, 2], [6, 5, 5, 5]))
    b.inputs["x"] = rng.normal(size=(batch, d0)).astype(b.dtype)
    at_loss = kink == "at" and scalar and rng.random() < 0.25
    tie = kink == "at" and not at_loss and rng.random() < 0.25
    h = _first_layer(b, "i:x", d0, d1, "none" if at_loss or tie or kink == "corner" else kink)
    d = d1
    kinds = [str(v) for v in rng.choice(BLOCKS, size=int(rng.integers(0, 3)))]
    if require == "square" and not {"residual", "product", "max2"} & set(kinds):
        kinds.append(str(rng.choice(["residual", "product", "max2"])))
    if require == "fanout" and not {"residual", "product"} & set(kinds):
        kinds.append(str(rng.choice(["residual", "product"])))
    for kind in kinds:
        h, d = _block(b, h, d, kind)
    pred, head = b.dense(h, d, k)
    if tie:  # two equal output columns: a max over them ties exactly, in every row
        j1, j2 = (int(v) for v in sorted(rng.choice(k, size=2, replace=False)))
        b.params[f"{head}.W"][:, j2] = b.params[f"{head}.W"][:, j1]
        b.params[f"{head}.b"][j2] = b.params[f"{head}.b"][j1]
        b.kinks.update({f"{head}.W", f"{head}.b"})
        b.parts.append(f"outputs {j1} and {j2} equal: max over the axis ties")
    if scalar:
        mode = "loss" if at_loss else "tie" if tie else "corner" if kink == "corner" else "none"
        out, _ = _scalar_head(b, pred, k, mode)
    else:
        out = _array_head(b, pred, "maxax" if tie else None)
    out = b.add("cmul", out, c=multiplier)
    b.parts.append(f"x {multiplier:.1e}, params ~{scale:.1e}, {b.dtype}")
    return Net(b.nodes, b.params, b.inputs, out, scalar, b.dtype, "; ".join(b.parts), frozenset(b.kinks),
               hairline_tensors=frozenset(b.hairline))
