"""Wide steps averaged over jittered pairs, for float32 code judged on its own arithmetic
whose measured rounding (:mod:`.own_rounding`) still hides the threshold at every single step.

At each of the AVERAGED widest steps s of :func:`.wide_steps.wide_estimate` within the reach the
coordinate's rounding was measured over, JITTERS pairs at steps s (1 + SPREAD t), t evenly
spread over [-1/2, 1/2] (JITTERS - 1) times, replace the single pair. Their central quotients
carry the same truncation up to a term in (SPREAD t)**2 s**2 that the tableau's s**2 column
absorbs (every row jitters by the same shares), and roundings that are independent from one
pair to the next: the mean of JITTERS quotients, at the root mean square of their steps,
rounds sqrt(JITTERS) times less than one: the mean's rounding is taken as one pair's
measured rounding, or SPREAD_UNITS times the spread the quotients are seen to have about
their line in s**2 where that is less (never below the loss's last place over the step),
over sqrt(JITTERS). The jittered points are apart by at least the move
that changes the loss by CHANGE_ULPS units of its last place (as :mod:`.own_rounding`
requires of its moves), else a row keeps its single pair. Two checks on the coordinate, or
the row keeps the rounding of one pair: the quotients scatter about their line in s**2 no
more than one pair's rounding allows (rounding, not something else, moves them), and the
means of the two halves (every other pair, less their line's share) agree within one
pair's rounding, the sum of the two halves' own (the roundings average out rather than move
together). The windows of :func:`.wide_steps.windowed`
and :func:`.wide_steps.plain_windowed` then judge the rows, with their model checks.
"""

from __future__ import annotations

import numpy as np

from .ladder import Estimate
from .wide_steps import WIDE_FIRST, WIDE_LAST, WIDE_ROWS, plain_windowed, wide_table, windowed
from .probe import Pairs, TensorProbe
from .refine import Taken, pairs_reusing

JITTERS = 8  # pairs per averaged step
SPREAD = 1.0 / 4.0  # the jittered steps span this share of the step
AVERAGED = 5  # the widest rows within reach (two windows of four steps, three of three)
SPREAD_UNITS = 4.0  # a mean's rounding: this many times its quotients' seen spread over sqrt(JITTERS)
CHANGE_ULPS = 2.0  # neighbouring jittered points change the loss by this many units of its last place


def within_reach(probe: TensorProbe, flat: np.ndarray, reach: np.ndarray, taken: list[Taken]) -> Estimate:
    """The wide steps' estimate (:func:`.wide_steps.wide_estimate`, with windows without
    extrapolation too) from windows whose steps stay within ``reach`` (per coordinate: where
    ``probe``'s rounding was measured) as well as the params' scale; the pairs are those
    ``taken`` before where there are."""
    table, _ = _table(probe, flat, reach, taken)
    return Estimate.better(windowed(*table), plain_windowed(*table))


def _table(probe: TensorProbe, flat: np.ndarray, reach: np.ndarray, taken: list[Taken]) -> tuple[tuple[np.ndarray, ...], np.ndarray]:
    """The wide steps' rows (as :func:`.wide_steps.wide_estimate` builds them) with each column's
    largest step min(scale, ``reach``); and the steps asked."""
    ks = np.arange(WIDE_FIRST, WIDE_LAST + WIDE_ROWS)
    steps = probe.prior_steps(flat)[None, :] * 2.0 ** ks[:, None]
    scale = np.maximum(np.abs(probe.x[flat].astype(np.float64)), probe.x_scale)
    p = pairs_reusing(probe, np.tile(flat, ks.size), steps.reshape(-1), taken)
    return wide_table(probe, p, ks.size, np.minimum(scale, reach)), steps


