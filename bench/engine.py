"""Engine speed benchmark: how many hits per second the trigger engine gets through.

Acceptance point (quoted from the issue):

    "`bench/engine.py` prints replay throughput (hits/s) on a 1000-site, 10 Hz-per-site
    network beside (a) the time numpy takes only to sort the same hits (the floor) and
    (b) a plain per-hit Python version of the same coincidence count on a slice.
    Targets: within 5x of the floor and at least 1 million hits/s on one core of this
    machine. It is a benchmark, not a test; quote its output."

This is a benchmark, not a test: it measures and prints, it asserts nothing about
speed. Machines here are noisy, so every ratio is measured side by side in one run
(same process, same data). Single process; numpy may use its own threads.

What it does:

* builds a fictional registry of ``--sites`` GPS-timed sites (clock sigma 10-50 ns):
  ``array`` is a dense ground array on a jittered grid over ~50 km x 50 km of an
  invented high plateau; ``continental`` spreads the same number of sites over a
  continent-sized box (far heavier for the geometry-aware search);
* draws independent Poisson hits (``--rate`` Hz per site) with numpy, cut into engine
  :class:`~tocsin.engine.block.Block` s of ``--block-s`` seconds with full live time;
* warms the engine on ``--warmup`` seconds (untimed), then times the next ``--seconds``
  seconds and checks that seeds really were evaluated. Coincidences are evaluated from
  the first 60 s rate epoch after the first data on (``Engine._coincidences``,
  ``first_ok_bin``; the data start on an epoch boundary), so 60 s of warm-up is enough,
  and a timed minute then holds one rate-table build per minute of data, as in steady
  state (``--warmup 120`` gives the same figure and adds a minute to the run);
* measures, in the same run: (1) ``Engine.process`` over the timed blocks (one thread;
  (1b) again with the engine's default threads, when the machine has more than one
  core: not a one-core figure, so not held to the targets); (1c - 1g) the same timed
  data through another warmed engine with its phases timed one by one ('sites'
  counts, front search, rate tables, excess tests, the rest); (2) the
  replay path as ``tocsin replay`` runs it (``Pipeline.feed``: lines read in chunks by
  the compiled line reader and offered in runs, after ``gc.freeze()``) over the same
  data encoded as one JSON batch per site per second, (2a) the reading of those
  lines alone (``scan_block``) and (2b), for comparison, a general JSON parser
  over them (``orjson.loads``, nothing checked or kept); (3) the floor, ``np.sort``
  of the same int64 hit times in arrival order; (4) a plain per-hit Python count of
  distinct sites in their forward slots at the smallest scale on a slice, against the engine's
  ``CoincidenceTrigger.evaluate`` on the same slice (with ``p_max = 1``, so every
  seed also gets its pairs and p-value) and against the compiled count alone
  (``slot_counts``), and whether all three give the same multiplicity for every seed.

Run: ``.venv/bin/python bench/engine.py [--sites 1000] [--rate 10] [--seconds 60]
[--layout array|continental] [--no-front] [--profile 25]`` (``--no-front``: the
engine without the plane-front search, to see what it costs).
"""

from __future__ import annotations

import argparse
import cProfile
import gc
import io
import math
import os
import platform
import pstats
import sys
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import orjson

from tocsin.engine.block import Block
from tocsin.engine.coincidence import CoincidenceTrigger, previous_same_site
from tocsin.engine.core import RATE_UPDATE_S, Engine, default_threads
from tocsin.engine.slot_counts import slot_counts
from tocsin.io.line_scan import scan_block
from tocsin.io.recording import join_lines
from tocsin.model.config import EngineConfig
from tocsin.model.registry import Site, SiteRegistry
from tocsin.pipeline import REPLAY_BLOCK_S, Pipeline
from tocsin.types import C_M_PER_NS, NS_PER_S, I32Array, I64Array

