"""Calibration: on pure background, candidates with far_per_year <= F number F x T.

This is the property that matters most (CHECKS.md, "Calibration"): a false alarm
rate off by ten makes every alert meaningless. Ten hours of a simulated 16-site
network (independent Poisson sites with slow drifts, dead time, clock jitter and
out-of-order arrival) run through the same pipeline as replay and the live
service, with a loose candidate threshold. For each trigger type and three F
spanning two decades, the number of merged candidates with FAR <= F must agree
with F x T within 3 sigma (Poisson; common practice for a counting check).
T is the searched time: the recording minus the first two minutes (the rate
estimate's warm-up).
"""

from __future__ import annotations

import math

import pytest

from tests.netsim import run_pipeline, small_network
from tocsin.gpstime import utc_to_gps_ns
from tocsin.model.candidate import Candidate
from tocsin.sim import build_scenario, iter_batches, simulate
from tocsin.types import NS_PER_S, SECONDS_PER_YEAR

HOURS = 10.0
WARMUP_S = 120.0
#: F x T = 3, 30, 300 over the searched time
TARGET_COUNTS = (3.0, 30.0, 300.0)


@pytest.fixture(scope="module")
def background() -> tuple[dict[str, Candidate], float]:
    reg, rates = small_network()
    start = utc_to_gps_ns("2026-05-01T00:00:00")
    sc = build_scenario(
        reg, seed=11, start_ns=start, duration_ns=int(HOURS * 3600 * NS_PER_S), rates_hz=rates
    )
    sim = simulate(sc)
    t_years = (HOURS * 3600 - WARMUP_S) / SECONDS_PER_YEAR
    f_max = 2 * TARGET_COUNTS[-1] / t_years
    _, latest, _ = run_pipeline(reg, iter_batches(sim), candidate_far=f_max)
    return latest, t_years


@pytest.mark.slow
@pytest.mark.parametrize("trigger", ["coincidence", "excess"])
def test_far_is_calibrated(background: tuple[dict[str, Candidate], float], trigger: str) -> None:
    latest, t_years = background
    fars = [c.far_per_year for c in latest.values() if c.trigger == trigger]
    rows = []
    for expected in TARGET_COUNTS:
        f = expected / t_years
        observed = sum(1 for x in fars if x <= f)
        rows.append((f, expected, observed))
        print(f"{trigger:12s} F={f:10.4g}/yr  expected {expected:6.1f}  observed {observed}")
    for f, expected, observed in rows:
        # Poisson, 3 sigma
        assert abs(observed - expected) <= 3 * math.sqrt(expected), (trigger, f, expected, observed)
