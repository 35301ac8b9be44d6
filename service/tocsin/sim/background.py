"""Background of one site: live batches with dead-time gaps, and Poisson hits in them.

Everything is vectorised over all batches of a site (no per-batch Python loop):

1. Outages: a Poisson number over the span (plus the longest outage before it,
   so that one may be in progress at the start), uniform start times, log-normal
   lengths; overlapping outages merge.
2. Batches: edges at GPS times ``batch_phase + k * batch`` cut the span; outage
   edges cut it too, and pieces inside an outage are dropped. Each remaining
   piece is one batch ``[live_start, live_end)``: a gap between one batch's end
   and the next one's start is dead time, exactly the outage.
3. Hits: the rate is evaluated at each batch's centre (the drift is ~4 % per hour
   at most, so it is constant over a 1 s batch to ~1e-5), the count is
   Poisson(rate x live length), and the times are uniform integers in
   ``[live_start, live_end)`` (GPS ns), sorted.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tocsin.sim.scenario import SiteSim
from tocsin.types import NS_PER_S, F64Array, GpsNs, I64Array


@dataclass(frozen=True, slots=True)
class SiteStream:
    """All batches of one site: ``live_start``/``live_end`` per batch, hits ``t`` (GPS ns).

    ``t`` is sorted and every hit lies in one batch; batch ``j`` has ``seq == j``.
    ``dead_start``/``dead_end`` are the merged outages clipped to the span.
    """

    site_index: int
    live_start: I64Array
    live_end: I64Array
    t: I64Array
    dead_start: I64Array
    dead_end: I64Array

    @property
    def n_batches(self) -> int:
        return int(self.live_start.size)

    def offsets(self) -> I64Array:
        """Hit index bounds: batch ``j`` holds ``t[off[j]:off[j + 1]]`` (length n_batches + 1)."""
        off = np.empty(self.n_batches + 1, dtype=np.int64)
        off[:-1] = np.searchsorted(self.t, self.live_start, side="left")
        off[-1] = self.t.size
        return off

    def batch_of(self, t_ns: I64Array) -> I64Array:
        """Index of the batch holding each time, or -1 where the site was dead."""
        t = np.asarray(t_ns, dtype=np.int64)
        if self.n_batches == 0:
            return np.full(t.shape, -1, dtype=np.int64)
        j = np.searchsorted(self.live_start, t, side="right") - 1
        ok = (j >= 0) & (t < self.live_end[np.clip(j, 0, None)])
        return np.where(ok, j, -1).astype(np.int64)

    def with_hits(self, extra: I64Array) -> SiteStream:
        """A copy with ``extra`` hit times merged in; each must fall inside a batch."""
        extra = np.asarray(extra, dtype=np.int64)
        bad = self.batch_of(extra) < 0
        if bad.any():
            raise ValueError(
                f"hit time {int(extra[np.flatnonzero(bad)[0]])} of site #{self.site_index} "
                "falls in dead time"
            )
        t = np.sort(np.concatenate([self.t, extra]), kind="stable")
        return SiteStream(
            self.site_index, self.live_start, self.live_end, t, self.dead_start, self.dead_end
        )


def draw_outages(
    sim: SiteSim, start_ns: GpsNs, end_ns: GpsNs, rng: np.random.Generator
) -> tuple[I64Array, I64Array]:
    """Merged outages ``[dead_start, dead_end)`` clipped to ``[start_ns, end_ns)`` (GPS ns)."""
    pad_ns = round(sim.outage_max_s * NS_PER_S)
    span_s = (end_ns - start_ns + pad_ns) / NS_PER_S
    n = int(rng.poisson(sim.outages_per_day * span_s / 86400.0))
    starts = rng.integers(start_ns - pad_ns, end_ns, size=n, dtype=np.int64)
    length_s = np.clip(
        rng.lognormal(np.log(sim.outage_median_s), sim.outage_sigma, size=n),
        sim.outage_min_s,
        sim.outage_max_s,
    )
    ends = starts + np.round(length_s * NS_PER_S).astype(np.int64)
    order = np.argsort(starts, kind="stable")
    starts, ends = starts[order], ends[order]
    if n:
        reach = np.maximum.accumulate(ends)
        new = np.ones(n, dtype=bool)
        new[1:] = starts[1:] > reach[:-1]
        ends = np.maximum.reduceat(reach, np.flatnonzero(new))  # each group's furthest end
        starts = starts[new]
    starts = np.clip(starts, start_ns, end_ns)
    ends = np.clip(ends, start_ns, end_ns)
    keep = ends > starts
    return starts[keep], ends[keep]


def live_batches(
    sim: SiteSim,
    start_ns: GpsNs,
    end_ns: GpsNs,
    dead_start: I64Array,
    dead_end: I64Array,
) -> tuple[I64Array, I64Array]:
    """Batch live intervals ``[live_start, live_end)`` (GPS ns) of ``[start_ns, end_ns)``."""
    batch_ns = round(sim.batch_s * NS_PER_S)
    phase_ns = round(sim.batch_phase_s * NS_PER_S) % batch_ns
    first = phase_ns + batch_ns * ((start_ns - phase_ns) // batch_ns + 1)  # first edge > start
    grid = np.arange(first, end_ns, batch_ns, dtype=np.int64)
    edges = np.unique(
        np.concatenate([np.array([start_ns, end_ns], dtype=np.int64), grid, dead_start, dead_end])
    )
    lo, hi = edges[:-1], edges[1:]
    if dead_start.size == 0:
        return lo, hi
    mid = lo + (hi - lo) // 2
    k = np.searchsorted(dead_start, mid, side="right") - 1
    dead = (k >= 0) & (mid < dead_end[np.clip(k, 0, None)])
    return lo[~dead], hi[~dead]


def poisson_hits(
    rate_hz: F64Array,
    live_start: I64Array,
    live_end: I64Array,
    rng: np.random.Generator,
) -> I64Array:
    """Sorted Poisson hit times (GPS ns): rate ``rate_hz[j]`` (Hz) in batch ``j``.

    Batch ``j`` is ``[live_start[j], live_end[j])`` (GPS ns); times are uniform integers in it.
    """
    mu = rate_hz * ((live_end - live_start) / NS_PER_S)
    counts = rng.poisson(mu)
    lo = np.repeat(live_start, counts)
    hi = np.repeat(live_end, counts)
    t: I64Array = rng.integers(lo, hi, dtype=np.int64) if lo.size else lo.copy()
    t.sort(kind="stable")
    return t


def background_stream(
    site_index: int,
    sim: SiteSim,
    start_ns: GpsNs,
    end_ns: GpsNs,
    rng: np.random.Generator,
) -> SiteStream:
    """Outages, batches and background hits of one site over ``[start_ns, end_ns)``."""
    dead_start, dead_end = draw_outages(sim, start_ns, end_ns, rng)
    ls, le = live_batches(sim, start_ns, end_ns, dead_start, dead_end)
    rate = sim.rate_at(ls + (le - ls) // 2, start_ns)
    t = poisson_hits(rate, ls, le, rng)
    return SiteStream(site_index, ls, le, t, dead_start, dead_end)