T0_S = 1_450_000_080
"""Start of the generated data (GPS s, December 2025): a multiple of 240 s, so both the
engine's 60 s rate epochs and replay's 16 s blocks start on it."""
ARRAY_CENTRE = (-23.45, -67.30, 4150.0)
"""Invented high plateau for the dense array: lat (deg), lon (deg), height (m)."""
ARRAY_SIDE_KM = 50.0
CONTINENT_BOX = (36.0, 60.0, -10.0, 30.0)
"""lat_min, lat_max, lon_min, lon_max (deg) of the continental layout."""
KM_PER_DEG = 111.32
"""Length of one degree of latitude (km), good to ~0.5 % for placing invented sites."""
SLICE_HITS = 20_000
TARGET_HITS_PER_S = 1.0e6
TARGET_FLOOR_RATIO = 5.0
MAX_RECV_DELAY_S = 0.2
"""Batches arrive up to this long (s) after their live interval ends."""


# --------------------------------------------------------------------------- network


def build_registry(n_sites: int, layout: str, rng: np.random.Generator) -> SiteRegistry:
    """A fictional registry of ``n_sites`` GPS-timed sites (clock sigma 10-50 ns)."""
    if layout == "array":
        side = math.ceil(math.sqrt(n_sites))
        step_km = ARRAY_SIDE_KM / side
        gx, gy = np.meshgrid(np.arange(side), np.arange(side))
        x_km = (gx.ravel()[:n_sites] + 0.5 + rng.uniform(-0.3, 0.3, n_sites)) * step_km
        y_km = (gy.ravel()[:n_sites] + 0.5 + rng.uniform(-0.3, 0.3, n_sites)) * step_km
        lat0, lon0, h0 = ARRAY_CENTRE
        lat = lat0 + (y_km - ARRAY_SIDE_KM / 2) / KM_PER_DEG
        lon = lon0 + (x_km - ARRAY_SIDE_KM / 2) / (KM_PER_DEG * math.cos(math.radians(lat0)))
        height = h0 + rng.uniform(-40.0, 40.0, n_sites)
        prefix, kind = "ventisca", "scintillator"
    elif layout == "continental":
        lat_min, lat_max, lon_min, lon_max = CONTINENT_BOX
        # uniform in area: uniform in sin(latitude)
        s = rng.uniform(math.sin(math.radians(lat_min)), math.sin(math.radians(lat_max)), n_sites)
        lat = np.degrees(np.arcsin(s))
        lon = rng.uniform(lon_min, lon_max, n_sites)
        height = rng.uniform(0.0, 1500.0, n_sites)
        prefix, kind = "farfield", "scintillator"
    else:
        raise ValueError(f"layout {layout!r} is not one of 'array', 'continental'")
    sigma = rng.uniform(10.0, 50.0, n_sites)
    return SiteRegistry(
        [
            Site(
                id=f"{prefix}-{k:04d}",
                lat_deg=float(lat[k]),
                lon_deg=float(lon[k]),
                height_m=float(height[k]),
                clock_sigma_ns=float(sigma[k]),
                kind=kind,
            )
            for k in range(n_sites)
        ]
    )


# --------------------------------------------------------------------------- data


@dataclass(frozen=True, slots=True)
class Second:
    """One second of data, per site in arrival order (each site's hits sorted)."""

    start_ns: int
    site_order: I64Array
    """Site indices in arrival order."""
    counts: I64Array
    """Hits per site, in ``site_order`` order."""
    t: I64Array
    """Hit times (GPS ns), site by site in ``site_order`` order, sorted within a site."""
    recv_ns: I64Array
    """Arrival time of each site's batch, in ``site_order`` order."""


def draw_second(start_ns: int, n_sites: int, rate_hz: float, rng: np.random.Generator) -> Second:
    """Independent Poisson hits of every site over ``[start_ns, start_ns + 1 s)``."""
    delay = rng.uniform(0.0, MAX_RECV_DELAY_S, n_sites)
    order = np.argsort(delay, kind="stable").astype(np.int64)
    counts = rng.poisson(rate_hz, n_sites).astype(np.int64)[order]
    total = int(counts.sum())
    t = start_ns + rng.integers(0, NS_PER_S, total, dtype=np.int64)
    owner = np.repeat(np.arange(n_sites), counts)
    t = t[np.lexsort((t, owner))]  # sorted within each site's batch
    recv = start_ns + NS_PER_S + np.round(delay[order] * NS_PER_S).astype(np.int64)
    return Second(start_ns, order, counts, t, recv)


