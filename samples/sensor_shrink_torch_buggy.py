"""The sensors of sensor_shrink_torch.py with a Function that keeps tanh(z / lam) from its
forward for its backward. The gradient is right, but the saved value was computed outside
torch's graph (a Function's forward runs without one), so double backward treats it as a
constant: the Hessian-vector products lose every term through tanh.

    gradprobe check samples/sensor_shrink_torch_buggy.py  # exit 1: the Hessian fails, gradient passes
"""

import torch
from sensor_shrink_torch import setup  # noqa: F401  (the same arrays)

second_order = True


class SmoothShrink(torch.autograd.Function):
    @staticmethod
    def forward(ctx, z, lam):
        t = torch.tanh(z / lam)
        ctx.save_for_backward(z, lam, t)  # bug for second derivatives: t is an intermediate
        return z - lam * t

    @staticmethod
    def backward(ctx, grad):
        z, lam, t = ctx.saved_tensors
        dz = t * t
        dlam = (z / lam) * (1 - t * t) - t
        return grad * dz, (grad * dlam).sum(dim=0)


def forward(params, inputs):
    cleaned = SmoothShrink.apply(inputs["raw"] * params["gain"], params["lam"])
    return ((cleaned - inputs["reference"]) ** 2).mean()
