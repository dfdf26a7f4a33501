"""An adversarial generator of targets, judged against mpmath (see bench/adversarial.py).

Written from the opposite angle to tests/composer: not networks of layers but random
expression graphs with steep pieces, kinks placed at every distance from the point, scales over
twelve decades, odd shapes and memory layouts, float16/float32/float64 (and float32-only code),
and tensors of up to 100,000 elements. Each case is ``(category, seed)``; its expected verdicts
come from the mpmath reference (``reference.py``) and the rules in ``run.py``.
"""

from .bugs import make_case
from .generate import ALL_CATEGORIES, CATEGORIES
from .run import judge


def judged_cleanly(category: str, seed: int, /, **options):
    """:func:`judge` of a case that its reference verified and whose check did not crash
    (asserted), for tests about one case's verdicts."""
    o = judge(category, seed, **options)
    assert o["unverified"] is None and o["crash"] is None, o
    return o


__all__ = ["ALL_CATEGORIES", "CATEGORIES", "judge", "judged_cleanly", "make_case"]