def site_column(sec: Second) -> I32Array:
    """Site index of every hit of ``sec`` (same order as ``sec.t``)."""
    return np.repeat(sec.site_order, sec.counts).astype(np.int32)


def make_blocks(seconds: list[Second], block_s: int, n_sites: int) -> list[Block]:
    """Cut consecutive seconds into engine blocks of ``block_s`` s (the last may be shorter),
    hits sorted by time, every site live for the whole block."""
    blocks: list[Block] = []
    live_site = np.arange(n_sites, dtype=np.int32)
    for k in range(0, len(seconds), block_s):
        part = seconds[k : k + block_s]
        t = np.concatenate([s.t for s in part])
        site = np.concatenate([site_column(s) for s in part])
        order = np.argsort(t, kind="stable")
        t0, t1 = part[0].start_ns, part[-1].start_ns + NS_PER_S
        blocks.append(
            Block(
                t0,
                t1,
                t[order],
                site[order],
                live_site,
                np.full(n_sites, t0, dtype=np.int64),
                np.full(n_sites, t1, dtype=np.int64),
            )
        )
    return blocks


def encode_lines(seconds: list[Second], ids: tuple[str, ...], seq0: int) -> list[bytes]:
    """One JSON batch (contract v1, with ``recv_ns``) per site per second, in arrival order."""
    lines: list[bytes] = []
    for k, sec in enumerate(seconds):
        edges = np.concatenate([[0], np.cumsum(sec.counts)])
        t_list = sec.t.tolist()
        end = sec.start_ns + NS_PER_S
        for j, s in enumerate(sec.site_order.tolist()):
            obj = {
                "v": 1,
                "site": ids[s],
                "seq": seq0 + k,
                "live": [sec.start_ns, end],
                "t": t_list[edges[j] : edges[j + 1]],
                "recv_ns": int(sec.recv_ns[j]),
            }
            lines.append(orjson.dumps(obj))
    return lines


# --------------------------------------------------------------------------- plain reference


def plain_multiplicity(
    t: list[int],
    site: list[int],
    seeds: range,
    *,
    ecef: list[tuple[float, float, float]],
    sigma: list[float],
    clock_sigmas: float,
    window_ns: int,
    back_ns: int,
    ahead_ns: int,
) -> dict[int, int]:
    """Per-hit Python loop: for each seed, 1 + the number of distinct other sites with a
    hit in their forward slot ``[-ceil(k sigma_sj), ceil(d_sj / c + k sigma_sj) + W]``
    (ns from the seed; same formula as ``SlotGeometry``). ``back_ns``/``ahead_ns`` only
    bound the loops (the widest slot edges). Returns {seed index: multiplicity}."""
    out: dict[int, int] = {}
    n = len(t)
    for i in seeds:
        ti, si = t[i], site[i]
        ri, sgi = ecef[si], sigma[si]
        seen: set[int] = set()
        j = i - 1
        while j >= 0 and ti - t[j] <= back_ns:
            j -= 1
        j += 1
        while j < n and t[j] - ti <= ahead_ns:
            sj = site[j]
            if j != i and sj != si and sj not in seen:
                comb = math.hypot(sgi, sigma[sj])
                d = t[j] - ti
                lo = -math.ceil(clock_sigmas * comb)
                hi = math.ceil(math.dist(ri, ecef[sj]) / C_M_PER_NS + clock_sigmas * comb)
                if lo <= d <= hi + window_ns:
                    seen.add(sj)
            j += 1
        out[i] = 1 + len(seen)
    return out


# --------------------------------------------------------------------------- timing


def best_of(fn: Callable[[], object], repeats: int) -> float:
    """Shortest wall time (s) of ``repeats`` calls."""
    best = math.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def run_engine(engine: Engine, blocks: list[Block]) -> int:
    """Feed blocks; return the number of candidates produced."""
    n = 0
    for b in blocks:
        n += len(engine.process(b))
    return n


