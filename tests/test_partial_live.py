"""Calibration when sites are live for only part of an exposure bin.

Many sites starting or stopping inside the same 1 s bin is ordinary: a network
restarted by one operator, a shared uplink going down, agents that batch on the
GPS second and pause for readout at the start of every batch. On pure
background (independent Poisson sites) the number of candidates with
``far_per_year <= F`` over the searched live time T must still agree with F T
(Poisson, within 3 sigma; common practice for a counting check, as in
tests/test_calibration.py) for two decades of F, for both triggers.

Two live patterns, each shared by all 30 sites (the hard case: every seed sees
every other site live or dead together):

* ``runs`` -- the network is live for 20-120 s, dead for 2-20 s, live again, ...,
  every start and stop falling at a random point inside a second;
* ``chopped`` -- the same runs, each cut into 1 s batches on a grid at half a
  second past the GPS second, every batch losing its first 5-400 ms to readout
  dead time (the same for all sites), so no bin is ever fully live.

T is the union of live time after the warm-up (all sites share it).
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterator

import numpy as np
import pytest

from tests.netsim import run_pipeline
from tocsin.engine.block import Block
from tocsin.engine.exposure import BinStore
from tocsin.engine.livetime import LiveClock, LiveIntervals
from tocsin.gpstime import utc_to_gps_ns
from tocsin.model.batch import HitBatch
from tocsin.model.candidate import Candidate
from tocsin.model.registry import Site, SiteRegistry
from tocsin.types import NS_PER_S, SECONDS_PER_YEAR

N_GPS = 22
N_NTP = 8
SPAN_S = 4800.0
WARMUP_S = 180.0
#: F x T = 3, 30, 300 over the searched live time
TARGET_COUNTS = (3.0, 30.0, 300.0)
BATCH_GRID_PHASE_NS = NS_PER_S // 2


def _registry(rng: np.random.Generator) -> tuple[SiteRegistry, np.ndarray]:
    """30 fictional sites: 22 GPS-timed stations over ~1500 km, 8 NTP-timed counters."""
    sites: list[Site] = []
    rates: list[float] = []
    for i in range(N_GPS):
        sites.append(
            Site(
                id=f"tarn-station-{i}",
                lat_deg=float(48 + rng.uniform(-7, 7)),
                lon_deg=float(12 + rng.uniform(-10, 10)),
                height_m=float(rng.uniform(0, 800)),
                clock_sigma_ns=float(rng.uniform(20, 80)),
            )
        )
        rates.append(float(rng.uniform(3, 9)))
    for i in range(N_NTP):
        sites.append(
            Site(
                id=f"scree-counter-{i}",
                lat_deg=float(rng.uniform(-30, 60)),
                lon_deg=float(rng.uniform(-100, 120)),
                height_m=100.0,
                clock_sigma_ns=float(rng.uniform(1e6, 4e6)),
            )
        )
        rates.append(float(rng.uniform(0.5, 3)))
    return SiteRegistry(sites), np.asarray(rates)


def _runs(start: int, rng: np.random.Generator) -> list[tuple[int, int]]:
    """Shared live runs: 20-120 s live, 2-20 s dead, edges anywhere inside a second."""
    out: list[tuple[int, int]] = []
    t = start + int(rng.integers(1, NS_PER_S))
    end = start + int(SPAN_S * NS_PER_S)
    while t < end:
        t1 = min(end, t + int(rng.uniform(20, 120) * NS_PER_S))
        out.append((t, t1))
        t = t1 + int(rng.uniform(2, 20) * NS_PER_S)
    return out


def _chop(runs: list[tuple[int, int]], rng: np.random.Generator) -> list[tuple[int, int]]:
    """Cut runs at a 1 s grid (phase half a second); each piece loses its first 5-400 ms."""
    out: list[tuple[int, int]] = []
    for a, b in runs:
        k0 = (a - BATCH_GRID_PHASE_NS) // NS_PER_S + 1
        edges = [a] + [
            BATCH_GRID_PHASE_NS + k * NS_PER_S
            for k in range(k0, (b - BATCH_GRID_PHASE_NS) // NS_PER_S + 1)
            if BATCH_GRID_PHASE_NS + k * NS_PER_S < b
        ]
        edges.append(b)
        for lo, hi in itertools.pairwise(edges):
            lo2 = lo + int(rng.uniform(0.005, 0.4) * NS_PER_S)
            if lo2 < hi:
                out.append((lo2, hi))
    return out


def _batches(
    reg: SiteRegistry, rates: np.ndarray, live: list[tuple[int, int]], rng: np.random.Generator
) -> Iterator[HitBatch]:
    """Every site's batches (at most 1 s each) over the shared live intervals, in
    arrival order (each arrives 50-500 ms after its live end)."""
    items: list[tuple[int, int, HitBatch]] = []
    pieces: list[tuple[int, int]] = []
    for a, b in live:
        pieces += list(itertools.pairwise([*range(a, b, NS_PER_S), b]))
    lo = np.array([p[0] for p in pieces], dtype=np.int64)
    hi = np.array([p[1] for p in pieces], dtype=np.int64)
    for i, sid in enumerate(reg.ids):
        n = rng.poisson(rates[i] * (hi - lo) / NS_PER_S)
        recv = hi + (rng.uniform(0.05, 0.5, lo.size) * NS_PER_S).astype(np.int64)
        for j in range(lo.size):
            t = np.sort(rng.integers(lo[j], hi[j], int(n[j]), dtype=np.int64))
            items.append((int(recv[j]), i, HitBatch(sid, i, j, int(lo[j]), int(hi[j]), t)))
    items.sort(key=lambda x: (x[0], x[1]))
    for recv_ns, _, b in items:
        yield HitBatch(b.site, b.site_index, b.seq, b.live_start, b.live_end, b.t, None, recv_ns)


def _live_years(live: list[tuple[int, int]], after_ns: int) -> float:
    return sum(max(0, b - max(a, after_ns)) for a, b in live) / NS_PER_S / SECONDS_PER_YEAR


@pytest.fixture(scope="module", params=["runs", "chopped"])
def background(request: pytest.FixtureRequest) -> tuple[str, list[Candidate], float]:
    pattern = str(request.param)
    rng = np.random.default_rng(2024 if pattern == "runs" else 2025)
    reg, rates = _registry(np.random.default_rng(7))
    start = utc_to_gps_ns("2026-06-01T00:00:00")
    live = _runs(start, rng)
    if pattern == "chopped":
        live = _chop(live, rng)
    t_years = _live_years(live, start + int(WARMUP_S * NS_PER_S))
    f_max = 2 * TARGET_COUNTS[-1] / t_years
    _, latest, _ = run_pipeline(reg, _batches(reg, rates, live, rng), candidate_far=f_max)
    return pattern, list(latest.values()), t_years


@pytest.mark.slow
@pytest.mark.parametrize("trigger", ["coincidence", "excess"])
def test_far_is_calibrated_with_partly_live_bins(
    background: tuple[str, list[Candidate], float], trigger: str
) -> None:
    pattern, cands, t_years = background
    fars = [c.far_per_year for c in cands if c.trigger == trigger]
    rows = []
    for expected in TARGET_COUNTS:
        f = expected / t_years
        observed = sum(1 for x in fars if x <= f)
        rows.append((f, expected, observed))
        print(
            f"{pattern:8s} {trigger:12s} F={f:10.4g}/yr  expected {expected:6.1f}  got {observed}"
        )
    print(f"{pattern:8s} {trigger:12s} lowest FAR {min(fars, default=math.inf):.3g}/yr")
    for f, expected, observed in rows:
        # Poisson, 3 sigma (common practice)
        assert abs(observed - expected) <= 3 * math.sqrt(expected), (pattern, trigger, f, observed)


def test_live_clock_matches_interval_overlaps() -> None:
    """LiveClock.live_ns against a direct sum of interval overlaps, and partial_sites
    against the definition (live somewhere but not everywhere in the span)."""
    rng = np.random.default_rng(5)
    n, bin_ns = 6, NS_PER_S
    t0 = 1_400_000_000 * NS_PER_S
    site_l, start_l, end_l = [], [], []
    for s in range(n - 1):  # the last site is never live
        t = t0 + int(rng.integers(0, 3 * NS_PER_S))
        while t < t0 + 40 * NS_PER_S:
            d = int(rng.integers(1, 5 * NS_PER_S))
            site_l.append(s)
            start_l.append(t)
            end_l.append(min(t + d, t0 + 40 * NS_PER_S))
            t += d + int(rng.integers(0, 2 * NS_PER_S)) * int(rng.integers(0, 2))
    site = np.asarray(site_l, dtype=np.int32)
    start = np.asarray(start_l, dtype=np.int64)
    end = np.asarray(end_l, dtype=np.int64)
    z = np.zeros(0, dtype=np.int64)
    store = BinStore(n, bin_ns=bin_ns, capacity=64)
    store.add(Block(t0, t0 + 40 * NS_PER_S, z, z.astype(np.int32), site, start, end))
    iv = LiveIntervals(n)
    iv.add(site, start, end)
    clock = LiveClock(store, iv)
    qs = rng.integers(0, n, 500)
    qa = t0 + rng.integers(-NS_PER_S, 41 * NS_PER_S, 500)
    qb = qa + rng.integers(0, 8 * NS_PER_S, 500)
    got = clock.live_ns(qs.astype(np.int64), qa, qb)
    for i in range(qs.size):
        m = site == qs[i]
        want = np.maximum(0, np.minimum(end[m], qb[i]) - np.maximum(start[m], qa[i])).sum()
        assert got[i] == want, (i, got[i], want)
    a, b = t0 + 3 * NS_PER_S, t0 + 20 * NS_PER_S
    part = clock.partial_sites(a, b)
    for s in range(n):
        live = clock.live_ns(np.array([s]), np.array([a]), np.array([b]))[0]
        # whole bins here, so "partial" is exact: neither dead nor live throughout
        assert part[s] == (0 < live < b - a), (s, live)
