"""Torch targets for bench/memory.py: a float32 shop-demand network with a hand-written
autograd Function for its activation, about MEMORY_PARAMS parameters (default 4M)."""

from __future__ import annotations

import os

import torch


class Squash(torch.autograd.Function):
    """tanh with a hand-written backward: d tanh = 1 - tanh^2."""

    @staticmethod
    def forward(ctx, z):
        t = torch.tanh(z)
        ctx.save_for_backward(t)
        return t

    @staticmethod
    def backward(ctx, grad):
        (t,) = ctx.saved_tensors
        return grad * (1 - t * t)


def _hidden() -> int:
    size = int(os.environ.get("MEMORY_PARAMS", "4000000"))
    return max(8, int((size - 10) / 61))  # 50 inputs, hidden units, 10 outputs


class DemandNetwork:
    """50 store features -> tanh hidden layer -> 10 demand figures, squared error, float32."""

    batch = 8

    def __init__(self, hand_written: bool) -> None:
        self.hidden = _hidden()
        if hand_written:
            self.backward = self._backward

    def setup(self):
        g = torch.Generator().manual_seed(0)
        h = self.hidden
        params = {"layer1": {"W": torch.randn(50, h, generator=g) / 50**0.5,
                             "b": 0.1 * torch.randn(h, generator=g)},
                  "layer2": {"W": torch.randn(h, 10, generator=g) / h**0.5,
                             "b": 0.1 * torch.randn(10, generator=g)}}
        inputs = {"x": torch.randn(self.batch, 50, generator=g),
                  "demand": torch.randn(self.batch, 10, generator=g)}
        return params, inputs

    def _hidden_act(self, params, inputs):
        return Squash.apply(inputs["x"] @ params["layer1"]["W"] + params["layer1"]["b"])

    def forward(self, params, inputs):
        a = self._hidden_act(params, inputs)
        out = a @ params["layer2"]["W"] + params["layer2"]["b"]
        return 0.5 * ((out - inputs["demand"]) ** 2).sum() / self.batch

    def _backward(self, params, inputs):
        with torch.no_grad():
            a = torch.tanh(inputs["x"] @ params["layer1"]["W"] + params["layer1"]["b"])
            out = a @ params["layer2"]["W"] + params["layer2"]["b"]
            d = (out - inputs["demand"]) / self.batch
            d1 = (d @ params["layer2"]["W"].T) * (1 - a * a)
            return {"layer2": {"W": a.T @ d, "b": d.sum(0)},
                    "layer1": {"W": inputs["x"].T @ d1, "b": d1.sum(0)}}


def autograd_4m():
    """Forward only: the gradient is torch's reverse mode through Squash's backward."""
    return DemandNetwork(hand_written=False)


def backward_4m():
    """Forward and a hand-written backward, both in torch."""
    return DemandNetwork(hand_written=True)


class DemandNetwork64(DemandNetwork):
    """The same network in float64 (no wider run: the engine's copies are the params' size)."""

    def setup(self):
        params, inputs = super().setup()
        as64 = {k: {n: t.double() for n, t in v.items()} for k, v in params.items()}
        return as64, {k: t.double() for k, t in inputs.items()}


def backward64_4m():
    """Float64, forward and a hand-written backward."""
    return DemandNetwork64(hand_written=True)
