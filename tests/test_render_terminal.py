"""The terminal renderer, as golden strings at a fixed width without colour."""

from __future__ import annotations

import io

from rich.console import Console

from gradprobe.render.terminal import COLOUR, render_text, renderables, verdict
from gradprobe.report.model import LayerResult, Report, TensorResult


def _report(**over) -> Report:
    w = TensorResult(
        name="dense.W", layer="dense", kind="param", shape=(3, 2), dtype="float64", checked=6,
        failed=2, kinks=0, status="fail", max_abs_error=0.31, max_rel_error=1.0, worst_index=(1, 0),
        bad_indices=((0, 0), (1, 0)), hint="analytic is -1.0 x numeric: sign flipped",
    )
    b = TensorResult(name="dense.b", layer="dense", kind="param", shape=(2,), dtype="float64",
                     checked=2, failed=0, kinks=1, status="kink")
    x = TensorResult(name="x", layer="inputs", kind="input", shape=(5, 3), dtype="float64",
                     checked=15, failed=0, kinks=0, status="pass", max_abs_error=2e-10,
                     max_rel_error=7.5e-10, worst_index=(0, 0))
    fields = dict(target="nets/mlp.py", threshold=1e-6, seed=0,
                  layers=(LayerResult("dense", (w, b)), LayerResult("inputs", (x,))),
                  evaluations=51, seconds=0.08, notes=("a note",))
    fields.update(over)
    return Report(**fields)


GOLDEN = """\
gradprobe · nets/mlp.py · central · threshold 1e-06 (float64) · seed 0
layer / tensor   shape   checked   worst rel   ± noise   worst abs   at       status   hint
------------------------------------------------------------------------------------------------------------------------
dense
  dense.W        3x2         6/6     1.0e+00         -     3.1e-01   [1, 0]   fail     analytic is -1.0 x numeric: sign
                                                                                       flipped
  dense.b        2           2/2           -         -           -   -        kink
inputs
  x              5x3       15/15     7.5e-10         -     2.0e-10   [0, 0]   pass
note: a note
DISAGREES · 1 of 3 tensors beyond 1e-06: dense.W · 51 evaluations in 0.08 s
"""


def test_plain_table_golden():
    """Layer rows, tensor rows, notes and the verdict, in a fixed layout."""
    text = render_text(_report(), width=120)
    assert "\n".join(line.rstrip() for line in text.splitlines()) + "\n" == GOLDEN


def test_quiet_is_the_verdict_only():
    assert render_text(_report(), quiet=True).strip() == verdict(_report(), named=True)
    assert verdict(_report(), named=True).startswith("nets/mlp.py: DISAGREES · ")  # which target


def test_passing_verdict_mentions_kinks():
    w = _report().layers[0].tensors[0]
    fixed = TensorResult(**{**w.__dict__, "status": "pass", "failed": 0, "bad_indices": (), "hint": None})
    report = _report(layers=(LayerResult("dense", (fixed,) + _report().layers[0].tensors[1:]),))
    assert verdict(report) == "agrees · 2 tensors within 1e-06 (1 at a kink) · 51 evaluations in 0.08 s"


def test_colour_theme_styles_status():
    buffer = io.StringIO()
    console = Console(file=buffer, width=100, force_terminal=True, color_system="standard")
    for item in renderables(_report(), COLOUR):
        console.print(item)
    out = buffer.getvalue()
    # each status cell in its theme colour (ANSI SGR: 1;31 bold red, 32 green)
    assert "\x1b[1;31mfail" in out and "\x1b[32mpass" in out
