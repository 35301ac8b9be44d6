"""False alarm rate measured by time slides, beside the engine's own (analytic) rate.

Every candidate of a time slide is accidental, so the number ``N(F)`` of slide
candidates with ``far_per_year <= F`` over the slides' searched time ``T``
measures the false alarm rate at threshold ``F``: ``N(F) / T``. If the engine's
FAR is honest, ``N(F)`` is Poisson with mean ``F x T`` (CHECKS.md, "Calibration"),
i.e. the measured curve lies on the line ``rate = F``. Error bars are 1-sigma
Poisson intervals (``astropy.stats.poisson_conf_interval``, ``frequentist-confidence``,
Gehrels 1986, ApJ 303, 336).

Curves are made per trigger (all its window scales together — the engine's FAR
counts every scale as a trial, so only this sum is comparable with ``F``) and per
trigger and window scale (``window_s`` of the candidate: the scale whose decision
had the best FAR), which shows where the accidental candidates come from.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from astropy.stats import poisson_conf_interval

from tocsin.tune.injections import CandRow
from tocsin.types import SECONDS_PER_YEAR, F64Array, I64Array

TRIGGERS = ("coincidence", "excess")


@dataclass(frozen=True, slots=True)
class FarCurve:
    """Measured false alarm rate (per year) at each threshold F (per year)."""

    trigger: str
    window_s: float | None
    """None: all window scales of the trigger together."""
    thresholds: F64Array
    counts: I64Array
    rate: F64Array
    rate_lo: F64Array
    rate_hi: F64Array


def threshold_grid(t_years: float, far_max: float, per_decade: int = 4) -> F64Array:
    """Thresholds from where 0.3 accidental candidates are expected up to ``far_max``."""
    lo = 0.3 / t_years
    if not far_max > lo:
        return np.array([far_max])
    n = max(2, math.ceil(math.log10(far_max / lo) * per_decade) + 1)
    grid: F64Array = np.logspace(math.log10(lo), math.log10(far_max), n)
    return grid


def far_curve(
    fars: Sequence[float],
    thresholds: F64Array,
    t_years: float,
    trigger: str,
    window_s: float | None = None,
) -> FarCurve:
    """Counts of ``fars <= F`` for each threshold, and the rate with 1-sigma errors."""
    f = np.sort(np.asarray(fars, dtype=float))
    counts = np.searchsorted(f, thresholds, side="right").astype(np.int64)
    lo, hi = poisson_conf_interval(counts, interval="frequentist-confidence", sigma=1)
    return FarCurve(
        trigger,
        window_s,
        thresholds,
        counts,
        counts / t_years,
        np.asarray(lo, dtype=float) / t_years,
        np.asarray(hi, dtype=float) / t_years,
    )


def slide_curves(cands: Sequence[CandRow], t_years: float, far_max: float) -> list[FarCurve]:
    """One curve per trigger (all scales) and one per (trigger, window scale)."""
    grid = threshold_grid(t_years, far_max)
    out: list[FarCurve] = []
    for trig in TRIGGERS:
        mine = [c for c in cands if c.trigger == trig]
        out.append(far_curve([c.far for c in mine], grid, t_years, trig))
        for w in sorted({c.window_s for c in mine}):
            out.append(far_curve([c.far for c in mine if c.window_s == w], grid, t_years, trig, w))
    return out


@dataclass(frozen=True, slots=True)
class CalibrationRow:
    """Measured against expected accidental count at one threshold."""

    trigger: str
    threshold: float
    expected: float
    observed: int
    z: float
    """(observed - expected) / sqrt(expected)."""


def calibration_rows(
    cands: Sequence[CandRow], t_years: float, expected_counts: Sequence[float]
) -> list[CalibrationRow]:
    """For each trigger and each wanted expected count ``F x T``: the observed count."""
    rows: list[CalibrationRow] = []
    for trig in TRIGGERS:
        fars = [c.far for c in cands if c.trigger == trig]
        for e in expected_counts:
            f = e / t_years
            obs = sum(1 for x in fars if x <= f)
            rows.append(CalibrationRow(trig, f, e, obs, (obs - e) / math.sqrt(e)))
    return rows


def years(seconds: float) -> float:
    """Seconds as Julian years."""
    return seconds / SECONDS_PER_YEAR
