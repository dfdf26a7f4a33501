"""Counts agree with their nouns and verbs; a suggestion's question mark ends its sentence."""

from __future__ import annotations

from gradprobe.common.errors import UsageProblem
from gradprobe.render.lines import verdict
from gradprobe.report.model import LayerResult, Report, TensorResult
from gradprobe.common.wording import plural


def test_plural():
    assert [plural(n, "tensor") for n in (0, 1, 2)] == ["0 tensors", "1 tensor", "2 tensors"]
    assert plural(1, "index") == "1 index" and plural(3, "index") == "3 indices"


def _one(status: str) -> Report:
    t = TensorResult(name="w", layer="w", kind="param", shape=(2,), dtype="float64", checked=2,
                     failed=2 if status == "fail" else 0, kinks=0, status=status, max_rel_error=0.5)
    return Report(target="t.py", threshold=1e-6, seed=0, layers=(LayerResult("w", (t,)),),
                  evaluations=1, seconds=0.0)


def test_verdicts_for_one_tensor():
    assert verdict(_one("pass")) == "agrees · 1 tensor within 1e-06 · 1 evaluation in 0.00 s"
    assert verdict(_one("fail")) == "DISAGREES · 1 of 1 tensor beyond 1e-06: w · 1 evaluation in 0.00 s"


def test_a_sentence_ending_in_a_suggestion_gets_no_full_stop():
    assert UsageProblem("unknown key 'sed'; did you mean 'seed'?").sentence() == (
        "unknown key 'sed'; did you mean 'seed'?")
    assert UsageProblem("no such file x.py").sentence() == "no such file x.py."
