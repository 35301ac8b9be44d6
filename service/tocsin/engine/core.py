"""The engine: blocks in, candidates out. Pure and synchronous.

:class:`Engine` owns the exposure bins, a short buffer of recent hits, the
triggers and the merger. Its output for a stream depends only on the stream,
not on how the stream was cut into blocks (tested), so the live service,
replay and tuning agree exactly.
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from functools import partial
from typing import Any

import numpy as np

from tocsin.engine.block import Block
from tocsin.engine.coincidence import (
    NO_PREVIOUS_NS,
    CoincidenceTrigger,
    SeedResult,
    Tables,
    concat_results,
    previous_same_site,
)
from tocsin.engine.direction import error_ellipse, fit_front, front_radec
from tocsin.engine.excess import ExcessTrigger
from tocsin.engine.exposure import BinStore
from tocsin.engine.front import FrontSearch
from tocsin.engine.livetime import LiveClock, LiveIntervals
from tocsin.engine.merge import Decision, Merger
from tocsin.engine.rates import RateEstimate, background_rates
from tocsin.model.candidate import Candidate
from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry
from tocsin.types import NS_PER_S, SECONDS_PER_YEAR, F64Array, GpsNs, I32Array, I64Array

MAX_REPORTED_ERR_DEG = 60.0
"""A fitted direction with a larger 1-sigma error radius (deg) says nothing; not reported."""
DIRECTION_MAX_FAR_PER_YEAR = 1.0e4
"""Directions are fitted for candidates at or below this FAR (about one an hour);
weaker ones (seen only with a loose ``--candidate-far``) skip the ~4 ms fit."""
PARALLEL_MIN_SEEDS = 20_000
"""A stretch of seeds is split over threads only into parts at least this long (a
thread's start and the neighbour search around each part cost something)."""
_POOLS: dict[int, ThreadPoolExecutor] = {}
if hasattr(os, "register_at_fork"):  # a forked child has none of the parent's threads
    os.register_at_fork(after_in_child=_POOLS.clear)


def default_threads() -> int:
    """Engine threads when none are asked for: the cores this process may use, at
    most 4 (beyond that the per-part overhead eats the gain at typical block sizes)."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        cores = os.cpu_count() or 1
    return max(1, min(4, cores))


def _pool(threads: int) -> ThreadPoolExecutor:
    """A process-wide pool of ``threads`` workers (numpy releases the GIL in the
    array operations that dominate an evaluation)."""
    pool = _POOLS.get(threads)
    if pool is None:
        pool = _POOLS[threads] = ThreadPoolExecutor(threads, thread_name_prefix="tocsin-engine")
    return pool


RATE_UPDATE_S = 60.0
"""Coincidence rates are re-estimated once per this many seconds of data (s)."""


@dataclass(slots=True)
class EngineCounters:
    """Running totals, for summaries and metrics."""

    blocks: int = 0
    hits: int = 0
    live_site_ns: int = 0
    decisions: dict[str, int] = field(default_factory=dict)
    seeds_evaluated: int = 0
    seeds_skipped: int = 0
    """Hits that could not be judged as seeds (their background was no longer held)."""


class Engine:
    """Turns time-ordered :class:`Block` s into merged :class:`Candidate` s."""

    def __init__(
        self,
        registry: SiteRegistry,
        cfg: EngineConfig,
        *,
        candidate_far_per_year: float | None = None,
        threads: int = 1,
    ) -> None:
        """``threads``: how many threads evaluate a stretch of seeds at once (split by
        seed; the candidates do not depend on it)."""
        if threads < 1:
            raise ValueError(f"threads {threads!r} must be >= 1")
        self.threads = threads
        self.registry = registry
        self.cfg = cfg
        self.far_threshold = (
            cfg.candidate_far_per_year if candidate_far_per_year is None else candidate_far_per_year
        )
        if not self.far_threshold > 0:
            raise ValueError(f"candidate false alarm rate {self.far_threshold!r} must be > 0")
        n = len(registry)
        self.bin_ns = round(cfg.rate.bin_s * NS_PER_S)
        self.bg_bins = math.ceil(cfg.rate.background_s / cfg.rate.bin_s)
        self.update_bins = max(1, round(RATE_UPDATE_S / cfg.rate.bin_s))
        self._derive()
        # (statistic, scale index, scale s, how far ahead of a seed its slots reach)
        self._evals: list[tuple[str, int, float, int]] = [
            ("sites", k, w, a)
            for k, (w, a) in enumerate(
                zip(cfg.coincidence.scales_s, self.coinc.geom.ahead_ns, strict=True)
            )
        ]
        if cfg.coincidence.front_scales_s:
            # one evaluator for all front scales: triples are solved once
            self._evals.append(("front", -1, 0.0, max(self.front.ahead_ns)))
        self.excess = ExcessTrigger(n, registry.ids, cfg.excess, cfg.rate, bin_ns=self.bin_ns)
        ahead_bins = math.ceil(self.coinc.max_ahead_ns / self.bin_ns) + 1
        excess_bins = math.ceil(max(cfg.excess.scales_s, default=0.0) / cfg.rate.bin_s)
        capacity = self.bg_bins + self.update_bins + max(ahead_bins, excess_bins) + 8
        self.store = BinStore(n, bin_ns=self.bin_ns, capacity=capacity)
        self._t: I64Array = np.zeros(0, dtype=np.int64)
        self._s: I32Array = np.zeros(0, dtype=np.int32)
        self._prev: I64Array = np.zeros(0, dtype=np.int64)
        """For each buffered hit, the time (GPS ns) of the previous hit of its site."""
        self._last_t: I64Array = np.full(n, NO_PREVIOUS_NS, dtype=np.int64)
        """Time of each site's latest hit so far (GPS ns; NO_PREVIOUS_NS: none)."""
        self._prog: list[GpsNs | None] = [None] * len(self._evals)
        self._estimates: dict[int, RateEstimate] = {}
        self.live_intervals = LiveIntervals(n)
        horizon = 2 * self.coinc.max_ahead_ns + 2 * excess_bins * self.bin_ns + 2 * self.bin_ns
        self.merger = Merger(horizon_ns=horizon)
        self.counters = EngineCounters()
        self.t_end: GpsNs | None = None
        self._first_bin: int | None = None
        self.t_start: GpsNs | None = None
        """Start of the first block processed (GPS ns)."""
        self.last_rates_hz: F64Array | None = None
        """The latest per-site rate estimate (Hz; 0 for sites not taking part)."""

    _DERIVED = ("coinc", "front", "_tables", "_bin_tables")
    """Members rebuilt from the registry and configuration (slot geometry, pair
    tables) or caches of rate tables: left out of a pickled engine (a checkpoint),
    where at 1000 sites they were ~550 of its ~600 MB, and rebuilt on load. They are
    fixed by the registry and configuration (which a checkpoint's key includes), and
    the rate tables by the rates kept in the state, so the results do not change."""

    def __getstate__(self) -> dict[str, Any]:
        state = dict(self.__dict__)
        for name in self._DERIVED:
            state.pop(name, None)
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__dict__.update(state)
        self._derive()

    def _derive(self) -> None:
        """Build the members of :attr:`_DERIVED` from the registry and configuration."""
        self.coinc = CoincidenceTrigger(self.registry, self.cfg.coincidence)
        self.front = FrontSearch(self.registry, self.cfg.coincidence)
        self._tables: dict[tuple[int, bytes], Tables] = {}
        self._bin_tables: dict[int, Tables] = {}

    # ------------------------------------------------------------------
    def process(self, block: Block) -> list[Candidate]:
        """Take the next block (it must follow the previous one) and return new or
        revised candidates, in the order they became ready."""
        if self.t_end is not None and block.t_start < self.t_end:
            raise ValueError(
                f"block starts at {block.t_start}, "
                f"before the end of the previous one ({self.t_end})"
            )
        self.t_end = block.t_end
        if self._first_bin is None:
            self._first_bin = block.t_start // self.bin_ns
            self.t_start = block.t_start
        self.store.add(block)
        c = self.counters
        c.blocks += 1
        c.hits += block.n_hits
        c.live_site_ns += int(np.sum(block.live_end - block.live_start))
        self.live_intervals.add(block.live_site, block.live_start, block.live_end)
        if block.t.size:
            self._t = np.concatenate([self._t, block.t])
            self._s = np.concatenate([self._s, block.site])
            prev = previous_same_site(block.t, block.site, before=self._last_t)
            np.maximum.at(self._last_t, block.site, block.t)
            self._prev = np.concatenate([self._prev, prev])
        decisions = self._coincidences(block.t_end)
        decisions += self._excesses(block.t_end)
        self._trim()
        out = self.merger.add(decisions)
        # Directions only for what is written: the merger drops most decisions of a
        # cluster (other scales and statistics of the same seed), and it does not
        # look at directions, so fitting after it gives the same candidates.
        for cand in out:
            if (
                cand.trigger == "coincidence"
                and cand.ra_deg is None
                and cand.far_per_year <= DIRECTION_MAX_FAR_PER_YEAR
            ):
                sites = np.array([self.registry.index(x) for x in cand.sites], dtype=np.int64)
                self._add_direction(cand, sites, np.array(cand.hit_times_ns, dtype=np.int64))
        return out

    # ------------------------------------------------------------------
    def _estimate(self, epoch: int) -> RateEstimate:
        """Background rates of a rate epoch (cached; the bins it reads are final)."""
        est = self._estimates.get(epoch)
        if est is None:
            est = background_rates(
                self.store,
                epoch * self.update_bins,
                background_bins=self.bg_bins,
                guard_bins=0,
                min_live_fraction=self.cfg.rate.min_live_s / self.cfg.rate.background_s,
            )
            self.last_rates_hz = np.where(est.ok, est.rate_hz, 0.0)
            if len(self._estimates) > 8:
                self._estimates.clear()
            self._estimates[epoch] = est
        return est

    def _tables_for_bin(self, b: int) -> Tables:
        """Null tables for the seeds of bin ``b``: its epoch's rates, and as counted
        sites those usable and live somewhere in the bin (see coincidence.py)."""
        tab = self._bin_tables.get(b)
        if tab is not None:
            return tab
        epoch = b // self.update_bins
        est = self._estimate(epoch)
        counted = est.ok & (self.store.live_ns(b, b + 1)[:, 0] > 0)
        key = (epoch, np.packbits(counted).tobytes())
        tab = self._tables.get(key)
        if tab is None:
            rates = np.where(counted, est.rate_hz, 0.0)
            extra = self.front.seed_weight(rates * 1e-9)
            tab = self.coinc.tables(est.rate_hz, counted, est.ok, extra_seed_weight=extra)
            if len(self._tables) > 64:
                self._tables.clear()
            self._tables[key] = tab
        self._bin_tables[b] = tab
        return tab

    def _coincidences(self, t_end: GpsNs) -> list[Decision]:
        out: list[Decision] = []
        done_ns = (t_end // self.bin_ns) * self.bin_ns
        self._bin_tables = {}
        clock = LiveClock(self.store, self.live_intervals)
        # The first rate epoch needs some history; sites without enough live time
        # in their background stretch are left out by background_rates (``ok``).
        first_ok_bin = -(-((self._first_bin or 0) + 1) // self.update_bins) * self.update_bins
        # Bins whose background the ring no longer holds (after a long empty
        # stretch) cannot be judged; nothing was there to judge.
        held_ns = (self.store.first_bin + self.bg_bins + self.update_bins) * self.bin_ns
        for e, (stat, k, w_s, ahead) in enumerate(self._evals):
            limit = min(done_ns, t_end - ahead)
            start = self._prog[e]
            if start is None:
                start = first_ok_bin * self.bin_ns
            if start < held_ns:
                self.counters.seeds_skipped += int(
                    np.searchsorted(self._t, held_ns) - np.searchsorted(self._t, start)
                )
                start = held_ns
            if limit <= start:
                self._prog[e] = start
                continue
            # Only bins holding seeds need tables: stretches without hits (gaps, the
            # time after the end of the data) are stepped over.
            i_first = int(np.searchsorted(self._t, start, side="left"))
            i_stop = int(np.searchsorted(self._t, limit, side="left"))
            last_b = int(self._t[i_stop - 1]) // self.bin_ns if i_stop > i_first else -1
            b = int(self._t[i_first]) // self.bin_ns if i_stop > i_first else 0
            while b <= last_b:
                tab = self._tables_for_bin(b)
                b_end = b + 1
                while b_end <= last_b and self._tables_for_bin(b_end) is tab:
                    b_end += 1
                lo_t = max(start, b * self.bin_ns)
                hi_t = min(limit, b_end * self.bin_ns)
                i0 = int(np.searchsorted(self._t, lo_t, side="left"))
                i1 = int(np.searchsorted(self._t, hi_t, side="left"))
                # FAR multiplier per bin: evaluations per second of network live time
                trial = tab.trial_rates_hz(self.store.live_ns(b, b_end) / self.bin_ns)
                if i1 > i0 and trial.max() > 0:
                    self.counters.seeds_evaluated += i1 - i0
                    # loosest bound of the stretch; each seed is then held to its own bin's
                    p_max = self.far_threshold / (trial[trial > 0].min() * SECONDS_PER_YEAR)
                    rates = (b, trial)
                    if stat == "sites":
                        (res,) = self._in_chunks(
                            partial(self._eval_sites, tab=tab, k=k, p_max=p_max, clock=clock),
                            i0,
                            i1,
                        )
                        out += self._coinc_decisions(stat, res, rates, w_s, ahead)
                    else:
                        fronts = self._in_chunks(
                            partial(self._eval_front, tab=tab, p_max=p_max, clock=clock), i0, i1
                        )
                        for fr in fronts:
                            w_f = self.cfg.coincidence.front_scales_s[fr.scale_index]
                            out += self._coinc_decisions(stat, fr, rates, w_f, ahead)
                b = b_end
                if b <= last_b:  # on to the next bin with a hit
                    i_next = int(np.searchsorted(self._t, b * self.bin_ns, side="left"))
                    b = max(b, int(self._t[i_next]) // self.bin_ns)
            self._prog[e] = limit
        return out

    def _eval_sites(
        self, a: int, b: int, *, tab: Tables, k: int, p_max: float, clock: LiveClock
    ) -> list[SeedResult]:
        return [
            self.coinc.evaluate(
                self._t, self._s, a, b, tab, k, p_max=p_max, clock=clock, prev=self._prev
            )
        ]

    def _eval_front(
        self, a: int, b: int, *, tab: Tables, p_max: float, clock: LiveClock
    ) -> list[SeedResult]:
        return self.front.evaluate(
            self._t, self._s, a, b, tab.rates_per_ns, p_max=p_max, clock=clock
        )

    def _in_chunks(
        self, evaluate: Callable[[int, int], list[SeedResult]], i0: int, i1: int
    ) -> list[SeedResult]:
        """``evaluate(i0, i1)``, split by seed over :attr:`threads` threads when the
        stretch is long. Seeds are judged independently, so the merged results are
        those of one call, bit for bit."""
        n = min(self.threads, (i1 - i0) // PARALLEL_MIN_SEEDS)
        if n <= 1:
            return evaluate(i0, i1)
        edges = [i0 + (i1 - i0) * j // n for j in range(n + 1)]
        parts = list(_pool(self.threads).map(evaluate, edges[:-1], edges[1:]))
        return [
            concat_results(parts[0][f].scale_index, [p[f] for p in parts])
            for f in range(len(parts[0]))
        ]

    def _coinc_decisions(
        self, stat: str, res: SeedResult, rates: tuple[int, F64Array], w_s: float, ahead: int
    ) -> list[Decision]:
        """Candidates of the seeds whose FAR (their bin's trial rate, ``rates`` =
        (first bin, Hz per bin)) is within the threshold."""
        out: list[Decision] = []
        ids = self.registry.ids
        b0, trial = rates
        for g in range(res.seed_idx.size):
            si = int(res.seed_idx[g])
            t_seed = int(self._t[si])
            trial_hz = float(trial[t_seed // self.bin_ns - b0])
            p = float(res.p[g])
            far = p * trial_hz * SECONDS_PER_YEAR
            if not far <= self.far_threshold:
                continue
            nb = res.nb_idx[res.nb_seed == g]
            idx = np.concatenate([[si], nb]).astype(np.int64)
            idx = idx[np.argsort(self._t[idx], kind="stable")]
            t_hits = [int(x) for x in self._t[idx]]
            s_hits = [int(x) for x in self._s[idx]]
            cand = Candidate(
                trigger="coincidence",
                statistic=stat,
                time_gps_ns=t_seed,
                window_s=w_s,
                sites=[ids[s] for s in s_hits],
                p_value=p,
                far_per_year=far,
                multiplicity=int(res.multiplicity[g]),
                hit_times_ns=t_hits,
                details={"trial_rate_hz": trial_hz},
            )
            ready = max(t_seed + ahead, (t_seed // self.bin_ns + 1) * self.bin_ns)
            # Merged only with decisions from the same seed hit (other scales and
            # statistics): a chain of seeds inside one cluster are separate trials in
            # the FAR, so they stay separate candidates (see merge.py).
            keys = frozenset([(int(self._s[si]), t_seed)])
            out.append(Decision(cand, ready, hit_keys=keys))
            self._count(f"coincidence/{stat}")
        return out

    def _add_direction(self, cand: Candidate, sites: I64Array, t: I64Array) -> None:
        """Plane-front fit for >= 3 non-collinear sites; nothing when degenerate."""
        if len(set(sites.tolist())) != sites.size or sites.size < 3:
            return
        fit = fit_front(self.registry.ecef_m[sites], t, self.registry.clock_sigma_ns[sites])
        if fit is None or not np.isfinite(fit.err_deg) or fit.err_deg > MAX_REPORTED_ERR_DEG:
            return
        ra, dec = front_radec(fit)
        cand.ra_deg, cand.dec_deg, cand.err_deg = ra, dec, float(fit.err_deg)
        ell = error_ellipse(fit, (ra, dec))
        cand.details["err_ellipse_deg"] = [ell.major_deg, ell.minor_deg, ell.pa_deg]
        cand.details["front_chi2"] = float(fit.chi2)
        cand.details["front_ndof"] = int(fit.ndof)
        cand.details["front_t0_gps_ns"] = int(fit.t0_ns)
        cand.details["front_t0_sigma_ns"] = float(fit.t0_sigma_ns)
        if fit.ambiguous:
            cand.details["direction_ambiguous"] = True

    def _excesses(self, t_end: GpsNs) -> list[Decision]:
        out: list[Decision] = []
        done_bin = t_end // self.bin_ns
        for cand in self.excess.process(
            self.store, done_bin, far_threshold_per_year=self.far_threshold
        ):
            start = int(cand.time_gps_ns)
            end = start + round(cand.window_s * NS_PER_S)
            key = f"{cand.statistic}:{','.join(cand.sites) if cand.statistic == 'site' else '*'}"
            out.append(Decision(cand, end, span=(key, start, end)))
            self._count(f"excess/{cand.statistic}")
        return out

    def _count(self, key: str) -> None:
        self.counters.decisions[key] = self.counters.decisions.get(key, 0) + 1

    def _trim(self) -> None:
        progs = [p for p in self._prog if p is not None]
        if not progs:
            return
        keep_from = min(progs) - self.coinc.geom.back_ns - 1
        self.live_intervals.trim(keep_from)
        cut = int(np.searchsorted(self._t, keep_from, side="left"))
        if cut > 0:
            self._t = self._t[cut:]
            self._s = self._s[cut:]
            self._prev = self._prev[cut:]
