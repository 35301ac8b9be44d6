"""Detection on the shipped scenario: an injected 6-site plane front and a 20-site burst.

Truth comes from the simulator's truth record; positions and directions of the
injection were made with astropy (see tests/test_sim.py). Acceptance (issue):
the front is found with the right sites, its time within 3 combined clock sigma,
its direction within 3 error radii; the burst (20 sites, each +50 % for 30 s) is
found by the excess trigger.
"""

from __future__ import annotations

import math

import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord

from tests.netsim import run_pipeline
from tocsin.gpstime import utc_to_gps_ns
from tocsin.model.candidate import Candidate
from tocsin.sim import build_scenario, iter_batches, parse_injection, shipped_registry, simulate
from tocsin.types import NS_PER_S

FRONT = "front:at=420,ra=150,dec=35,sites=6"
BURST = "burst:at=600,sites=20,boost=0.5,dur=30"


@pytest.fixture(scope="module")
def run() -> tuple[dict[str, Candidate], list[dict[str, object]]]:
    reg = shipped_registry()
    start = utc_to_gps_ns("2026-04-02T21:00:00")
    sc = build_scenario(reg, seed=5, start_ns=start, duration_ns=15 * 60 * NS_PER_S)
    sim = simulate(sc, [parse_injection(FRONT), parse_injection(BURST)])
    _, latest, _ = run_pipeline(reg, iter_batches(sim), candidate_far=365.25)
    return latest, [dict(x) for x in sim.injections]


def test_front_found_with_right_sites_time_and_direction(
    run: tuple[dict[str, Candidate], list[dict[str, object]]],
) -> None:
    latest, inj = run
    truth = inj[0]
    hits = truth["hits"]
    assert isinstance(hits, list)
    true_sites = sorted(str(h["site"]) for h in hits)
    fronts = [
        c for c in latest.values() if c.trigger == "coincidence" and set(true_sites) <= set(c.sites)
    ]
    assert fronts, "front not found"
    best = min(fronts, key=lambda c: c.far_per_year)
    assert sorted(best.sites) == true_sites
    assert best.multiplicity == 6
    assert best.far_per_year < 1.0  # well below one a year
    # time: fitted front time at the Earth's centre vs truth, within 3 combined sigma
    t0_fit = int(best.details["front_t0_gps_ns"])
    t0_sigma = float(best.details["front_t0_sigma_ns"])
    assert abs(t0_fit - int(str(truth["t0_gps_ns"]))) <= 3 * t0_sigma
    # first hit: the earliest injected hit, to the nanosecond
    assert best.time_gps_ns == min(int(h["t_ns"]) for h in hits)
    # direction: astropy separation from the injected (ra, dec) within 3 error radii
    assert best.ra_deg is not None and best.dec_deg is not None and best.err_deg is not None
    params = truth["params"]
    assert isinstance(params, dict)
    sep = (
        SkyCoord(best.ra_deg * u.deg, best.dec_deg * u.deg)
        .separation(SkyCoord(params["ra_deg"] * u.deg, params["dec_deg"] * u.deg))
        .deg
    )
    assert sep <= 3 * best.err_deg, (sep, best.err_deg)
    assert math.isfinite(best.significance_sigma) and best.significance_sigma > 5


def test_burst_found_by_excess(run: tuple[dict[str, Candidate], list[dict[str, object]]]) -> None:
    latest, inj = run
    truth = inj[1]
    t0 = int(str(truth["t0_gps_ns"]))
    t1 = t0 + 30 * NS_PER_S
    found = [
        c
        for c in latest.values()
        if c.trigger == "excess"
        and c.statistic == "network"
        and c.time_gps_ns < t1
        and c.time_gps_ns + c.window_s * NS_PER_S > t0
    ]
    assert found, "burst not found by the excess trigger"
    best = min(found, key=lambda c: c.far_per_year)
    assert best.far_per_year < 1.0
    assert best.observed is not None and best.expected is not None
    assert best.observed > best.expected
    burst_sites = truth["sites"]
    assert isinstance(burst_sites, list)
    assert len(set(best.sites) & set(burst_sites)) >= 10
