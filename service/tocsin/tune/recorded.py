"""A recording held in compact arrays, ready to be shifted, injected into and replayed.

Tuning replays the same recording many times with its hits moved (time slides)
or added to (injections). :class:`RecordedNetwork` keeps every decoded batch in
recording order as a few numpy arrays (site, seq, live interval, arrival time,
hit offsets), and per site the batches the ordering stage *accepts* — the site's
live time. Late and duplicate batches stay in the stream with their verdict
unchanged (their hits are dropped), so a replay of shifted data sees exactly the
same dead time as the original.

:meth:`RecordedNetwork.batches` rebuilds :class:`HitBatch` objects, with any
per-site hit arrays in place of the recorded ones, for the usual
:class:`~tocsin.pipeline.Pipeline`. All times are int64 GPS nanoseconds.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from tocsin.io.recording import Rejected, read_recording
from tocsin.model.batch import HitBatch
from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry
from tocsin.ordering import Orderer
from tocsin.types import NS_PER_S, BoolArray, GpsNs, I64Array


@dataclass(frozen=True, slots=True)
class SiteLive:
    """One site's accepted batches: live intervals ``[start, end)`` sorted, and its hits.

    ``batch`` gives each interval's index in the recording's batch list.
    """

    batch: I64Array
    start: I64Array
    end: I64Array
    t: I64Array

    @property
    def live_ns(self) -> int:
        return int(np.sum(self.end - self.start))

    def live_before(self, t: I64Array) -> I64Array:
        """Live time (ns) of the site before each time ``t`` (GPS ns), exact in integers."""
        if self.start.size == 0:
            return np.zeros(t.shape, dtype=np.int64)
        cum = np.concatenate([[0], np.cumsum(self.end - self.start)]).astype(np.int64)
        k = np.searchsorted(self.start, t, side="right") - 1
        j = np.maximum(k, 0)
        inside = np.minimum(t - self.start[j], self.end[j] - self.start[j])
        out: I64Array = np.where(k >= 0, cum[j] + inside, 0).astype(np.int64)
        return out

    def merged(self) -> tuple[I64Array, I64Array]:
        """Live intervals with touching neighbours joined (GPS ns): the site's outages are
        exactly the gaps between them."""
        if self.start.size == 0:
            return self.start, self.end
        new = np.ones(self.start.size, dtype=bool)
        new[1:] = self.start[1:] > self.end[:-1]
        starts = self.start[new]
        last = np.flatnonzero(np.append(new[1:], True))
        return starts, self.end[last]


@dataclass(frozen=True, slots=True)
class RecordedNetwork:
    """Every decoded batch of a recording, in recording order, and each site's live time."""

    registry: SiteRegistry
    site: I64Array
    seq: I64Array
    live_start: I64Array
    live_end: I64Array
    recv_ns: I64Array
    """Arrival time of each batch (GPS ns); its live end when the recording has none."""
    accepted: BoolArray
    """Whether the ordering stage accepts the batch (not late, not a duplicate)."""
    sites: tuple[SiteLive, ...]
    n_lines: int
    rejected: dict[str, int]
    """Lines that could not be used, or batches refused by ordering, by reason."""

    @property
    def n_batches(self) -> int:
        return int(self.site.size)

    @property
    def n_hits(self) -> int:
        return sum(int(s.t.size) for s in self.sites)

    @property
    def start_ns(self) -> GpsNs:
        starts = [int(s.start[0]) for s in self.sites if s.start.size]
        if not starts:
            raise ValueError("the recording has no accepted batch")
        return min(starts)

    @property
    def end_ns(self) -> GpsNs:
        return max(int(s.end[-1]) for s in self.sites if s.end.size)

    @property
    def live_ns(self) -> I64Array:
        """Accepted live time per site (ns)."""
        return np.array([s.live_ns for s in self.sites], dtype=np.int64)

    def network_live_ns(self, from_ns: int, bin_ns: int) -> int:
        """Network live time (ns) from ``from_ns`` on: the engine's time base for false
        alarm rates (``engine/coincidence.py``, ``engine/excess.py``). Per exposure bin of
        ``bin_ns`` (GPS-aligned; the bin holding ``from_ns`` counts from ``from_ns``) the
        largest live time of any site, summed. Time after the data (no site live) adds
        nothing, so a replay's closing stretch is not counted as searched."""
        if bin_ns <= 0:
            raise ValueError(f"bin length {bin_ns} ns must be > 0")
        ends = [int(s.end[-1]) for s in self.sites if s.end.size]
        if not ends or max(ends) <= from_ns:
            return 0
        b0, b1 = from_ns // bin_ns, -(-max(ends) // bin_ns)
        edges = np.arange(b0, b1 + 1, dtype=np.int64) * bin_ns
        edges[0] = from_ns
        best = np.zeros(edges.size - 1, dtype=np.int64)
        for s in self.sites:
            best = np.maximum(best, np.diff(s.live_before(edges)))
        return int(best.sum())

    def mean_rates_hz(self) -> list[float]:
        """Hits per live second of each site over the whole recording (0 for a dead site)."""
        return [int(s.t.size) * NS_PER_S / s.live_ns if s.live_ns > 0 else 0.0 for s in self.sites]

    def batches(self, hits: Sequence[I64Array] | None = None) -> Iterator[HitBatch]:
        """All batches in recording order, as the pipeline takes them.

        ``hits`` replaces each site's hits (sorted GPS ns, every one inside an
        accepted live interval of that site); batches not accepted carry none.
        """
        per_site = [s.t for s in self.sites] if hits is None else list(hits)
        if len(per_site) != len(self.sites):
            raise ValueError(f"{len(per_site)} hit arrays for {len(self.sites)} sites")
        n = self.n_batches
        lo = np.zeros(n, dtype=np.int64)
        hi = np.zeros(n, dtype=np.int64)
        owner = np.full(n, -1, dtype=np.int64)
        for i, (s, t) in enumerate(zip(self.sites, per_site, strict=True)):
            if s.batch.size == 0:
                continue
            a = np.searchsorted(t, s.start, side="left")
            b = np.searchsorted(t, s.end, side="left")
            if int(b.sum() - a.sum()) != t.size:
                raise ValueError(
                    f"site {self.registry.ids[i]!r}: {t.size - int(b.sum() - a.sum())} "
                    "hit(s) fall outside its live time"
                )
            lo[s.batch], hi[s.batch], owner[s.batch] = a, b, i
        ids = self.registry.ids
        empty = np.zeros(0, dtype=np.int64)
        site_l = self.site.tolist()
        seq_l = self.seq.tolist()
        ls_l = self.live_start.tolist()
        le_l = self.live_end.tolist()
        rv_l = self.recv_ns.tolist()
        own_l = owner.tolist()
        lo_l, hi_l = lo.tolist(), hi.tolist()
        for k in range(n):
            i = site_l[k]
            o = own_l[k]
            t = per_site[o][lo_l[k] : hi_l[k]] if o >= 0 else empty
            yield HitBatch(ids[i], i, seq_l[k], ls_l[k], le_l[k], t, None, rv_l[k])


