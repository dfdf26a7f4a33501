"""The second look's wide moves also take a coordinate whose analytic value lay outside the
one-sided derivatives at both moved points (gradprobe/engine/offpoint.py).

adversarial kinks-830368: absolute values' residuals along p0 from 1e-9 to 0.7 from their
kinks, one element of the gradient 20% off (p0[3, 3], 26.28 against a true 21.90 at the first
moved point, 19.61 against 16.34 at the other). At the point it is judged `kink` (several kinks
meeting there allow the value); at both points moved by 1e-3 of the scale kinks still sat
closer than any resolvable step, and the value lay outside both one-sided derivatives there,
undecided each time, so the planted bug passed as a kink. At points moved by a quarter of the
scale it fails plainly and is located. kinks-680611 (an element 20% off beside absolute
values' kinks, left undecided at one moved point) is found the same way, and so is
kinks-850999: Huber corners at every distance (where only f'' jumps, which the kink logic reads
as kinks), an element 20% off judged `kink` at the point and again at a moved point, 0.371
against a true 0.309 there. Reference: mpmath
through the generator's judge.
"""

from __future__ import annotations

import pytest


@pytest.mark.parametrize("seed", [830368, 680611, 850999])
def test_an_element_bug_among_abs_kinks_fails_and_is_located(seed):
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", seed)
    assert o["found"] and not o["missed"], (o["status"], o["expect"])
    assert o["located"], o["status"]
