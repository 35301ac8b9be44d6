"""The excess trigger (tocsin.engine.excess): uniform p-values, calibrated false alarm
rates, a burst found, and results independent of how the stream is cut."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from tocsin.engine.block import Block
from tocsin.engine.excess import ExcessTrigger
from tocsin.engine.exposure import BinStore
from tocsin.model.candidate import Candidate
from tocsin.model.config import ExcessConfig, RateConfig
from tocsin.types import NS_PER_S, SECONDS_PER_YEAR, I32Array, I64Array

BIN_NS = NS_PER_S
B = 3600  # background bins (RateConfig default: 3600 s of 1 s bins)
LCM = 19200  # every default scale (1, 4, 16, 64, 256, 600 s) divides this
BASE = (1_400_000_000 // LCM + 1) * LCM - B  # first bin: the first windows start at a grid line
KS_MIN_P = 0.01  # uniformity is rejected below this KS p-value

HitArrays = tuple[I64Array, I32Array, I32Array, I64Array, I64Array]


def simulate(
    rng: np.random.Generator,
    rates_hz: list[float],
    n_bins: int,
    *,
    drift_per_h: float = 0.0,
    gaps: bool = False,
    dead_frac: float = 0.0,
) -> tuple[I64Array, I64Array]:
    """Per-second counts and live ns of independent Poisson sites (sites x bins).

    Each site drifts linearly by a random fraction up to ``drift_per_h`` per hour,
    loses up to ``dead_frac`` of every second to dead time, and (``gaps``) goes
    dark a couple of times for 10 s to 30 min.
    """
    n_sites = len(rates_hz)
    live = np.full((n_sites, n_bins), BIN_NS, dtype=np.int64)
    if dead_frac:
        live = (live * (1.0 - dead_frac * rng.random(live.shape))).astype(np.int64)
    if gaps:
        for s in range(n_sites):
            for _ in range(rng.poisson(2.0)):
                g0, glen = int(rng.integers(0, n_bins)), int(rng.integers(10, 1800))
                live[s, g0 : g0 + glen] = 0
    t_h = (np.arange(n_bins) + 0.5 - n_bins / 2) / 3600.0
    drift = rng.uniform(-drift_per_h, drift_per_h, n_sites)
    lam = np.asarray(rates_hz)[:, None] * (1.0 + drift[:, None] * t_h[None, :])
    counts = rng.poisson(lam * live / NS_PER_S).astype(np.int64)
    return counts, live


def hit_arrays(counts: I64Array, live: I64Array, b0: int) -> HitArrays:
    """Hits and live intervals of the simulated bins: one interval per live bin from its
    edge, its hits at the edge (the store keeps counts per bin only)."""
    n_sites, n_bins = counts.shape
    starts = np.repeat((b0 + np.arange(n_bins, dtype=np.int64)) * BIN_NS, n_sites)
    sid = np.tile(np.arange(n_sites, dtype=np.int32), n_bins)
    cnt, lv = counts.T.ravel(), live.T.ravel()
    m = lv > 0
    return np.repeat(starts, cnt), np.repeat(sid, cnt), sid[m], starts[m], starts[m] + lv[m]


def cut_blocks(arrs: HitArrays, edges_ns: I64Array) -> list[Block]:
    """The hits and live intervals cut into blocks at ``edges_ns`` (any ns)."""
    t, site, ls, l0, l1 = arrs
    out = []
    for a, b in zip(edges_ns[:-1].tolist(), edges_ns[1:].tolist(), strict=True):
        i0, i1 = np.searchsorted(t, [a, b])
        sel = (l1 > a) & (l0 < b)
        out.append(
            Block(
                a, b, t[i0:i1], site[i0:i1], ls[sel], np.maximum(l0[sel], a), np.minimum(l1[sel], b)
            )
        )
    return out


def make_store(counts: I64Array, live: I64Array, b0: int, *, capacity: int) -> BinStore:
    store = BinStore(counts.shape[0], bin_ns=BIN_NS, capacity=capacity)
    edges = np.arange(b0, b0 + counts.shape[1] + 1, 3600, dtype=np.int64)
    edges = np.unique(np.append(edges, b0 + counts.shape[1])) * BIN_NS
    for blk in cut_blocks(hit_arrays(counts, live, b0), edges):
        store.add(blk)
    return store


def trigger(n_sites: int, scales: list[float] | None = None, **kw: float) -> ExcessTrigger:
    cfg = ExcessConfig() if scales is None else ExcessConfig(scales_s=scales, **kw)
    ids = [f"site-{i:02d}" for i in range(n_sites)]
    return ExcessTrigger(n_sites, ids, cfg, RateConfig(), bin_ns=BIN_NS)


# ----------------------------------------------------------------------------- configuration


def test_scales_must_be_whole_bins() -> None:
    with pytest.raises(ValueError, match=r"1\.5"):
        trigger(3, [1.0, 1.5])
    with pytest.raises(ValueError, match="twice"):
        trigger(3, [4.0, 4.0])


# ----------------------------------------------------------------------------- p-values


def test_p_values_of_pure_poisson_windows_are_uniform() -> None:
    # Small counts included: sites at 2-5 Hz have 2-5 expected hits per 1 s window.
    # Randomised p-values (Lehmann & Romano sec. 3.2) are uniform: KS test vs uniform
    # (scipy.stats.kstest), per scale and statistic.
    rng = np.random.default_rng(41)
    rates = [2.3, 3.0, 4.0, 5.0, 2.6, 3.5]
    counts, live = simulate(rng, rates, B + 7200)
    store = make_store(counts, live, BASE, capacity=B + 7200)
    trig = trigger(len(rates), [1.0, 4.0, 60.0])
    tests = trig.evaluate(store, BASE + B + 7200, far_threshold_per_year=1e-30).tests
    assert len(tests) == 7 * (7200 + 1800 + 120)  # every site eligible, plus the network
    for w in (1, 4, 60):
        for site_sel in (tests.site >= 0, tests.site < 0):
            p = tests.p_value[(tests.scale_bins == w) & site_sel]
            assert stats.kstest(p, "uniform").pvalue > KS_MIN_P, (w, p.size)
    # the false alarm rate is p times the tests per second over all scales (by linearity):
    # 7 tests per window at 1, 4 and 60 s
    np.testing.assert_allclose(tests.tests_per_s, 7 * (1 + 1 / 4 + 1 / 60), rtol=1e-12)
    np.testing.assert_allclose(
        tests.far_per_year, tests.p_value * tests.tests_per_s * SECONDS_PER_YEAR, rtol=1e-12
    )


def test_low_rate_site_is_tested_only_where_enough_is_expected() -> None:
    rng = np.random.default_rng(42)
    counts, live = simulate(rng, [0.5, 6.0], B + 640)
    store = make_store(counts, live, BASE, capacity=B + 640)
    tests = (
        trigger(2, [1.0, 16.0, 64.0])
        .evaluate(store, BASE + B + 640, far_threshold_per_year=1.0)
        .tests
    )
    site0 = tests.site == 0
    # min_expected = 2 (ExcessConfig default): 0.5 Hz gives 0.5 in 1 s, 8 in 16 s
    assert not np.any(site0 & (tests.scale_bins == 1))
    assert np.sum(site0 & (tests.scale_bins == 16)) == 40
    # R counts the site at 16 s and 64 s only: (2 + 1) / 1 s is the 1 s part (net + site 1)
    r = 2 / 1 + 3 / 16 + 3 / 64
    np.testing.assert_allclose(tests.tests_per_s, r, rtol=1e-12)


# ----------------------------------------------------------------------------- calibration


def test_false_alarm_rate_is_calibrated_on_pure_background() -> None:
    """Decisions with far_per_year <= F over T hours number F T (Poisson, 3 sigma).

    8 sites at 0.5-20 Hz, linear drifts up to 3 %/h, 2 % dead time per second and
    dark gaps of up to 30 min, 32 h of windows at every default scale. The
    decisions are the trigger's raw output, not merged (merging is the engine's).
    Reference: CHECKS.md, "Calibration: the property that matters most".
    """
    rng = np.random.default_rng(43)
    rates = [0.5, 0.9, 1.7, 3.1, 5.5, 8.0, 13.0, 20.0]
    span = 6 * LCM
    counts, live = simulate(rng, rates, B + span, drift_per_h=0.03, gaps=True, dead_frac=0.02)
    store = make_store(counts, live, BASE, capacity=B + span)
    trig = trigger(len(rates))
    years = span / SECONDS_PER_YEAR  # every scale covers exactly [BASE + B, end)
    cands = trig.process(store, BASE + B + span, far_threshold_per_year=400.0 / years)
    far = np.array([c.far_per_year for c in cands])
    print("\n      F (1/yr)   expected   observed   network")
    for ft in (3.0, 30.0, 300.0):
        f = ft / years
        obs = int(np.sum(far <= f))
        net = sum(1 for c in cands if c.far_per_year <= f and c.statistic == "network")
        print(f"  {f:12.4g} {ft:10.1f} {obs:10d} {net:9d}")
        # Poisson count of false alarms, mean F T: within 3 sigma
        assert abs(obs - ft) <= 3.0 * np.sqrt(ft), (f, ft, obs)
    assert {c.statistic for c in cands} == {"network", "site"}


# ----------------------------------------------------------------------------- a burst


def _burst_data() -> tuple[I64Array, I64Array, list[int], int]:
    rng = np.random.default_rng(44)
    rates = list(rng.uniform(5.0, 20.0, 24))
    n_bins = B + 1200
    counts, live = simulate(rng, rates, n_bins, drift_per_h=0.01, dead_frac=0.01)
    burst_sites = sorted(rng.choice(24, 20, replace=False).tolist())
    b0 = B + 500  # 30 s at +50 % on 20 of the 24 sites
    extra = rng.poisson(
        0.5 * np.asarray(rates)[burst_sites, None] * live[burst_sites, b0 : b0 + 30] / NS_PER_S
    )
    counts[burst_sites, b0 : b0 + 30] += extra
    return counts, live, burst_sites, b0


def test_burst_is_found_by_the_network_sum() -> None:
    counts, live, burst_sites, b0 = _burst_data()
    store = make_store(counts, live, BASE, capacity=counts.shape[1])
    trig = trigger(24)
    cands = trig.process(store, BASE + counts.shape[1], far_threshold_per_year=1.0)
    net = [c for c in cands if c.statistic == "network"]
    assert net, "the burst was not found"
    t0, t1 = (BASE + b0) * BIN_NS, (BASE + b0 + 30) * BIN_NS
    for c in net:  # every network decision at FAR <= 1/yr overlaps the burst
        assert c.time_gps_ns < t1 and c.details["window_end_ns"] > t0
        assert c.trigger == "excess" and c.far_per_year <= 1.0
        assert c.details["live_sites"] == 24
        assert c.observed is not None and c.expected is not None and c.observed > c.expected
    best = min(net, key=lambda c: c.far_per_year)
    ids = {f"site-{i:02d}" for i in burst_sites}
    assert len(set(best.sites) & ids) >= 14
    assert len(set(best.sites) - ids) <= 2
    assert best.details["li_ma_sigma"] > 10.0


# ----------------------------------------------------------------------------- batching


def _key(c: Candidate) -> tuple[object, ...]:
    return (c.time_gps_ns, c.window_s, c.statistic, tuple(c.sites))


def test_results_do_not_depend_on_batching() -> None:
    counts, live, _, _ = _burst_data()
    n_bins = counts.shape[1]
    thr = 3e4  # per year: many weak decisions as well as the burst
    ref_trig = trigger(24)
    arrs = hit_arrays(counts, live, BASE)

    # one call over a store that holds everything (plus empty bins before the data)
    big = BinStore(24, bin_ns=BIN_NS, capacity=2 * n_bins)
    for blk in cut_blocks(arrs, np.array([BASE, BASE + n_bins]) * BIN_NS):
        big.add(blk)
    ref = ref_trig.process(big, BASE + n_bins, far_threshold_per_year=thr)
    assert len(ref) > 20

    # the same store, process called at random growing done bins
    rng = np.random.default_rng(45)
    trig = trigger(24)
    got: list[Candidate] = []
    done = BASE
    while done < BASE + n_bins:
        done = min(BASE + n_bins, done + int(rng.integers(1, 700)))
        got += trig.process(big, done, far_threshold_per_year=thr)
    assert got == ref

    # a ring just big enough, filled block by block (cuts at any ns), as the engine runs
    trig = trigger(24)
    max_block_s = 40
    ring = BinStore(24, bin_ns=BIN_NS, capacity=trig.required_capacity_bins + max_block_s + 1)
    steps = rng.integers(1, max_block_s * BIN_NS, 2 * n_bins // max_block_s + 10)
    edges = BASE * BIN_NS + np.concatenate([[0], np.cumsum(steps)])
    edges = np.append(edges[edges < (BASE + n_bins) * BIN_NS], (BASE + n_bins) * BIN_NS)
    got = []
    for blk in cut_blocks(arrs, edges):
        ring.add(blk)
        got += trig.process(ring, blk.t_end // BIN_NS, far_threshold_per_year=thr)
    assert [_key(c) for c in got] == [_key(c) for c in ref]
    assert got == ref  # bit-identical p-values and FARs
    assert trig.skipped_windows == 0
    # nothing is evaluated twice
    assert trig.process(ring, BASE + n_bins, far_threshold_per_year=thr) == []
