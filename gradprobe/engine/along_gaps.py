"""What the one-sided gap along a 16-bit direction says of a kink within its steps (for
:mod:`.along`): one whose line through the steps about the estimate's widest misses 0, and a
jump the steps show jointly (a gap that does not halve with the step is
:func:`.sides_gap.does_not_halve`, shared with the ladders' chain).
"""

from __future__ import annotations

import numpy as np


ROUNDING_SPREADS = 4.0  # one loss value's rounding: this many times its spread (the largest of 400 seen: 3 to 4.3)
JOINT_SPREADS = 4.0  # a kink's jump shown jointly by the steps: beyond this many of its spreads
JOINT_LEAST = 5  # steps the joint fit takes at least (three unknowns)


def jump_shown(gap: np.ndarray, gap_noise: np.ndarray, steps: np.ndarray, top: int) -> bool:
    """The one-sided gap on its line through steps L - 1 and L, or L and L + 1 (L = ``top``, the
    widest step whose quotient the estimate takes), misses 0 by more than its rounding: a
    kink lies within step L (curvature puts the line through 0, up to higher orders far
    smaller there), moving the estimate by up to half its jump. A kink closer than the
    smallest step keeps the gap near its jump at every step, which :func:`.sides_gap.does_not_halve` misses
    where rounding leaves consecutive gaps unresolved."""
    for k in (top - 1, top):
        if k < 0 or k + 1 >= steps.size:
            continue
        s0, s1 = steps[k], steps[k + 1]
        w0, w1 = s1 / (s1 - s0), s0 / (s1 - s0)
        if abs(w0 * gap[k] - w1 * gap[k + 1]) > w0 * gap_noise[k] + w1 * gap_noise[k + 1]:
            return True
    return False


def joint_jump(gap: np.ndarray, own_noise: np.ndarray, steps: np.ndarray, top: int) -> float:
    """The largest jump of slope a kink the steps show jointly could have, or 0 where they
    show none. The one-sided gap at step s is J + f'' s + 2 e / s (J a kink's jump once the
    steps straddle it, e the rounding of the loss at the point, shared by every step) plus
    each step's own rounding, independent between steps (spread at most ``own_noise`` /
    ROUNDING_SPREADS). A weighted least-squares fit of the three over the steps up to one
    beyond ``top`` (the widest the estimate takes) gives J with its spread: the roundings
    average out like 1/sqrt(n) while a gap that does not shrink with the step stays, so a
    kink each pair of steps leaves within its rounding (:func:`jump_shown`) shows jointly.
    Shown where J exceeds JOINT_SPREADS of its spreads: then J plus ROUNDING_SPREADS of them
    bounds the jump, which the quotients straddling it carry (the coordinates allow a kink
    as much, sixteen_verdicts); a smooth loss shows none and keeps its full sensitivity."""
    use = np.arange(min(top + 2, steps.size))
    sigma = own_noise[use] / ROUNDING_SPREADS
    use, sigma = use[np.isfinite(sigma) & (sigma > 0)], sigma[np.isfinite(sigma) & (sigma > 0)]
    if use.size < JOINT_LEAST or not np.all(np.isfinite(gap[use])):
        return 0.0
    s = steps[use] / steps[use][-1]
    basis = np.stack([np.ones_like(s), s, 1.0 / s], axis=1) / sigma[:, None]
    try:
        cov = np.linalg.inv(basis.T @ basis)
    except np.linalg.LinAlgError:
        return 0.0
    jump = float((cov @ (basis.T @ (gap[use] / sigma)))[0])
    spread = float(np.sqrt(cov[0, 0])) if cov[0, 0] > 0 else np.inf
    if not (np.isfinite(jump) and np.isfinite(spread)) or abs(jump) <= JOINT_SPREADS * spread:
        return 0.0
    return abs(jump) + ROUNDING_SPREADS * spread