PHASES = (
    ("_eval_sites", "'sites' counts, all scales"),
    ("_eval_front", "front search"),
    ("_tables_for_bin", "rate tables (per site)"),
    ("_excesses", "excess tests (per site)"),
)
"""Engine methods timed one by one (:func:`time_phases`), and what each does."""


def time_phases(engine: Engine, blocks: list[Block]) -> dict[str, float]:
    """Feed ``blocks`` to ``engine`` with each of :data:`PHASES` wrapped in a timer;
    return the seconds spent in each, and under ``"total"`` the whole run. The
    methods are looked up on the instance when called, so wrapping them there times
    every call (a few hundred per minute of data: the timers cost microseconds)."""
    spent = dict.fromkeys([name for name, _ in PHASES], 0.0)

    def timed(name: str, fn: Callable[..., object]) -> Callable[..., object]:
        def call(*args: object, **kwargs: object) -> object:
            t0 = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                spent[name] += time.perf_counter() - t0

        return call

    for name, _ in PHASES:
        setattr(engine, name, timed(name, getattr(engine, name)))
    t0 = time.perf_counter()
    run_engine(engine, blocks)
    spent["total"] = time.perf_counter() - t0
    for name, _ in PHASES:
        delattr(engine, name)
    return spent


def run_replay(pipe: Pipeline, lines: list[bytes]) -> float:
    """``tocsin replay``'s loop without the file: freeze what exists out of the garbage
    collector's passes (again: the lines are new) and feed the lines in blocks, as
    read from a file (``Pipeline.feed``), then flush. Returns the time (s) the
    end-of-input flush took: the engine then judges the data still pending and
    closes every window that reaches the end of the data."""
    gc.freeze()
    for _ in pipe.feed(join_lines(lines)):
        pass
    t0 = time.perf_counter()
    pipe.finish()
    return time.perf_counter() - t0


def decode_all(lines: list[bytes], registry: SiteRegistry) -> None:
    """Read every line as replay does (``scan_block``, block by block); drop the result."""
    for data, first in join_lines(lines):
        scan_block(data, registry, first)


def parse_only(lines: list[bytes]) -> None:
    """Parse every line as JSON and drop the result."""
    loads = orjson.loads
    for x in lines:
        loads(x)


@dataclass(frozen=True, slots=True)
class Row:
    label: str
    hits: int
    seconds: float

    @property
    def rate(self) -> float:
        return self.hits / self.seconds if self.seconds > 0 else math.inf


def table(rows: list[Row], floor: Row) -> str:
    head = f"{'measurement':<44} {'hits':>9} {'seconds':>9} {'hits/s':>13} {'x floor':>9}"
    out = [head, "-" * len(head)]
    for r in rows:
        ratio = floor.rate / r.rate
        out.append(f"{r.label:<44} {r.hits:>9,} {r.seconds:>9.4f} {r.rate:>13,.0f} {ratio:>9.1f}")
    return "\n".join(out)


def verdict(ok: bool) -> str:
    return "PASS" if ok else "MISS"


def show_hist(h: Counter[int]) -> str:
    """A multiplicity histogram, in full when short, else summarised."""
    if len(h) <= 12:
        return str(dict(sorted(h.items())))
    total = sum(h.values())
    mean = sum(k * v for k, v in h.items()) / max(total, 1)
    return f"{{{len(h)} values, {min(h)}..{max(h)}, mean {mean:.2f}, {total} seeds}}"


