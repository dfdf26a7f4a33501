"""A wind farm's power curve as a PyTorch autograd Function with a hand-written backward.

Each turbine's output follows a Hill curve of the wind speed, P(v) = v^3 / (v^3 + k^3), scaled
by its rated power; the loss is the squared error against the metered output. The target
gives only `forward`: gradprobe takes the gradient from torch's reverse mode, which runs the
Function's own `backward`, and checks it against numeric derivatives. The tensors are
float32, so the check runs on the code's float64 run and judges the float32 gradient against
it with float32's rounding.

    gradprobe check samples/wind_power_torch.py  # exit 0
"""

import torch


class PowerCurve(torch.autograd.Function):
    """v^3 / (v^3 + k^3) for wind speeds v and a cut-in scale k (one per turbine)."""

    @staticmethod
    def forward(ctx, v, k):
        v3, k3 = v**3, k**3
        ctx.save_for_backward(v, k, v3 + k3)
        return v3 / (v3 + k3)

    @staticmethod
    def backward(ctx, grad):
        v, k, total = ctx.saved_tensors
        square = total * total
        dv = 3 * v**2 * k**3 / square  # quotient rule
        dk = -3 * k**2 * v**3 / square
        return grad * dv, (grad * dk).sum(dim=0)


def setup():
    g = torch.Generator().manual_seed(2)
    speed = 4.0 + 8.0 * torch.rand(6, 3, generator=g)  # 6 hours, 3 turbines, m/s
    params = {"turbine": {"scale": torch.tensor([6.0, 7.5, 9.0]), "rated": torch.tensor([2.0, 2.5, 3.0])}}
    metered = torch.rand(6, 3, generator=g) * 2.0
    return params, {"speed": speed, "metered": metered}


def forward(params, inputs):
    t = params["turbine"]
    power = t["rated"] * PowerCurve.apply(inputs["speed"], t["scale"])
    return 0.5 * ((power - inputs["metered"]) ** 2).mean()
