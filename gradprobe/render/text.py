"""The report's one-line texts (header and verdict), without rich.

Shared by the terminal renderer and the CLI's quiet plain output, which needs no table and
so does not import rich at all.
"""

from __future__ import annotations

from ..report import Report
from ..status import Status


def fmt(value: float | None) -> str:
    return "-" if value is None else f"{value:.1e}"


def shape_text(shape: tuple[int, ...]) -> str:
    return "x".join(str(n) for n in shape) if shape else "scalar"


def header(report: Report) -> str:
    return (
        f"gradprobe · {report.target} · {report.method} · threshold {report.threshold:g} "
        f"({report.compute_dtype}) · seed {report.seed}"
    )


def verdict(report: Report) -> str:
    """One line: the outcome, what is wrong, what it cost."""
    n = len(report.tensors)
    cost = f"{report.evaluations} evaluations in {report.seconds:.2f} s"
    if not report.ok:
        bad = report.blocking_tensors
        names = ", ".join(t.name for t in bad[:5]) + (" ..." if len(bad) > 5 else "")
        failing = len(report.failing_tensors)
        unsure = len(bad) - failing
        parts = [f"{failing} of {n} tensors disagree beyond {report.threshold:g}"] if failing else []
        if unsure:
            parts.append(f"{unsure} of {n} inconclusive (set to fail the run)")
        return f"FAIL  {'; '.join(parts)}: {names} · {cost}"
    extras = []
    kinked = report.count(Status.KINK)
    unsure = report.count(Status.INCONCLUSIVE)
    if kinked:
        extras.append(f"{kinked} at a kink")
    if unsure:
        extras.append(f"{unsure} inconclusive (numeric noise above the threshold)")
    more = f" ({', '.join(extras)})" if extras else ""
    return f"ok  {n} tensors agree within {report.threshold:g}{more} · {cost}"