def epochs_begun(warmup_s: int, seconds: int) -> int:
    """Rate epochs (one rate-table build each) first used in the timed part: epoch
    boundaries every ``RATE_UPDATE_S`` from the data start, the first one used at
    ``RATE_UPDATE_S`` (the data start on an epoch boundary)."""
    step = round(RATE_UPDATE_S)
    first = max(warmup_s, step)
    return max(0, len(range(-(-first // step) * step, warmup_s + seconds, step)))


# --------------------------------------------------------------------------- main


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0])
    p.add_argument("--sites", type=int, default=1000, help="number of sites (default 1000)")
    p.add_argument("--rate", type=float, default=10.0, help="hit rate per site, Hz (default 10)")
    p.add_argument("--seconds", type=int, default=60, help="timed span of data, s (default 60)")
    p.add_argument("--warmup", type=int, default=60, help="untimed warm-up data, s (default 60)")
    p.add_argument("--layout", choices=("array", "continental"), default="array")
    p.add_argument(
        "--block-s",
        type=int,
        default=round(REPLAY_BLOCK_S),
        help=f"engine block length, s (default {round(REPLAY_BLOCK_S)}, as replay uses)",
    )
    p.add_argument("--slice", type=int, default=SLICE_HITS, help="hits in the plain-Python slice")
    p.add_argument("--seed", type=int, default=20260101, help="random seed")
    p.add_argument("--no-replay", action="store_true", help="skip the end-to-end replay figure")
    p.add_argument(
        "--no-front",
        action="store_true",
        help="leave the plane-front search out of the engine (front_scales_s = []), to see "
        "what it costs; not the product's default",
    )
    p.add_argument(
        "--profile",
        type=int,
        default=0,
        metavar="N",
        help="also profile the timed engine run (cProfile) and print the top N functions",
    )
    a = p.parse_args(argv)
    for name in ("sites", "seconds", "warmup", "block_s", "slice"):
        if getattr(a, name) <= 0:
            p.error(f"--{name.replace('_', '-')} {getattr(a, name)} must be positive")
    if not a.rate > 0:
        p.error(f"--rate {a.rate!r} must be positive")
    return a


def main(argv: list[str] | None = None) -> int:
    a = parse_args(argv)
    rng = np.random.default_rng(a.seed)
    cfg = EngineConfig()
    if a.no_front:
        cfg = cfg.model_copy(
            update={"coincidence": cfg.coincidence.model_copy(update={"front_scales_s": []})}
        )
    print("Tocsin engine benchmark (a benchmark, not a test)")
    print(
        f"python {platform.python_version()}, numpy {np.__version__}, "
        f"{os.cpu_count()} CPUs, {platform.processor() or platform.machine()}; "
        "single process (numpy's own threads not limited)"
    )
    t_setup = time.perf_counter()
    registry = build_registry(a.sites, a.layout, rng)
    n = len(registry)
    geom = CoincidenceTrigger(registry, cfg.coincidence).geom
    print(
        f"network: {n} fictional sites, layout {a.layout}, {a.rate:g} Hz each, clock sigma "
        f"{registry.clock_sigma_ns.min():.0f}-{registry.clock_sigma_ns.max():.0f} ns, "
        f"longest pair slot at the smallest scale {geom.ahead_ns[0] / 1e3:,.1f} us"
    )
    print(
        f"engine config: {'defaults without the front search' if a.no_front else 'defaults'} "
        f"(scales {cfg.coincidence.scales_s} s, "
        f"front scales {cfg.coincidence.front_scales_s} s, excess {cfg.excess.scales_s} s)"
    )

    # ---- data -----------------------------------------------------------------
    total_s = a.warmup + a.seconds
    secs = [draw_second((T0_S + k) * NS_PER_S, n, a.rate, rng) for k in range(total_s)]
    warm, timed = secs[: a.warmup], secs[a.warmup :]
    warm_blocks = make_blocks(warm, a.block_s, n)
    timed_blocks = make_blocks(timed, a.block_s, n)
    n_timed = sum(b.n_hits for b in timed_blocks)
    n_warm = sum(b.n_hits for b in warm_blocks)
    print(
        f"data: {a.warmup} s warm-up ({n_warm:,} hits, untimed) + {a.seconds} s timed "
        f"({n_timed:,} hits), engine blocks of {a.block_s} s, full live time"
    )

    # ---- warm-up ----------------------------------------------------------------
    # Every measured engine is built and warmed on the same data (not copied: a copy
    # rebuilds the geometry without the caches a running engine keeps).
    t_w = time.perf_counter()
    engine = Engine(registry, cfg)
    run_engine(engine, warm_blocks)
    t_w = time.perf_counter() - t_w

    def warmed() -> Engine:
        e = Engine(registry, cfg)
        run_engine(e, warm_blocks)
        return e

    replay_engine = None if a.no_replay else warmed()
    phase_engine = warmed()
    profile_engine = warmed() if a.profile else None
    n_threads = default_threads()
    threaded_engine = None
    if n_threads > 1:
        threaded_engine = warmed()
        threaded_engine.threads = n_threads
    print(f"setup {time.perf_counter() - t_setup - t_w:.1f} s, warm-up {t_w:.1f} s (untimed)")

    # What exists now (modules, registry, tables, data) lives to the end: out of the
    # garbage collector's full passes for every row, as ``tocsin replay`` does.
    gc.freeze()

    # ---- 1. engine ----------------------------------------------------------------
    seeds_before = engine.counters.seeds_evaluated
    skipped_before = engine.counters.seeds_skipped
    t_e = time.perf_counter()
    n_cand = run_engine(engine, timed_blocks)
    t_e = time.perf_counter() - t_e
    seeds = engine.counters.seeds_evaluated - seeds_before
    skipped = engine.counters.seeds_skipped - skipped_before
    n_eval = len(cfg.coincidence.scales_s) + (1 if cfg.coincidence.front_scales_s else 0)
    print(
        f"engine: {seeds:,} seed evaluations in the timed part "
        f"({seeds / max(n_timed, 1):.2f} per timed hit over {n_eval} evaluators: "
        f"{len(cfg.coincidence.scales_s)} 'sites' scales + 'front'), {skipped} skipped, "
        f"{n_cand} candidates; "
        f"{a.seconds} s of data took {t_e:.1f} s ({a.seconds / t_e:.2f}x real time)"
    )
    n_epochs = epochs_begun(a.warmup, a.seconds)
    print(
        f"the timed part begins {n_epochs} rate epoch(s) (one rate-table build each; steady "
        f"state: one per {RATE_UPDATE_S:g} s of data, i.e. {a.seconds / RATE_UPDATE_S:.2f} here)"
    )
    meaningful = seeds >= n_timed
    if not meaningful:
        print("WARNING: the engine evaluated fewer seeds than timed hits: figure meaningless")
    rows = [Row("1. Engine.process (all triggers)", n_timed, t_e)]
    if threaded_engine is not None:
        t_th = time.perf_counter()
        run_engine(threaded_engine, timed_blocks)
        t_th = time.perf_counter() - t_th
        rows.append(Row(f"1b. Engine.process, {n_threads} threads", n_timed, t_th))

    # ---- 1c-1g. where the engine's time goes ---------------------------------------
    # A separate warmed engine, one thread, each phase timed on its own. The rate
    # tables and the excess tests cost per site and per minute of data rather than
    # per hit; the coincidence searches cost per hit.
    spent = time_phases(phase_engine, timed_blocks)
    letters = "cdef"
    for (name, what), letter in zip(PHASES, letters, strict=True):
        if name == "_eval_front" and a.no_front:
            continue
        rows.append(Row(f"1{letter}. of 1: {what}", n_timed, spent[name]))
    rest = spent["total"] - sum(spent[name] for name, _ in PHASES)
    rows.append(Row("1g. of 1: the rest (store, merge)", n_timed, rest))

    # ---- 2. replay path ---------------------------------------------------------
    json_row: Row | None = None
    if replay_engine is not None:
        lines = encode_lines(timed, registry.ids, seq0=a.warmup)
        pipe = Pipeline(registry, cfg, release_every_s=REPLAY_BLOCK_S)
        pipe.engine = replay_engine  # warmed state; the orderer starts at the timed data
        seeds_before = replay_engine.counters.seeds_evaluated
        t_r = time.perf_counter()
        t_fin = run_replay(pipe, lines)
        t_r = time.perf_counter() - t_r
        t_dec = best_of(lambda: decode_all(lines, registry), 3)  # as in the replay (frozen)
        c = pipe.counters
        print(
            f"replay: {len(lines):,} JSON lines ({sum(map(len, lines)) / 1e6:.1f} MB), "
            f"{c.accepted:,} accepted, {c.hits_accepted:,} hits, rejected {dict(c.rejected)}, "
            f"{replay_engine.counters.seeds_evaluated - seeds_before:,} seed evaluations; "
            f"scan_block alone {t_dec:.2f} s ({100 * t_dec / t_r:.0f} % of the replay time; "
            f"JSON decoding and validation "
            f"{'dominate' if 2 * t_dec > t_r else 'do not dominate'}); "
            f"the end-of-input flush {t_fin:.2f} s of it ({100 * t_fin / t_r:.0f} %: the data "
            f"still pending and the windows that reach the end of the data)"
        )
        rows.append(Row("2. replay: Pipeline.feed (read + offer)", c.hits_accepted, t_r))
        rows.append(Row("2a. part of 2: scan_block (read + check)", c.hits_accepted, t_dec))
        # For comparison, a general JSON parser over the same lines (the recording is
        # JSON lines, CONTRACT.md 4): the parse alone, nothing checked, nothing built,
        # nothing kept (a list of every parsed line would add the garbage collector's
        # passes over it). Replay reads plain lines without it (tocsin.io.line_scan).
        t_json = best_of(lambda: parse_only(lines), 3)
        json_row = Row("2b. for comparison: orjson.loads alone", c.hits_accepted, t_json)
        rows.append(json_row)

    # ---- 3. floor ---------------------------------------------------------------
    arrival = np.concatenate([s.t for s in timed])  # as the ordering stage receives them
    t_sort = best_of(lambda: np.sort(arrival), 5)
    floor = Row("3. floor: np.sort, hits in arrival order", arrival.size, t_sort)
    t_arg = best_of(lambda: np.argsort(arrival, kind="stable"), 5)
    rows.append(floor)
    rows.append(Row("   np.argsort(kind=stable), as the orderer", arrival.size, t_arg))

    # ---- 4. plain Python vs vectorised, one scale, on a slice ----------------------
    t_all = np.concatenate([b.t for b in timed_blocks])
    s_all = np.concatenate([b.site for b in timed_blocks])
    n_slice = min(a.slice, t_all.size)
    w_s = min(cfg.coincidence.scales_s)
    one = CoincidenceTrigger(registry, cfg.coincidence.model_copy(update={"scales_s": [w_s]}))
    # Both get the same stream: the slice's seeds and every hit within their slots
    # (the engine, too, only holds a short buffer behind its seeds).
    end = int(np.searchsorted(t_all, t_all[n_slice - 1] + one.geom.ahead_ns[0], side="right"))
    t_all, s_all = t_all[:end], s_all[:end]
    tab = one.tables(np.full(n, a.rate), np.ones(n), np.ones(n, dtype=bool))
    active = tab.scales[0].active
    res_box: list[object] = []

    def vectorised() -> None:
        res_box.append(one.evaluate(t_all, s_all, 0, n_slice, tab, 0, p_max=1.0))

    t_vec = best_of(vectorised, 3)
    t_list, s_list = t_all.tolist(), s_all.tolist()
    ecef = [(float(x), float(y), float(z)) for x, y, z in registry.ecef_m]
    sig = registry.clock_sigma_ns.tolist()
    plain_box: list[dict[int, int]] = []

    def plain() -> None:
        plain_box.append(
            plain_multiplicity(
                t_list,
                s_list,
                range(n_slice),
                ecef=ecef,
                sigma=sig,
                clock_sigmas=cfg.coincidence.clock_sigmas,
                window_ns=round(w_s * NS_PER_S),
                back_ns=one.geom.back_ns,
                ahead_ns=one.geom.ahead_ns[0],
            )
        )

    t_plain = best_of(plain, 1)
    res = one.evaluate(t_all, s_all, 0, n_slice, tab, 0, p_max=1.0)
    vec_mult = {int(i): int(m) for i, m in zip(res.seed_idx, res.multiplicity, strict=True)}
    plain_mult = {i: m for i, m in plain_box[0].items() if active[s_list[i]] and m >= 2}
    agree = vec_mult == plain_mult
    n_active = int(active[s_all[:n_slice]].sum())
    hist_plain = Counter(plain_mult.values())
    hist_plain[1] = n_active - len(plain_mult)
    hist_vec = Counter(vec_mult.values())
    hist_vec[1] = n_active - len(vec_mult)
    # the compiled count alone (what evaluate runs for every seed before the p-value)
    slice_seeds = np.flatnonzero(active[s_all[:n_slice]])
    prev = previous_same_site(t_all, s_all)
    s64 = s_all.astype(np.int64)
    kk_box: list[I64Array] = []
    slots = tab.scales[0].slots
    assert slots is not None  # the scale is active (seeds were evaluated above)

    def compiled() -> None:
        kk_box.append(
            slot_counts(
                t_all,
                s64,
                prev,
                t_all[slice_seeds],
                s64[slice_seeds],
                slots.edges,
                slots.counted,
                slots.rows,
                n,
                one.geom.back_ns,
                one.geom.ahead_ns[0],
                np.zeros(n, dtype=np.int64),  # count every seed
            )
        )

    t_comp = best_of(compiled, 3)
    comp_mult = {int(i): int(k) + 1 for i, k in zip(slice_seeds, kk_box[0], strict=True) if k >= 1}
    agree_comp = comp_mult == plain_mult
    rows.append(Row(f"4a. plain Python per hit, W={w_s:g} s, slice", n_slice, t_plain))
    rows.append(Row(f"4b. CoincidenceTrigger.evaluate, W={w_s:g} s", n_slice, t_vec))
    rows.append(Row(f"4c. compiled slot count alone, W={w_s:g} s", n_slice, t_comp))

    # ---- report --------------------------------------------------------------------
    print()
    print(table(rows, floor))
    print()
    print(
        f"slice: first {n_slice:,} timed hits ({n_active:,} active seeds), window W = {w_s:g} s; "
        f"multiplicity histogram plain {show_hist(hist_plain)}, "
        f"vectorised {show_hist(hist_vec)}; per-seed multiplicities "
        f"{'AGREE' if agree else 'DISAGREE'} (evaluate), "
        f"{'AGREE' if agree_comp else 'DISAGREE'} (compiled count)"
    )
    print(
        f"one-scale count: evaluate (count, pairs and p-value of every seed at p_max = 1) "
        f"{t_plain / t_vec:,.1f}x, the compiled count alone {t_plain / t_comp:,.1f}x as fast "
        f"as the plain loop; the full engine runs {n_eval} evaluators, rate tables, excess "
        f"windows and merging"
    )
    print()
    print("targets (issue): replay throughput >= 1,000,000 hits/s, and within 5x of the floor")
    for r in [r for r in rows if r.label[:2] in ("1.", "2.")]:  # one core (1b: threads)
        ratio = floor.rate / r.rate
        print(
            f"  {r.label.split('. ', 1)[1]:<38} {r.rate:>12,.0f} hits/s "
            f"{verdict(r.rate >= TARGET_HITS_PER_S)}   {ratio:>8.1f}x floor "
            f"{verdict(ratio <= TARGET_FLOOR_RATIO)}"
        )
    if json_row is not None:
        ratio = floor.rate / json_row.rate
        print(
            f"  the recording is JSON lines (contract 4): a general JSON parser alone takes "
            f"{ratio:.1f}x the floor ({TARGET_FLOOR_RATIO:g}x allowed for the whole replay)"
        )
    per_site = spent["_tables_for_bin"] + spent["_excesses"]
    print(
        f"  of the engine's time, {per_site:.3f} s ({per_site / floor.seconds:.1f}x the floor) "
        f"is per-site work (1e + 1f: the Poisson-binomial tables of every seed site and "
        f"scale once a minute, and the excess tests of every site and window: work per "
        f"site and minute of data, not per hit)"
        + (
            ""
            if a.no_front
            else f"; the front search (1d) takes "
            f"{spent['_eval_front'] / floor.seconds:.1f}x the floor"
        )
    )
    if a.profile and profile_engine is not None:
        print()
        print(f"cProfile of the timed engine run (top {a.profile} by own time):")
        prof = cProfile.Profile()
        prof.enable()
        run_engine(profile_engine, timed_blocks)
        prof.disable()
        buf = io.StringIO()
        st = pstats.Stats(prof, stream=buf)
        st.sort_stats("tottime").print_stats(a.profile)
        st.sort_stats("cumulative").print_stats(a.profile)
        print(buf.getvalue())
    return 0 if meaningful and agree else 1


if __name__ == "__main__":
    sys.exit(main())
