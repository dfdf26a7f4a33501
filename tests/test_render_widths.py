"""The table at 60, 80 and 120 columns: whole golden strings from a fixed-width console
without colour. Numbers, names and indices are never split; only hints wrap."""

from __future__ import annotations

import re

import pytest

from gradprobe.render.terminal import render_text
from gradprobe.report.model import DirectionResult, LayerResult, Report, TensorResult


def report() -> Report:
    w = TensorResult(
        name="encoder.W_query", layer="encoder", kind="param", shape=(64, 32), dtype="float64",
        checked=2048, failed=12, kinks=0, status="fail", max_abs_error=8.8e-1, max_rel_error=8.8e-1,
        worst_index=(17, 30), worst_noise=2.3e-12,
        hint="analytic is the numeric gradient transposed: a transpose is missing or extra "
             "(x.T @ d versus d.T @ x)")
    b = TensorResult(name="encoder.b", layer="encoder", kind="param", shape=(32,), dtype="float64",
                     checked=32, failed=0, kinks=3, status="kink", max_abs_error=2.0e-11,
                     max_rel_error=5.4e-9, worst_index=(4,), worst_noise=2.3e-7)
    h = TensorResult(name="head.W", layer="head", kind="param", shape=(32, 10), dtype="float64",
                     checked=24, failed=0, kinks=0, status="inconclusive", inconclusive=1,
                     max_abs_error=3.1e-6, max_rel_error=4.2e-6, worst_index=(31, 9), worst_noise=8.1e-6,
                     directions=(DirectionResult(1.0, 1.0, 1e-9, 1e-8, True, 6),) * 2)
    x = TensorResult(name="x", layer="inputs", kind="input", shape=(16, 64), dtype="float64",
                     checked=1024, failed=0, kinks=0, status="pass", max_abs_error=2.4e-11,
                     max_rel_error=2.4e-9, worst_index=(9, 3), worst_noise=8.9e-8)
    return Report(target="models/sentiment_tagger.py:case", threshold=1e-6, seed=0,
                  layers=(LayerResult("encoder", (w, b)), LayerResult("head", (h,)),
                          LayerResult("inputs", (x,))),
                  evaluations=6306, seconds=1.25, notes=("forward computes in float64",))


GOLDEN_60 = """\
gradprobe · models/sentiment_tagger.py:case · central
  · threshold 1e-06 (float64) · seed 0
tensor                  rel   at         status
-----------------------------------------------------
encoder
  encoder.W_query   8.8e-01   [17, 30]   fail
  encoder.b         5.4e-09   [4]        kink
head
  head.W            4.2e-06   [31, 9]    inconclusive
inputs
  x                 2.4e-09   [9, 3]     pass
hint for encoder.W_query: analytic is the numeric gradient
transposed: a transpose is missing or extra (x.T @ d versus
d.T @ x)
note: forward computes in float64
DISAGREES · 1 of 4 tensors beyond 1e-06: encoder.W_query
"""


GOLDEN_80 = """\
gradprobe · models/sentiment_tagger.py:case · central
  · threshold 1e-06 (float64) · seed 0
tensor                   checked       rel         ±   at         status
------------------------------------------------------------------------------
encoder
  encoder.W_query      2048/2048   8.8e-01   2.3e-12   [17, 30]   fail
  encoder.b                32/32   5.4e-09   2.3e-07   [4]        kink
head
  head.W            24/320 +2dir   4.2e-06   8.1e-06   [31, 9]    inconclusive
inputs
  x                    1024/1024   2.4e-09   8.9e-08   [9, 3]     pass
hint for encoder.W_query: analytic is the numeric gradient transposed: a
transpose is missing or extra (x.T @ d versus d.T @ x)
note: forward computes in float64
DISAGREES · 1 of 4 tensors beyond 1e-06: encoder.W_query
"""


GOLDEN_120 = """\
gradprobe · models/sentiment_tagger.py:case · central · threshold 1e-06 (float64) · seed 0
layer / tensor      shape        checked   worst rel   ± noise   worst abs   at         status
----------------------------------------------------------------------------------------------------
encoder
  encoder.W_query   64x32      2048/2048     8.8e-01   2.3e-12     8.8e-01   [17, 30]   fail
  encoder.b         32             32/32     5.4e-09   2.3e-07     2.0e-11   [4]        kink
head
  head.W            32x10   24/320 +2dir     4.2e-06   8.1e-06     3.1e-06   [31, 9]    inconclusive
inputs
  x                 16x64      1024/1024     2.4e-09   8.9e-08     2.4e-11   [9, 3]     pass
hint for encoder.W_query: analytic is the numeric gradient transposed: a transpose is missing or extra (x.T @ d versus
d.T @ x)
note: forward computes in float64
DISAGREES · 1 of 4 tensors beyond 1e-06: encoder.W_query · 6306 evaluations in 1.25 s
"""


@pytest.mark.parametrize("width, golden", [(60, GOLDEN_60), (80, GOLDEN_80), (120, GOLDEN_120)])
def test_table_golden_at_width(width, golden):
    """Narrower consoles get short titles, then fewer columns, then hints below the table."""
    assert render_text(report(), width=width) == golden


@pytest.mark.parametrize("width", [40, 60, 80, 100, 120, 160])
def test_no_line_passes_the_width_and_no_number_or_name_is_split(width):
    text = render_text(report(), width=width)
    assert max(len(line) for line in text.splitlines()) <= max(width, 60)
    words = set(text.split())
    for t in report().tensors:
        assert t.name in words and f"{t.max_rel_error:.1e}" in words
    if width >= 60:  # narrower, the worst index's column goes too
        for index in ("[17, 30]", "[31, 9]", "[9, 3]"):
            assert index in text
    verdict = text.splitlines()[-1]
    assert verdict.startswith("DISAGREES · 1 of 4 tensors beyond 1e-06: encoder.W_query")


def test_a_name_wider_than_the_console_widens_the_table_rather_than_splitting():
    long = "decoder.cross_attention.block_eleven.W_value_projection"
    base = report()
    t = base.layers[0].tensors[0]
    wide = Report(**{**base.__dict__, "layers": (LayerResult("decoder", (
        TensorResult(**{**t.__dict__, "name": long, "layer": "decoder"}),)),)})
    text = render_text(wide, width=40)
    lines = text.splitlines()
    assert any(re.match(rf"\s+{re.escape(long)}\s+8.8e-01\s+fail$", line) for line in lines)
    assert any(f"{long}:" in line for line in lines)  # the hint's line keeps the name whole


def test_the_run_summary_keeps_target_names_whole():
    import io

    from gradprobe.render.terminal import PLAIN, plain_console, run_summary
    from gradprobe.report.model import TargetRun

    spec = "experiments/soil_moisture/calibration_layers.py:field_case"
    runs = [TargetRun(spec, 2, error=f"{spec}: forward raised ValueError: the batch has no rows.")]
    buffer = io.StringIO()
    plain_console(buffer, 60).print(run_summary(runs, 2, PLAIN), crop=False)
    lines = [line.rstrip() for line in buffer.getvalue().splitlines()]
    assert lines[0] == "1 target, exit code 2"
    assert lines[3].startswith(spec + "   -   ") and lines[3].endswith("could not run:")
    assert " ".join(line.split("   -   ")[-1].strip() for line in lines[3:]).split() == \
        ["could", "not", "run:", "forward", "raised", "ValueError:", "the", "batch", "has", "no", "rows."]
