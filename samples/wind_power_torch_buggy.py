"""The wind farm of wind_power_torch.py with a slip in the Function's backward: the quotient
rule's denominator is not squared, so the speed and scale gradients are both off.

    gradprobe check samples/wind_power_torch_buggy.py  # exit 1: turbine.scale and speed fail
"""

from wind_power_torch import PowerCurve as RightCurve
from wind_power_torch import setup  # noqa: F401  (the same arrays)


class PowerCurve(RightCurve):
    """The same forward; the backward with the slip."""

    @staticmethod
    def backward(ctx, grad):
        v, k, total = ctx.saved_tensors
        dv = 3 * v**2 * k**3 / total  # bug: the quotient rule divides by total squared
        dk = -3 * k**2 * v**3 / total
        return grad * dv, (grad * dk).sum(dim=0)


def forward(params, inputs):
    t = params["turbine"]
    power = t["rated"] * PowerCurve.apply(inputs["speed"], t["scale"])
    return 0.5 * ((power - inputs["metered"]) ** 2).mean()
