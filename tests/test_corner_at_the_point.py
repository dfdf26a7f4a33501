"""Huber residuals sitting exactly at the loss's corner (|z| = 1), others a few micro-units
from it: the loss is once differentiable there, but its second derivative jumps, so a central
quotient's error shrinks like the step, not its square. The ladder's rows hide that under
their rounding until the smallest steps, whose quotients come back to the analytic value; a
failure resting on the extrapolated estimate alone is then not evidence of a bug.
"""

from __future__ import annotations


def test_the_generator_s_case_with_residuals_on_the_huber_corner_is_no_failure():
    """kinks-54098: residuals z = X p - k of a Huber term at 1 exactly and at 1 +- 4e-6,
    4e-5, ...; sums of |z|, max and a sine beside it. Reference: mpmath, through the
    adversarial generator's judge (the gradient differentiated at 50 digits); the
    generator's backward is correct, so no tensor may fail."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 54098)
    assert not o["false_alarm"], (o["status"], o["expect"])
    assert o["status"]["p1"] != "fail", o["status"]


def test_corners_at_every_distance_with_no_rounding_to_hide_them_are_no_failure():
    """kinks-20302: Huber residuals at the corner and 5e-7 ... 5e-2 from it, a loss whose
    rounding is negligible (1e-10 in a quotient). The ladder's quotients creep toward the
    analytic value with changes shrinking 2.5, 4 and 2 times per halving: an error linear in
    the step, not the tableau's model (4 times), which a column's rate check now tells from
    it. Reference: mpmath, through the generator's judge."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 20302)
    assert not o["false_alarm"], (o["status"], o["expect"])


def test_a_wrong_gradient_on_the_same_case_still_fails(tmp_path):
    """The same target with its Huber gradient doubled (every coordinate of p1 off by 100%):
    the ladder's quotients lie far from the analytic value at every step, so it fails."""
    import importlib.util

    import numpy as np

    from adversarial.bugs import make_case
    from adversarial.case import write

    from gradprobe import probe

    write(make_case("kinks", 54098), str(tmp_path))
    spec = importlib.util.spec_from_file_location("corner_case", tmp_path / "kinks-54098.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    params, inputs = module.setup()

    def doubled(p, i):
        g = module.backward(p, i)
        return {**g, "p1": 2.0 * np.asarray(g["p1"])}

    report = probe(module.forward, doubled, params, inputs)
    assert report.tensor("p1").status.value == "fail"
    assert report.tensor("p2").status.value == "pass"


def test_a_side_extrapolated_across_a_corner_within_its_smallest_step_is_no_failure():
    """kinks-69119: Huber residuals 5e-4 from their corners, inside the ladder's smallest step
    (1e-3). The left side settles on a value 3.5e-6 off the true slope, the shift a jump of
    f'' within the step gives its extrapolation, which its quotients do not show; the right
    side does not settle. The generator's judge (mpmath) says every gradient is right."""
    from adversarial import judge

    outcome = judge("kinks", 69119)
    assert not outcome["false_alarm"], outcome["status"]
