"""The compiled screen of the front search changes no result (engine/front_bound.py).

The screen drops seeds whose lower bound on the front p-value is above ``p_max``;
the numpy search alone decides for the others. Checked here by running the same
seeds with and without the screen, on an invented dense array with a high hit rate
(several neighbour hits per seed, so many triples and mirror solutions per seed),
injected plane fronts, and thresholds placed at quantiles of the seeds' own
p-values, so that many seeds sit right at the threshold. With dead-time gaps cut
into some sites as well (the screen uses full slot widths, the search live ones).
"""

from __future__ import annotations

import numpy as np
import pytest

from tocsin.engine import front
from tocsin.engine.block import Block
from tocsin.engine.coincidence import SeedResult
from tocsin.engine.exposure import BinStore
from tocsin.engine.front import FrontSearch
from tocsin.engine.livetime import LiveClock, LiveIntervals
from tocsin.model.config import CoincidenceConfig
from tocsin.model.registry import Site, SiteRegistry
from tocsin.types import C_M_PER_NS, NS_PER_S

T0 = 1_450_000_080 * NS_PER_S
"""An arbitrary GPS time (ns)."""
SPAN_NS = 100_000_000
"""Length of the generated stream (ns): 100 ms."""


def dense_array(n: int = 30, seed: int = 11) -> SiteRegistry:
    """``n`` GPS-timed sites over ~10 km x 10 km of an invented plain."""
    rng = np.random.default_rng(seed)
    lat0, lon0 = 38.70, -104.10
    return SiteRegistry(
        [
            Site(
                id=f"llano-{k:02d}",
                lat_deg=lat0 + float(rng.uniform(-0.045, 0.045)),
                lon_deg=lon0 + float(rng.uniform(-0.058, 0.058)),
                height_m=1600.0 + float(rng.uniform(-30, 30)),
                clock_sigma_ns=float(rng.uniform(10, 50)),
                kind="scintillator",
            )
            for k in range(n)
        ]
    )


