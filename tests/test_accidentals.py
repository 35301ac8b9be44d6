"""Accidental coincidence rates: textbook formula vs a Monte-Carlo counted by the engine.

G. F. Knoll, Radiation Detection and Measurement (coincidence chapter); W. R. Leo,
Techniques for Nuclear and Particle Physics Experiments (formula standard in both;
from memory): two counters of rates R1, R2 with resolving time tau give
R_acc = 2 tau R1 R2; n-fold: n tau^(n-1) prod R_i.

The Monte-Carlo: independent Poisson streams at co-located sites with
nanosecond clocks, so the engine's forward slot is [~0, tau]; every seed whose
slots hold the other site(s) is one accidental coincidence. Counted with the
engine's own vectorised CoincidenceTrigger.evaluate (p_max = 1).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tocsin.engine.coincidence import CoincidenceTrigger
from tocsin.engine.stats import accidental_rate
from tocsin.model.config import CoincidenceConfig
from tocsin.model.registry import Site, SiteRegistry

TAU_S = 1e-3
SPAN_S = 4000.0


def _count(rates_hz: list[float], fold: int, seed: int) -> tuple[int, float]:
    reg = SiteRegistry(
        [
            Site(id=f"twin-hut-{i}", lat_deg=51.0, lon_deg=-1.0, height_m=0.0, clock_sigma_ns=0.01)
            for i in range(len(rates_hz))
        ]
    )
    cfg = CoincidenceConfig(scales_s=[TAU_S], front_scales_s=[], min_multiplicity=fold)
    trig = CoincidenceTrigger(reg, cfg)
    rng = np.random.default_rng(seed)
    span_ns = int(SPAN_S * 1e9)
    ts, ss = [], []
    for i, r in enumerate(rates_hz):
        n = rng.poisson(r * SPAN_S)
        ts.append(np.sort(rng.integers(0, span_ns, n)))
        ss.append(np.full(n, i, dtype=np.int32))
    t = np.concatenate(ts)
    s = np.concatenate(ss)
    o = np.argsort(t, kind="stable")
    t, s = t[o].astype(np.int64), s[o]
    lam = np.asarray(rates_hz)
    tab = trig.tables(lam, np.ones(len(rates_hz), dtype=bool), np.ones(len(rates_hz), dtype=bool))
    # seeds whose forward slot lies wholly inside the span
    i1 = int(np.searchsorted(t, span_ns - int(2 * TAU_S * 1e9)))
    res = trig.evaluate(t, s, 0, i1, tab, 0, p_max=1.0)
    n_fold = int(np.sum(res.multiplicity >= fold))
    live_s = i1 and float(t[i1 - 1]) / 1e9
    return n_fold, live_s


@pytest.mark.parametrize(("rates", "fold"), [([40.0, 25.0], 2), ([60.0, 50.0, 40.0], 3)])
def test_engine_counts_match_textbook_accidentals(rates: list[float], fold: int) -> None:
    observed, live_s = _count(rates, fold, seed=fold)
    expected = float(accidental_rate(np.asarray(rates), TAU_S)) * live_s
    # closed form n tau^(n-1) prod R (Knoll; Leo) vs engine Monte-Carlo, Poisson 4 sigma
    assert expected > 50
    assert abs(observed - expected) <= 4 * math.sqrt(expected), (observed, expected)