def load_recording(path: str | Path, registry: SiteRegistry, cfg: EngineConfig) -> RecordedNetwork:
    """Read a recording; decide acceptance with the same ordering stage as replay."""
    orderer = Orderer(len(registry), lateness_ns=round(cfg.lateness_s * NS_PER_S))
    rejected: Counter[str] = Counter()
    cols: list[list[int]] = [[], [], [], [], []]
    acc: list[bool] = []
    hits: list[list[I64Array]] = [[] for _ in range(len(registry))]
    n_lines = 0
    for item in read_recording(path, registry):
        n_lines += 1
        if isinstance(item, Rejected):
            rejected[item.reason] += 1
            continue
        verdict = orderer.offer(item)
        ok = verdict.status == "accepted"
        if not ok:
            rejected[verdict.status if verdict.status == "late" else "duplicate_seq"] += 1
        else:
            hits[item.site_index].append(item.t)
        arrived = item.recv_ns if item.recv_ns is not None else item.live_end
        for col, v in zip(
            cols, (item.site_index, item.seq, item.live_start, item.live_end, arrived), strict=True
        ):
            col.append(v)
        acc.append(ok)
    site, seq, ls, le, recv = (np.asarray(c, dtype=np.int64) for c in cols)
    accepted = np.asarray(acc, dtype=bool)
    sites = tuple(
        _site_live(i, registry.ids[i], site, ls, le, accepted, hits[i])
        for i in range(len(registry))
    )
    if not any(s.start.size for s in sites):
        raise ValueError(f"recording {str(path)!r} holds no usable batch ({n_lines} lines)")
    return RecordedNetwork(
        registry, site, seq, ls, le, recv, accepted, sites, n_lines, dict(sorted(rejected.items()))
    )


def _site_live(
    i: int,
    site_id: str,
    site: I64Array,
    ls: I64Array,
    le: I64Array,
    accepted: BoolArray,
    hits: list[I64Array],
) -> SiteLive:
    idx = np.flatnonzero((site == i) & accepted).astype(np.int64)
    order = np.argsort(ls[idx], kind="stable")
    idx = idx[order]
    start, end = ls[idx], le[idx]
    if idx.size > 1 and bool(np.any(start[1:] < end[:-1])):
        k = int(np.flatnonzero(start[1:] < end[:-1])[0])
        raise ValueError(
            f"site {site_id!r}: live intervals [{int(start[k])}, {int(end[k])}) and "
            f"[{int(start[k + 1])}, {int(end[k + 1])}) overlap; time slides need disjoint ones"
        )
    t = np.sort(np.concatenate(hits)) if hits else np.zeros(0, dtype=np.int64)
    return SiteLive(idx, start, end, t.astype(np.int64, copy=False))
