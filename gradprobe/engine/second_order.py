"""Checking hand-written second derivatives (protocol section 7), after the gradient.

1. ``H w`` against the derivative of the analytic gradient along ``w`` (:class:`Slopes`), for
   coordinate directions (columns of every block) and random directions per column tensor;
   a random direction that fails where no sampled column does is bisected down to the
   column behind it.
2. Independently of backward, ``u·H v`` against forward's mixed second differences, for
   every pair of tensors (u along one, v along the other or the same).
3. Symmetry ``u·(H v) = v·(H u)`` on the same pairs (elementwise for a dense Hessian).

Where the error enters follows from 1 and 2: a Hessian that disagrees with backward's
derivative and with forward is wrong itself; one that agrees with backward's derivative but
not with forward is the faithful derivative of a wrong gradient.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from typing import Any

import numpy as np

from .second_hints import block_hints
from ..settings.options import CheckOptions
from ..report.second import ForwardAgreement, SecondOrderResult
from ..common.status import Status, worst
from .point import Point
from ..common.roundoff import rounding_units
from .sampling import stratified, tensor_rng
from .second_blocks import KEEP_ELEMENTS, BlockTally
from .second_forward import mixed_difference, mixed_sides
from .second_numeric import FAIL, Along, Slopes
from .second_source import DenseSource, GradientField, HessianSource, HvpSource, Layout

SWEEP_TOTAL = 2048  # a target with at most this many param elements has every column checked
LOCATE_BUDGET = 3  # bisections per block whose random direction fails where no column does
RESOLVED = 0.1  # forward's second differences say something when good to 10 % or better
FORWARD_MARGIN = 3.0  # check 2 fails beyond its threshold plus this many error bounds


def second_order_source(target: Any, ws: Any, layout: Layout) -> HessianSource | None:
    """The target's Hessian form, or None when it gives none. (A framework's double backward
    is one more :class:`HvpSource`, whose function names its form.)"""
    hvp, hessian = getattr(target, "hvp", None), getattr(target, "hessian", None)
    if hvp is not None:
        return HvpSource(hvp, ws, layout, form=getattr(hvp, "form", "hvp"))
    if hessian is not None:
        return DenseSource(hessian, ws, layout)
    return None


def check_second_order(target: Any, point: Point, options: CheckOptions, threshold: float,
                       clock: Callable[[], float] = time.perf_counter) -> SecondOrderResult:
    started, forward_before = clock(), point.evaluator.count
    ws = point.numerics.workspace
    layout = Layout.of(ws)
    assert point.backward is not None
    field = GradientField(point.backward, ws, layout)
    g0 = field.at({})
    source = second_order_source(target, ws, layout)
    assert source is not None
    eps = float(np.finfo(point.numerics.dtype).eps)
    jitter = layout.join({n: j for n in layout.names if (j := point.jitter(n)) is not None})
    slopes = Slopes(field, source, g0, eps, threshold, jitter)
    run = _Run(layout, slopes, options, threshold)
    run.check_columns()
    agreement, pair_notes = run.pairs(point, eps, g0)
    sym_status, sym_worst, asym = run.symmetry(source)
    for name, sentence in source.problems.items():
        for (r, _), t in run.tallies.items():
            if r == name:
                t.problem = sentence
    hints = block_hints(run.tallies, layout.names, threshold)
    blocks = tuple(t.result(hints.get(key), threshold) for key, t in run.tallies.items()
                   if t.n_rows and t.n_cols)
    failing = any(b.status is Status.FAIL for b in blocks)
    enters = run.enters(failing, agreement)
    status = worst([b.status for b in blocks] + [sym_status]
                   + ([Status.FAIL] if enters == "gradient" and not failing else []))
    notes = [*pair_notes]
    return SecondOrderResult(
        form=source.form, status=status, error_enters_at=enters, symmetric=sym_status,
        blocks=blocks, forward=agreement, symmetry_max_rel_error=sym_worst,
        asymmetric_pairs=asym, backward_calls=field.calls, hessian_calls=source.calls,
        evaluations=point.evaluator.count - forward_before, seconds=clock() - started,
        errors=tuple(source.problems.values()), notes=tuple(notes))


class _Run:
    """One check's directions, block tallies and pair comparisons."""

    def __init__(self, layout: Layout, slopes: Slopes, options: CheckOptions, threshold: float):
        self.layout, self.slopes, self.options, self.threshold = layout, slopes, options, threshold
        keep = layout.n * layout.n <= KEEP_ELEMENTS
        self.tallies = {(r, c): BlockTally(r, c, layout.shape(r), layout.shape(c), keep)
                        for r in layout.names for c in layout.names}
        self.random: dict[str, list[Along]] = {}
        self.pair_results: list[tuple[str, str, float, float, float, float, float, float]] = []

    def _columns(self, name: str, g0: np.ndarray) -> np.ndarray:
        size = self.layout.size(name)
        if self.options.sample is not None:
            n = min(size, self.options.sample)
        elif self.layout.n <= SWEEP_TOTAL:
            n = size
        else:
            n = min(size, self.options.default_sample)
        rng = tensor_rng(self.options.seed, name, "second-order columns")
        return stratified(self.layout.shape(name), n, rng, g0[self.layout.part(name)])

    def check_columns(self) -> None:
        g0 = self.slopes.g0
        for c in self.layout.names:
            col = self.layout.part(c)
            self.random[c] = []
            if col.stop == col.start:  # an empty tensor has no columns
                continue
            for j in self._columns(c, g0):
                self._column(c, int(j))
            k_dirs = self.options.directions if self.options.directions is not None else 2
            rng = tensor_rng(self.options.seed, c, "second-order directions")
            for _ in range(max(k_dirs, 1)):
                d = np.zeros(self.layout.n)
                v = rng.standard_normal(col.stop - col.start)
                d[col] = v / np.max(np.abs(v))
                along = self.slopes.along(d, coordinate=False)
                self.random[c].append(along)
                for r in self.layout.names:
                    tally = self.tallies[(r, c)]
                    if tally.direction(along, self.layout.part(r)):
                        self._locate(r, c, d)

    def _column(self, c: str, j: int) -> Along:
        d = np.zeros(self.layout.n)
        d[self.layout.part(c).start + j] = 1.0
        along = self.slopes.along(d)
        for r in self.layout.names:
            self.tallies[(r, c)].column(j, along, self.layout.part(r))
        return along

    def _locate(self, r: str, c: str, d: np.ndarray) -> None:
        """Bisect the support of a failing direction to a column of C; check that column."""
        tally = self.tallies[(r, c)]
        if tally.failed or tally.located >= LOCATE_BUDGET:
            return
        tally.located += 1
        rows = self.layout.part(r)
        support = np.flatnonzero(d)
        while support.size > 1:
            half = support[: support.size // 2]
            part = np.zeros_like(d)
            part[half] = d[half]
            if np.any(self.slopes.along(part, coordinate=False).code[rows] == FAIL):
                support = half
            else:
                support = support[support.size // 2:]
        self._column(c, int(support[0] - self.layout.part(c).start))

    def pairs(self, point: Point, eps: float, g0: np.ndarray) -> tuple[ForwardAgreement, list[str]]:
        """Check 2 on every pair of tensors, reusing check 1's random directions."""
        names = self.layout.names
        noise = rounding_units(point.numerics.dtype) * eps * point.loss_scale
        x = self.slopes.x
        done, failed, failing, worst_rel, resolutions = 0, 0, [], 0.0, []
        kinked: list[tuple[str, str]] = []
        for i, r in enumerate(names):
            for c in names[i:]:
                if not self.random[r] or not self.random[c]:
                    continue
                u_along = self.random[r][0]
                v_along = self.random[c][1] if r == c and len(self.random[c]) > 1 else self.random[c][0]
                if r == c and v_along is u_along:
                    continue
                u, v = u_along.w, v_along.w
                rows_r, rows_c = self.layout.part(r), self.layout.part(c)
                a = float(u[rows_r] @ v_along.analytic[rows_r])
                a_t = float(v[rows_c] @ u_along.analytic[rows_c])
                b = float(u[rows_r] @ v_along.numeric[rows_r])
                err_b = float(np.abs(u[rows_r]) @ v_along.error[rows_r])
                m = mixed_difference(point.evaluator, self.layout, x, u, v, eps, noise, g0)
                scale = max(abs(a), abs(b), abs(m.value),
                            1e-3 * float(np.abs(u[rows_r]) @ np.abs(v_along.numeric[rows_r])),
                            float(np.finfo(np.float64).tiny))
                self.pair_results.append((r, c, a, a_t, b, err_b, m.value, m.error))
                done += 1
                if abs(a - m.value) > self.threshold * scale + FORWARD_MARGIN * m.error:
                    if mixed_sides(point.evaluator, self.layout, x, u, v, eps, noise, point.numerics.f0):
                        kinked.append((r, c))
                        self.pair_results[-1] = (r, c, a, a_t, b, err_b, m.value, math.inf)
                        continue
                    failed += 1
                    failing.append((r, c))
                resolutions.append(m.error / scale)
                if m.error / scale <= RESOLVED:
                    worst_rel = max(worst_rel, abs(a - m.value) / scale)
        resolved = [q for q in resolutions if q <= RESOLVED]
        status = (Status.FAIL if failed else Status.PASS if resolved or not resolutions
                  else Status.INCONCLUSIVE)
        notes = []
        if kinked:
            notes.append("forward has a kink at the point along "
                         + ", ".join(f"{r} × {c}" for r, c in kinked)
                         + ": its one-sided second differences differ, so they were not compared")
        if resolutions and not resolved:
            notes.append("forward's second differences are too coarse on this target to "
                         f"say anything finer than {min(resolutions):.0e} relative: check 2 "
                         "(independent of backward) could not decide")
        return ForwardAgreement(status, done, failed, worst_rel if resolved else None,
                                max(resolved) if resolved else None, tuple(failing)), notes

    def symmetry(self, source: HessianSource) -> tuple[Status, float | None, tuple]:
        """u·(Hv) against v·(Hu) on the pairs (the whole matrix for a dense Hessian)."""
        if isinstance(source, DenseSource):
            return self._dense_symmetry(source.matrix)
        worst_rel, bad = 0.0, []
        for r, c, a, a_t, *_ in self.pair_results:
            u_along = self.random[r][0]
            v_along = self.random[c][1] if r == c else self.random[c][0]
            terms = max(float(np.abs(u_along.w) @ np.abs(v_along.analytic)),
                        float(np.abs(v_along.w) @ np.abs(u_along.analytic)),
                        float(np.finfo(np.float64).tiny))
            rel = abs(a - a_t) / terms
            worst_rel = max(worst_rel, rel)
            if rel > self.threshold:
                bad.append((r, c))
        if not self.pair_results:
            return Status.PASS, None, ()
        return (Status.FAIL if bad else Status.PASS), worst_rel, tuple(bad)

    def _dense_symmetry(self, h: np.ndarray) -> tuple[Status, float | None, tuple]:
        diff = np.abs(h - h.T)
        worst_rel, bad = 0.0, []
        for i, r in enumerate(self.layout.names):
            for c in self.layout.names[i:]:
                block = h[self.layout.part(r), self.layout.part(c)]
                mirror = h[self.layout.part(c), self.layout.part(r)].T
                scale = np.maximum(np.maximum(np.abs(block), np.abs(mirror)),
                                   max(1e-3 * float(np.sqrt(np.mean(h**2))), 1e-300))
                rel = diff[self.layout.part(r), self.layout.part(c)] / scale
                worst_rel = max(worst_rel, float(np.max(rel)) if rel.size else 0.0)
                if np.any(rel > self.threshold):
                    bad.append((r, c))
        return (Status.FAIL if bad else Status.PASS), worst_rel, tuple(bad)

    def enters(self, failing: bool, agreement: ForwardAgreement) -> str | None:
        """Where the error enters: the Hessian, the gradient it is the derivative of, or
        nowhere."""
        if not failing:
            return "gradient" if agreement.status is Status.FAIL else None
        verdicts = []
        for _r, _c, a, _a_t, b, err_b, f, err_f in self.pair_results:
            scale = max(abs(a), abs(b), abs(f), float(np.finfo(np.float64).tiny))
            h_vs_back = abs(a - b) > self.threshold * scale + err_b
            if not h_vs_back or err_f / scale > RESOLVED:
                continue
            h_vs_fwd = abs(a - f) > self.threshold * scale + FORWARD_MARGIN * err_f
            back_vs_fwd = abs(b - f) > self.threshold * scale + err_b + FORWARD_MARGIN * err_f
            verdicts.append("hessian" if h_vs_fwd else "gradient" if back_vs_fwd else None)
        if verdicts and all(v == "gradient" for v in verdicts):
            return "gradient"
        return "hessian"
