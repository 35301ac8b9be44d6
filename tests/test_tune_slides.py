"""Time slides: shifted hits stay in their site's live time, dead time stays dead, and
the separation check is exact; a slid recording keeps no real coincidence."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from tests.netsim import run_pipeline, small_network
from tocsin.engine.sky import ecef_unit_to_radec, local_up_ecef
from tocsin.gpstime import utc_to_gps_ns
from tocsin.model.config import CoincidenceConfig, EngineConfig, ExcessConfig
from tocsin.sim import build_scenario, parse_injection, simulate, write_recording
from tocsin.tune import InjectionSettings
from tocsin.tune.recorded import SiteLive, load_recording
from tocsin.tune.runner import Job, replay_hits, warmup_s
from tocsin.tune.slides import (
    displacement_pieces,
    pair_separation_ns,
    plan_slides,
    shift_hits,
    slid_hits,
    trigger_windows,
)
from tocsin.types import C_M_PER_NS, NS_PER_S

#: shorter windows than the defaults, so that a 20-minute recording holds many slides
QUICK = EngineConfig(
    coincidence=CoincidenceConfig(scales_s=[1e-6, 1e-4, 1e-2, 1.0]),
    excess=ExcessConfig(scales_s=[1.0, 4.0, 16.0]),
)


def _site(rng: np.random.Generator, n_gaps: int = 6) -> SiteLive:
    """Random live intervals (1 s batches with a few outages) and Poisson hits in them."""
    edges = np.arange(0, 2000, dtype=np.int64) * NS_PER_S + 10**18
    keep = np.ones(edges.size - 1, dtype=bool)
    for _ in range(n_gaps):
        a = int(rng.integers(0, keep.size - 60))
        keep[a : a + int(rng.integers(1, 60))] = False
    start, end = edges[:-1][keep], edges[1:][keep]
    n = rng.poisson(5, size=start.size)
    t = np.sort(rng.integers(np.repeat(start, n), np.repeat(end, n)))
    return SiteLive(np.arange(start.size, dtype=np.int64), start, end, t.astype(np.int64))


def _inside(site: SiteLive, t: np.ndarray) -> bool:
    k = np.searchsorted(site.start, t, side="right") - 1
    return bool(np.all(k >= 0) and np.all(t < site.end[np.clip(k, 0, None)]))


@pytest.mark.parametrize("shift_s", [0.5, 37.0, 611.25, 1999.0, 12345.0])
def test_shifted_hits_stay_in_live_time_and_keep_their_number(shift_s: float) -> None:
    site = _site(np.random.default_rng(1))
    out = shift_hits(site, round(shift_s * NS_PER_S))
    assert out.dtype == np.int64
    assert out.size == site.t.size
    assert np.all(np.diff(out) >= 0)
    assert _inside(site, out)  # dead time stays dead


def test_shift_by_the_whole_live_time_changes_nothing() -> None:
    site = _site(np.random.default_rng(2))
    assert np.array_equal(shift_hits(site, site.live_ns), site.t)
    assert np.array_equal(shift_hits(site, 0), site.t)


def test_pair_separation_is_exact() -> None:
    """The piecewise minimum equals a brute-force one over every hit moved one by one."""
    rng = np.random.default_rng(3)
    a, b = _site(rng), _site(rng)
    da, db = 700 * NS_PER_S, 250 * NS_PER_S
    exact = pair_separation_ns(displacement_pieces(a, da), displacement_pieces(b, db))
    # brute force: probe times where both are live, each moved as a single hit
    probe = np.arange(a.start[0], a.end[-1], NS_PER_S // 4, dtype=np.int64)
    probe = probe[[_inside(a, p[None]) and _inside(b, p[None]) for p in probe]]

    def moved(site: SiteLive, d: int) -> np.ndarray:
        return np.array(
            [
                int(shift_hits(SiteLive(site.batch, site.start, site.end, p[None]), d)[0])
                for p in probe
            ],
            dtype=np.int64,
        )

    brute = int(np.abs((moved(a, da) - probe) - (moved(b, db) - probe)).min())
    assert brute >= exact
    assert brute - exact <= NS_PER_S  # the probe grid is 0.25 s; pieces start on whole seconds


@pytest.fixture(scope="module")
def fronts_recording(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, list[int]]:
    """20 minutes of the 16-site test network with six strong 6-site plane fronts."""
    reg, rates = small_network()
    sc = build_scenario(
        reg,
        seed=5,
        start_ns=utc_to_gps_ns("2026-06-01T00:00:00"),
        duration_ns=1200 * NS_PER_S,
        rates_hz=rates,
    )
    specs = []
    for k in range(6):
        at = 200 + 150 * k
        # the zenith over the stations' region at the front's time
        ra, dec = ecef_unit_to_radec(local_up_ecef(45.0, 5.0), sc.start_ns + at * NS_PER_S)
        specs.append(parse_injection(f"front:at={at},ra={ra:.3f},dec={dec:.3f},sites=6"))
    sim = simulate(sc, specs)
    path = tmp_path_factory.mktemp("slides") / "fronts.jsonl.gz"
    write_recording(sim, path)
    hits = [int(h["t_ns"]) for tr in sim.injections for h in tr["hits"]]
    return path, hits


def test_slides_keep_no_real_coincidence(fronts_recording: tuple[Path, list[int]]) -> None:
    path, front_hits = fronts_recording
    reg, _ = small_network()
    net = load_recording(path, reg, QUICK)
    w = trigger_windows(reg, QUICK)
    # longest coincidence slot: largest scale + largest light time + 3 sigma of two clocks
    r = reg.ecef_m
    light = np.sqrt(((r[:, None] - r[None]) ** 2).sum(-1)).max() / C_M_PER_NS
    assert w.coincidence_ns >= 1.0 * NS_PER_S + light
    step = 2 * w.longest_ns
    plans = plan_slides(net, n_slides=3, step_ns=step, guard_ns=w.longest_ns, seed=4)
    inj = set(front_hits)

    def with_front_hits(cands: dict) -> int:  # type: ignore[type-arg]
        return sum(
            1
            for c in cands.values()
            if c.trigger == "coincidence" and len(inj.intersection(c.hit_times_ns)) >= 2
        )

    _, zero_lag, _ = run_pipeline(reg, net.batches(), candidate_far=1e6, cfg=QUICK)
    assert with_front_hits(zero_lag) >= 5  # the fronts are there without a slide
    for p in plans:
        assert len(set(p.shift_ns)) == len(p.shift_ns)  # a different multiple per site
        assert all(d % step == 0 for d in p.shift_ns)
        assert p.min_separation_ns > w.longest_ns
        hits = slid_hits(net, p)
        for s, h in zip(net.sites, hits, strict=True):
            assert h.size == s.t.size
            assert h.size == 0 or _inside(s, h)
        _, slid, _ = run_pipeline(reg, net.batches(hits), candidate_far=1e6, cfg=QUICK)
        assert with_front_hits(slid) == 0


def test_a_recording_too_short_for_the_sites_is_refused(
    fronts_recording: tuple[Path, list[int]],
) -> None:
    path, _ = fronts_recording
    reg, _ = small_network()
    net = load_recording(path, reg, EngineConfig())
    with pytest.raises(ValueError, match=r"too short for time slides: 16 sites"):
        plan_slides(net, n_slides=1, step_ns=150 * NS_PER_S, guard_ns=101 * NS_PER_S, seed=1)
    with pytest.raises(ValueError, match="must be longer than the longest window"):
        plan_slides(net, n_slides=1, step_ns=50 * NS_PER_S, guard_ns=101 * NS_PER_S, seed=1)


def test_network_live_time_is_the_largest_site_live_time_per_bin(
    fronts_recording: tuple[Path, list[int]],
) -> None:
    """The slides' T must be the engine's time base: per 1 s bin the largest live time
    of any site (engine/coincidence.py, Tables.trial_rates_hz). Checked against a plain
    loop over bins and intervals, on sites with unaligned batches and shared outages."""
    path, _ = fronts_recording
    reg, _ = small_network()
    net = load_recording(path, reg, QUICK)
    rng = np.random.default_rng(8)
    t0 = net.start_ns
    sites = []
    for _ in range(3):
        cuts = np.sort(rng.integers(0, 120 * NS_PER_S, size=80)) + t0
        start, end = cuts[0::2], cuts[1::2]
        keep = (end > start) & ~((start > t0 + 50 * NS_PER_S) & (end < t0 + 70 * NS_PER_S))
        sites.append(SiteLive(np.arange(int(keep.sum())), start[keep], end[keep], start[keep]))
    sites += [SiteLive(*(np.zeros(0, dtype=np.int64),) * 4)] * (len(net.sites) - 3)
    fake = dataclasses.replace(net, sites=tuple(sites))
    bin_ns = NS_PER_S
    from_ns = t0 + 7 * NS_PER_S + 123_456_789  # mid-bin
    brute = 0
    for b in range(from_ns // bin_ns, -(-(t0 + 121 * NS_PER_S) // bin_ns)):
        lo, hi = max(b * bin_ns, from_ns), (b + 1) * bin_ns
        per_site = [
            sum(
                max(0, min(int(e), hi) - max(int(a), lo))
                for a, e in zip(s.start, s.end, strict=True)
            )
            for s in sites
        ]
        brute += max(per_site)
    assert fake.network_live_ns(from_ns, bin_ns) == brute
    # shared outages and unaligned batches: less than the wall time, more than none
    assert 0 < brute < t0 + 120 * NS_PER_S - from_ns


def test_replay_searches_only_the_live_time_not_the_closing_horizon(
    fronts_recording: tuple[Path, list[int]],
) -> None:
    """Pipeline.finish runs the clock a horizon past the data (no live time there); the
    searched time must not count it (it once did: slides then expected ~20 % too many
    accidentals on a 1 h recording, tests/test_tune.py)."""
    path, _ = fronts_recording
    reg, _ = small_network()
    net = load_recording(path, reg, QUICK)
    job = Job(net, QUICK, 1e3, InjectionSettings())
    _, searched, _ = replay_hits(job, None)
    data_s = (net.end_ns - net.start_ns) / NS_PER_S - warmup_s(QUICK)
    assert searched <= data_s
    assert searched >= 0.99 * data_s  # 16 sites: some site is live in every bin
