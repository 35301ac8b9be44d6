"""False alarm rate measured by time slides, beside the engine's own (analytic) rate.

Every candidate of a time slide is accidental, so the number ``N(F)`` of slide
candidates with ``far_per_year <= F`` over the slides' searched time ``T``
measures the false alarm rate at threshold ``F``: ``N(F) / T``. If the engine's
FAR is honest, ``N(F)`` is Poisson with mean ``F x T`` (CHECKS.md, "Calibration"),
i.e. the measured curve lies on the line ``rate = F``. Error bars are 1-sigma
Poisson intervals (``astropy.stats.poisson_conf_interval``, ``frequentist-confidence``,
Gehrels 1986, ApJ 303, 336).

A single site's excess (statistic ``site``) is the exception: a slide moves a
site's data but does not change it, so every slide sees the same fluctuations of
each site again. Its candidates still count towards the mean rate (unbiased), but
each one stands for up to ``S`` (the number of slides) replicas in the variance:
``var N = N_other + S x N_site``. Curves that hold such candidates get Gaussian
error bars from that variance; the others Poisson intervals.

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


REPLICATED_STATISTICS = frozenset({"site"})
"""Statistics of one site's data alone: time slides repeat, not renew, their background."""


def far_curve(
    cands: Sequence[CandRow],
    thresholds: F64Array,
    t_years: float,
    trigger: str,
    n_slides: int,
    window_s: float | None = None,
) -> FarCurve:
    """Counts of candidates with FAR <= F for each threshold, and the rate with 1-sigma errors."""
    f = np.sort(np.asarray([c.far for c in cands], dtype=float))
    counts = np.searchsorted(f, thresholds, side="right").astype(np.int64)
    var = count_variance(cands, thresholds, n_slides)
    lo, hi = poisson_conf_interval(counts, interval="frequentist-confidence", sigma=1)
    lo, hi = np.asarray(lo, dtype=float), np.asarray(hi, dtype=float)
    mixed = var > counts
    sd = np.sqrt(var)
    lo = np.where(mixed, np.maximum(counts - sd, 0.0), lo)
    hi = np.where(mixed, counts + sd, hi)
    return FarCurve(
        trigger, window_s, thresholds, counts, counts / t_years, lo / t_years, hi / t_years
    )


def count_variance(cands: Sequence[CandRow], thresholds: F64Array, n_slides: int) -> F64Array:
    """Variance of the count at each threshold: 1 per candidate, ``n_slides`` per
    candidate of a replicated statistic (see the module docstring)."""
    w = np.array(
        [n_slides if c.statistic in REPLICATED_STATISTICS else 1 for c in cands], dtype=float
    )
    f = np.asarray([c.far for c in cands], dtype=float)
    order = np.argsort(f, kind="stable")
    cum = np.concatenate([[0.0], np.cumsum(w[order])])
    var: F64Array = cum[np.searchsorted(f[order], thresholds, side="right")]
    return var


def slide_curves(
    cands: Sequence[CandRow], t_years: float, far_max: float, n_slides: int
) -> list[FarCurve]:
    """One curve per trigger (all scales) and one per (trigger, window scale)."""
    grid = threshold_grid(t_years, far_max)
    out: list[FarCurve] = []
    for trig in TRIGGERS:
        mine = [c for c in cands if c.trigger == trig]
        out.append(far_curve(mine, grid, t_years, trig, n_slides))
        for w in sorted({c.window_s for c in mine}):
            out.append(
                far_curve([c for c in mine if c.window_s == w], grid, t_years, trig, n_slides, w)
            )
    return out


@dataclass(frozen=True, slots=True)
class CalibrationRow:
    """Measured against expected accidental count at one threshold."""

    trigger: str
    threshold: float
    expected: float
    observed: int
    z: float
    """(observed - expected) / standard deviation of the expected count."""


def calibration_rows(
    cands: Sequence[CandRow], t_years: float, expected_counts: Sequence[float], n_slides: int
) -> list[CalibrationRow]:
    """For each trigger and each wanted expected count ``F x T``: the observed count, and
    its deviation in units of the expected count's standard deviation (Poisson, widened
    by the observed share of replicated candidates)."""
    rows: list[CalibrationRow] = []
    for trig in TRIGGERS:
        mine = [c for c in cands if c.trigger == trig]
        for e in expected_counts:
            f = e / t_years
            obs = sum(1 for c in mine if c.far <= f)
            var = float(count_variance(mine, np.array([f]), n_slides)[0])
            inflate = var / obs if obs > 0 else 1.0
            rows.append(CalibrationRow(trig, f, e, obs, (obs - e) / math.sqrt(e * inflate)))
    return rows


def years(seconds: float) -> float:
    """Seconds as Julian years."""
    return seconds / SECONDS_PER_YEAR
