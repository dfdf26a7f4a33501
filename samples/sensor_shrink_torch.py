"""Denoising vibration sensors with a smooth soft-threshold, a PyTorch autograd Function.

Each of three accelerometers is calibrated by a gain, and small readings (noise) are shrunk
toward zero by a smooth soft-threshold s(z) = z - lam * tanh(z / lam), one threshold lam per
sensor; the loss is the squared error against readings of a reference instrument. The
Function has a hand-written backward, and the target sets `second_order = True`: gradprobe
takes Hessian-vector products through torch's double backward, which differentiates that
backward once more. This backward recomputes tanh from the saved inputs with torch
operations, so its own derivative is right too.

    gradprobe check samples/sensor_shrink_torch.py  # exit 0
"""

import torch

second_order = True


class SmoothShrink(torch.autograd.Function):
    """z - lam * tanh(z / lam): about z^3 / (3 lam^2) near 0, z - lam far from it."""

    @staticmethod
    def forward(ctx, z, lam):
        ctx.save_for_backward(z, lam)
        return z - lam * torch.tanh(z / lam)

    @staticmethod
    def backward(ctx, grad):
        z, lam = ctx.saved_tensors
        u = z / lam
        t = torch.tanh(u)  # recomputed here: double backward sees how it depends on z and lam
        dz = t * t
        dlam = u * (1 - t * t) - t
        return grad * dz, (grad * dlam).sum(dim=0)


def setup():
    g = torch.Generator().manual_seed(5)
    raw = 0.8 * torch.randn(12, 3, generator=g, dtype=torch.float64)  # 12 samples, 3 sensors, g
    reference = 0.9 * raw + 0.05 * torch.randn(12, 3, generator=g, dtype=torch.float64)
    params = {"gain": torch.tensor([1.1, 0.9, 1.05], dtype=torch.float64),
              "lam": torch.tensor([0.3, 0.5, 0.4], dtype=torch.float64)}
    return params, {"raw": raw, "reference": reference}


def forward(params, inputs):
    cleaned = SmoothShrink.apply(inputs["raw"] * params["gain"], params["lam"])
    return ((cleaned - inputs["reference"]) ** 2).mean()
