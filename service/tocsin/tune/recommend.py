"""Recommended per-trigger thresholds: meet a target false alarm rate, keep the most signal.

For each trigger the threshold is a bound on the engine's ``far_per_year``;
a looser bound never finds fewer injections, so the best efficiency that meets
the target is the loosest bound whose *measured* (time-slide) false alarm rate
is at most the target:

* **measured** — when the slides hold enough background to see the target
  (``target x T >= MIN_MEASURED_COUNT`` accidental candidates), the bound is
  placed between the ``k``-th and ``(k+1)``-th smallest slide FAR,
  ``k = floor(target x T)``: exactly ``k`` accidentals pass it;
* **extrapolated** — for a target too rare to measure, the engine's FAR is
  trusted up to the calibration ratio ``r = N(F_ref) / (F_ref x T)`` measured
  where :data:`REFERENCE_COUNT` accidentals are expected (or at the candidate
  threshold, if lower), and the bound is ``target / r``. Much looser thresholds
  are not used for ``r``: there accidental decisions are close enough in time
  to merge into fewer candidates.

The snippet is TOML for the service config's alert table,
``[alerts.public_far_per_year_by_trigger]`` (alerts to external subscribers; paste
it under ``[alerts.internal_far_per_year_by_trigger]`` instead to set the internal
level).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from tocsin.tune.injections import CandRow, Outcome

MIN_MEASURED_COUNT = 10.0
"""Expected accidental count at the target below which the threshold is extrapolated."""
REFERENCE_COUNT = 100.0
"""Expected accidental count at which the calibration ratio is measured."""
KIND_OF_TRIGGER = {"coincidence": "front", "excess": "burst"}
"""Which injections measure each trigger's efficiency."""


@dataclass(frozen=True, slots=True)
class Efficiency:
    """Fraction of injections of one class found at a threshold, with a 68 % interval."""

    value: float
    found: int
    injected: int
    lo: float
    hi: float


@dataclass(frozen=True, slots=True)
class Recommendation:
    trigger: str
    target_per_year: float
    threshold_per_year: float
    method: str
    background_years: float
    accidentals_passing: int
    calibration_ratio: float
    calibration_ratio_err: float
    efficiency: list[Efficiency] = field(default_factory=list)


def efficiency_at(outs: Sequence[Outcome], kind: str, threshold: float) -> list[Efficiency]:
    """Per class value: injections of ``kind`` found with FAR <= ``threshold``.

    The interval is Clopper-Pearson at 68.27 % (``scipy.stats.binomtest``)."""
    from scipy.stats import binomtest

    out: list[Efficiency] = []
    mine = [o for o in outs if o.kind == kind and not math.isnan(o.best_far)]
    for v in sorted({o.value for o in mine}):
        cls = [o for o in mine if o.value == v]
        k = sum(1 for o in cls if o.best_far <= threshold)
        ci = binomtest(k, len(cls)).proportion_ci(confidence_level=0.6827, method="exact")
        out.append(Efficiency(v, k, len(cls), float(ci.low), float(ci.high)))
    return out


def recommend(
    trigger: str,
    slide_cands: Sequence[CandRow],
    t_years: float,
    far_max: float,
    target: float,
    outs: Sequence[Outcome],
) -> Recommendation:
    """The loosest FAR bound for ``trigger`` whose slide false alarm rate meets ``target``."""
    f = np.sort(np.array([c.far for c in slide_cands if c.trigger == trigger], dtype=float))
    f_ref = min(far_max, REFERENCE_COUNT / t_years)
    n_ref = int(np.searchsorted(f, f_ref, side="right"))
    ratio = n_ref / (f_ref * t_years)
    ratio_err = math.sqrt(max(n_ref, 1)) / (f_ref * t_years)
    allowed = target * t_years
    if allowed >= MIN_MEASURED_COUNT:
        k = math.floor(allowed)
        if f.size > k:
            thr = float(math.sqrt(f[k - 1] * f[k])) if k >= 1 else float(f[0]) / 2
            method = "measured"
        else:
            thr = far_max
            method = "measured (every slide candidate passes; capped at the candidate threshold)"
    elif n_ref > 0:
        thr = target / ratio
        method = "extrapolated (engine FAR x measured calibration ratio)"
    else:
        thr = target
        method = "unmeasured (no slide candidate at all; engine FAR taken as is)"
    passing = int(np.searchsorted(f, thr, side="right"))
    return Recommendation(
        trigger,
        target,
        thr,
        method,
        t_years,
        passing,
        ratio,
        ratio_err,
        efficiency_at(outs, KIND_OF_TRIGGER[trigger], thr),
    )


def config_snippet(recs: Sequence[Recommendation], source: str) -> str:
    """TOML ready to paste, with how each number was found as comments."""
    lines = [
        f"# Recommended by `tocsin tune` from {source}.",
        "# Per-trigger alert thresholds: a candidate of that trigger becomes a public alert",
        "# when its far_per_year is at most the bound (for internal alerts paste it under",
        "# [alerts.internal_far_per_year_by_trigger] instead).",
        "[alerts.public_far_per_year_by_trigger]",
    ]
    for r in recs:
        lines.append(
            f"# {r.trigger}: target {r.target_per_year:g}/yr, {r.method}; "
            f"{r.accidentals_passing} accidental(s) in {r.background_years:.4g} yr of slides"
        )
        lines.append(f"{r.trigger} = {_toml_float(r.threshold_per_year)}")
    return "\n".join(lines) + "\n"


def _toml_float(x: float) -> str:
    s = f"{x:.4g}"
    return s if any(c in s for c in ".en") else s + ".0"