def averaged_estimate(probe: TensorProbe, flat: np.ndarray, reach: np.ndarray, taken: list[Taken]) -> Estimate:
    """The wide steps' estimate at coordinates ``flat`` with the AVERAGED widest rows within
    ``reach`` (per coordinate) averaged over JITTERS pairs; ``probe`` carries each coordinate's
    measured rounding. (AVERAGED * JITTERS pairs per coordinate; the single pairs are those
    ``taken`` before.)"""
    n = flat.size
    (d, s, e, apart, side_noise, asymmetry, limit), steps = _table(probe, flat, reach, taken)
    d, s, e, apart, side_noise, asymmetry = (x.copy() for x in (d, s, e, apart, side_noise, asymmetry))

    # The AVERAGED widest rows within the limit, per coordinate (steps grow down the rows).
    top = (steps * (1.0 + SPREAD / 2.0) <= limit[None, :]).sum(axis=0)
    first = np.maximum(top - AVERAGED, 0)
    cols = np.flatnonzero(top >= WIDE_ROWS)
    if cols.size == 0:
        return Estimate(d[0].copy(), np.full(n, np.inf))
    shares = 1.0 + SPREAD * (np.arange(JITTERS) / (JITTERS - 1) - 0.5)
    r = first[cols][:, None] + np.arange(AVERAGED)[None, :]  # (m, AVERAGED) row numbers
    valid = r < top[cols][:, None]
    r = np.minimum(r, top[cols][:, None] - 1)
    base = steps[r, cols[:, None]]  # (m, AVERAGED)
    asked = base[:, :, None] * shares[None, None, :]  # (m, AVERAGED, JITTERS)
    where = np.broadcast_to(flat[cols][:, None, None], asked.shape)
    shape = asked.shape
    q = _pairs_where(probe, where, asked, valid)
    qd = q.central.reshape(shape)
    qs = (0.5 * (q.h_plus + q.h_minus)).reshape(shape)
    qe = (2.0 * q.noise / (q.h_plus + q.h_minus)).reshape(shape)
    qr, ql = (x.reshape(shape) for x in q.sides(probe.f0))
    qn = (2.0 * q.noise / np.minimum(q.h_plus, q.h_minus)).reshape(shape)
    qa = (np.abs(q.h_plus - q.h_minus) / np.maximum(q.h_plus + q.h_minus, 1e-300)).reshape(shape)

    eps = float(np.finfo(probe.compute_dtype).eps)
    slope = np.maximum(np.abs(probe.a[flat[cols]]), 1e-300)  # as the analytic gradient predicts
    move = CHANGE_ULPS * eps * abs(probe.f0) / slope  # (m,)
    apartness = np.diff(qs, axis=2).min(axis=2)  # the jittered steps' least spacing
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        s2 = qs**2
        mean_s2 = s2.mean(axis=2)
        mean_d = qd.mean(axis=2)
        beta = ((s2 - mean_s2[..., None]) * (qd - mean_d[..., None])).sum(axis=2) / ((s2 - mean_s2[..., None]) ** 2).sum(axis=2)
        resid = qd - mean_d[..., None] - beta[..., None] * (s2 - mean_s2[..., None])
        scatter = np.abs(resid).max(axis=2)
        spread = np.sqrt((resid**2).sum(axis=2) / (JITTERS - 2))  # one quotient's, as seen
        one = qe.max(axis=2)  # one pair's rounding, as measured along the coordinate
        last = (eps * np.maximum(np.abs(q.f_plus), np.abs(q.f_minus))).reshape(shape).max(axis=2) / mean_s2**0.5
        mean_e = np.maximum(np.minimum(one, SPREAD_UNITS * spread), last) / np.sqrt(JITTERS)
        halves = np.abs(qd[..., 0::2].mean(axis=2) - qd[..., 1::2].mean(axis=2))
        # The halves' means differ by their s**2 terms too (every other jitter): the line's share.
        halves_trend = np.abs(beta * (s2[..., 0::2].mean(axis=2) - s2[..., 1::2].mean(axis=2)))
        half_e = one / np.sqrt(JITTERS / 2.0)  # each half's mean's rounding
        ok = (valid & np.isfinite(qd).all(axis=2) & (apartness >= move[:, None])
              & (scatter <= 2.0 * one) & (halves <= halves_trend + 2.0 * half_e))
    for k, c in enumerate(cols.tolist()):
        for t in range(AVERAGED):
            row = r[k, t]
            if not ok[k, t]:
                continue
            d[row, c] = mean_d[k, t]
            s[row, c] = np.sqrt(mean_s2[k, t])
            e[row, c] = mean_e[k, t]
            apart[row, c] = (qr[k, t] - ql[k, t]).mean()
            side_noise[row, c] = qn[k, t].max() / np.sqrt(JITTERS)
            asymmetry[row, c] = qa[k, t].max()
    table = (d, s, e, apart, side_noise, asymmetry, limit)
    est = Estimate.better(windowed(*table), plain_windowed(*table))
    missing = np.setdiff1d(np.arange(n), cols)
    est.error[missing] = np.inf
    return est


def _pairs_where(probe: TensorProbe, where: np.ndarray, asked: np.ndarray, valid: np.ndarray) -> Pairs:
    """Pairs at ``where`` and steps ``asked`` (coordinates, rows, jitters), evaluated only in
    the rows ``valid`` says (the others NaN)."""
    use = np.broadcast_to(valid[..., None], asked.shape).reshape(-1)
    got = probe.pairs(where.reshape(-1)[use], asked.reshape(-1)[use])
    fields = [np.full(use.size, np.nan) for _ in range(5)]
    for mine, value in zip(fields, got.fields()):
        mine[use] = value
    return Pairs(*fields)


__all__ = ["averaged_estimate", "within_reach"]