def stream(reg: SiteRegistry, seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """Time-sorted hits: 2 kHz of Poisson background per site and 30 plane fronts
    from random directions above the array, each seen by a random half of the sites
    with their clock jitter."""
    rng = np.random.default_rng(seed)
    n = len(reg)
    n_bg = rng.poisson(2000.0 * SPAN_NS / NS_PER_S * n)
    t = [T0 + rng.integers(0, SPAN_NS, n_bg)]
    s = [rng.integers(0, n, n_bg)]
    up = reg.ecef_m.mean(axis=0)
    up /= np.linalg.norm(up)
    for _ in range(30):
        v = rng.normal(size=3)
        v -= (v @ up) * up
        v /= np.linalg.norm(v)
        zen = np.radians(rng.uniform(0, 60))
        n_src = np.cos(zen) * up + np.sin(zen) * v
        delay = -(reg.ecef_m @ n_src) / C_M_PER_NS
        sites = rng.choice(n, n // 2, replace=False)
        jitter = rng.normal(0.0, reg.clock_sigma_ns[sites])
        t0 = T0 + int(rng.integers(1_000_000, SPAN_NS - 1_000_000))
        t.append(t0 + np.round(delay[sites] - delay.min() + jitter).astype(np.int64))
        s.append(sites)
    tt = np.concatenate(t)
    ss = np.concatenate(s).astype(np.int32)
    order = np.argsort(tt, kind="stable")
    return tt[order], ss[order]


def gappy_clock(n: int, seed: int = 5) -> LiveClock:
    """Every third site dead for 30 us out of every 400 us; the others live throughout."""
    rng = np.random.default_rng(seed)
    site_l, start_l, end_l = [], [], []
    for k in range(n):
        if k % 3:
            site_l.append(k)
            start_l.append(T0 - NS_PER_S)
            end_l.append(T0 + 2 * NS_PER_S)
            continue
        edge = T0 - NS_PER_S
        for g in range(T0 + int(rng.integers(0, 400_000)), T0 + SPAN_NS + 400_000, 400_000):
            site_l.append(k)
            start_l.append(edge)
            end_l.append(g)
            edge = g + 30_000
        site_l.append(k)
        start_l.append(edge)
        end_l.append(T0 + 2 * NS_PER_S)
    site = np.asarray(site_l, dtype=np.int32)
    start = np.asarray(start_l, dtype=np.int64)
    end = np.asarray(end_l, dtype=np.int64)
    z = np.zeros(0, dtype=np.int64)
    store = BinStore(n, bin_ns=NS_PER_S, capacity=8)
    store.add(Block(T0 - NS_PER_S, T0 + 2 * NS_PER_S, z, z.astype(np.int32), site, start, end))
    iv = LiveIntervals(n)
    iv.add(site, start, end)
    return LiveClock(store, iv)


def as_tuples(res: list[SeedResult]) -> list[tuple[list[int], ...]]:
    """Every field of every scale's result, as plain lists (exact comparison)."""
    return [
        (
            [r.scale_index],
            r.seed_idx.tolist(),
            r.p.tolist(),
            r.multiplicity.tolist(),
            r.nb_seed.tolist(),
            r.nb_idx.tolist(),
        )
        for r in res
    ]


@pytest.mark.parametrize("dead_time", [False, True], ids=["live", "gaps"])
def test_screened_search_equals_the_full_search(
    dead_time: bool, monkeypatch: pytest.MonkeyPatch
) -> None:
    reg = dense_array()
    fs = FrontSearch(reg, CoincidenceConfig())
    t, site = stream(reg)
    rates = np.full(len(reg), 2000.0 / NS_PER_S)
    clock = gappy_clock(len(reg)) if dead_time else None
    if clock is not None:  # the gaps really cut into the searched slots
        assert clock.partial_sites(int(t[0]), int(t[-1])).sum() == len(reg) // 3

    searched: list[int] = []
    real = front.FrontSearch._evaluate_seeds

    def counting(self: FrontSearch, cand: np.ndarray, *args: object) -> list[SeedResult]:
        searched.append(int(cand.size))
        return real(self, cand, *args)  # type: ignore[arg-type]

    monkeypatch.setattr(front.FrontSearch, "_evaluate_seeds", counting)

    def run(screen: bool, p_max: float) -> tuple[list[tuple[list[int], ...]], int]:
        fs.screen = screen
        searched.clear()
        res = fs.evaluate(t, site, 0, t.size, rates, p_max=p_max, clock=clock)
        return as_tuples(res), sum(searched)

    everything, n_all = run(False, 1.0)
    p_all = np.concatenate([np.asarray(r[2]) for r in everything])
    assert p_all.size > 1000  # many seeds make a front at some scale
    assert p_all.min() < 1e-12  # the injected fronts
    for q in (0.5, 0.05, 0.002):
        p_max = float(np.quantile(p_all, q))
        full, n_full = run(False, p_max)
        screened, n_screened = run(True, p_max)
        assert screened == full, q
        assert sum(len(r[1]) for r in full) > 0
        # the screen did its job: far fewer seeds reached the numpy search
        if q < 0.1:
            assert n_screened < 0.5 * n_full, (q, n_screened, n_full)
    assert n_all == n_full  # without the screen every candidate seed is searched


def test_rows_skipped_against_the_limit_change_no_reported_bound() -> None:
    """The kernel skips a row whose cheap lower bound shows it can get below neither
    ``limit`` nor the rows already seen. Reported bounds must be those of the full
    pass, cut at ``limit`` (``inf`` above it): checked at limits placed at quantiles
    of the seeds' own bounds, so that many seeds sit near each limit."""
    from tocsin.engine.front_bound import front_lower_bounds

    reg = dense_array()
    search = FrontSearch(reg, CoincidenceConfig())
    t, s = stream(reg)
    s64 = s.astype(np.int64)
    wide = int(search.widest.max())
    seeds = np.arange(t.size)

    def bounds(limit: float) -> np.ndarray:
        out: np.ndarray = front_lower_bounds(
            t,
            s64,
            t[seeds],
            s64[seeds],
            search.back_ns,
            search.ahead_ns[wide],
            front.K_MAX,
            wide,
            search._geo,
            limit,
        )
        return out

    full = bounds(np.inf)
    finite = full[np.isfinite(full)]
    assert finite.size > 500  # many seeds have rows
    for q in (0.001, 0.05, 0.5, 0.95):
        limit = float(np.quantile(finite, q))
        want = np.where(full <= limit, full, np.inf)
        assert np.array_equal(bounds(limit), want), q


# Clock sigmas (ns) of site pairs whose slot edge -ceil(3 sqrt(a^2 + b^2)) the table
# holds as an integer computed one way (numpy: 3 * sqrt(a^2 + b^2) = 72.0) while the
# kernel's own way (sqrt((3a)^2 + (3b)^2) = 72.00000000000001) rounds past it: the
# kernel must read these edges from the table. Found by a search over random pairs.
EDGE_PAIRS = [
    (16.78161797807326, 17.15742690609546),
    (16.164961528930114, 31.418759733838222),
    (27.653269596422295, 18.008239242846216),
]


def test_slot_edges_computed_in_the_kernel_equal_the_pair_table() -> None:
    """The screen computes each neighbour's slot edges from the positions and clocks
    instead of reading the 8 MB pair table (a cache miss per hit). Its bounds must be
    those it gives reading every edge from the table, on a network with pairs whose
    edges lie on an integer (where the computed ceiling would be one too high)."""
    from tocsin.engine.front_bound import front_lower_bounds

    base = dense_array()
    sigmas = [x for pair in EDGE_PAIRS for x in pair]
    reg = SiteRegistry(
        [
            s.model_copy(update={"clock_sigma_ns": sigmas[k]}) if k < len(sigmas) else s
            for k, s in enumerate(base)
        ]
    )
    cfg = CoincidenceConfig()
    k_sig = cfg.clock_sigmas
    for a, b in EDGE_PAIRS:  # the pairs really are on the edge
        table_way = k_sig * float(np.sqrt(np.float64(a) ** 2 + np.float64(b) ** 2))
        kernel_way = float(np.sqrt((k_sig * a) ** 2 + (k_sig * b) ** 2))
        assert np.ceil(table_way) != np.ceil(kernel_way)
    search = FrontSearch(reg, cfg)
    t, s = stream(reg)
    s64 = s.astype(np.int64)
    wide = int(search.widest.max())
    geo = search._geo

    def bounds(g: front.FrontGeometry, from_table: bool) -> np.ndarray:
        out: np.ndarray = front_lower_bounds(
            t,
            s64,
            t,
            s64,
            search.back_ns,
            search.ahead_ns[wide],
            front.K_MAX,
            wide,
            g,
            np.inf,
            from_table,
        )
        return out

    computed = bounds(geo, False)
    assert np.isfinite(computed).sum() > 500
    assert np.array_equal(computed, bounds(geo, True))
