"""One candidate per physical cluster: decisions that share hits or windows are merged.

The same fluctuation is usually seen at several scales and by both
statistics of a seed. Coincidence decisions merge when they come from the same
seed hit; excess decisions when their windows overlap for the same site (or the
network sum). A coincidence seen again from its second hit is a separate trial in
the false alarm rate (whose expectation counts every seed), so it stays a separate
candidate; merging it would make the rate conservative by the chain length.
Decisions are taken in the order in which they become
*ready* (the time their window's data was final, then FAR, then id), which is
a property of the data alone, so the merged output is the same however the
stream was cut into blocks. A decision that overlaps an emitted candidate with
an equal or lower FAR is dropped; one with a lower FAR replaces it as a new
revision of the same id.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field

from tocsin.model.candidate import Candidate
from tocsin.types import GpsNs


@dataclass(slots=True)
class Decision:
    """A candidate-to-be with the keys that decide what it overlaps."""

    cand: Candidate
    ready_ns: GpsNs
    hit_keys: frozenset[tuple[int, int]] = frozenset()
    """(site index, hit time ns) of every hit of a coincidence."""
    span: tuple[str, int, int] | None = None
    """(statistic and site key, start ns, end ns) of an excess window."""


@dataclass(slots=True)
class _Entry:
    cand: Candidate
    ready_ns: GpsNs
    hit_keys: frozenset[tuple[int, int]]
    span: tuple[str, int, int] | None
    merged: int = 0


@dataclass(slots=True)
class Merger:
    """Keeps emitted candidates for ``horizon_ns`` of ready time to merge late arrivals."""

    horizon_ns: int
    _recent: deque[_Entry] = field(default_factory=deque)
    _by_hit: dict[tuple[int, int], _Entry] = field(default_factory=dict)
    n_merged: int = 0

    def add(self, decisions: list[Decision]) -> list[Candidate]:
        """Merge ``decisions`` (any order); return the candidates to write (new or revised)."""
        out: list[Candidate] = []
        for d in sorted(decisions, key=lambda d: (d.ready_ns, d.cand.far_per_year, d.cand.id)):
            self._evict(d.ready_ns)
            d.cand.details["ready_gps_ns"] = int(d.ready_ns)
            hit = self._overlapping(d)
            if hit is None:
                e = _Entry(d.cand, d.ready_ns, d.hit_keys, d.span)
                self._recent.append(e)
                for k in d.hit_keys:
                    self._by_hit.setdefault(k, e)
                out.append(d.cand)
                continue
            self.n_merged += 1
            hit.merged += 1
            if d.cand.far_per_year < hit.cand.far_per_year:
                d.cand.id = hit.cand.id
                d.cand.revision = hit.cand.revision + 1
                d.cand.details["merged_decisions"] = hit.merged
                hit.cand = d.cand
                for k in d.hit_keys:
                    self._by_hit.setdefault(k, hit)
                hit.hit_keys = hit.hit_keys | d.hit_keys
                out.append(d.cand)
        return out

    def _overlapping(self, d: Decision) -> _Entry | None:
        for k in d.hit_keys:
            e = self._by_hit.get(k)
            if e is not None:
                return e
        if d.span is not None:
            key, a, b = d.span
            for e in self._recent:
                if e.span is not None and e.span[0] == key and e.span[1] < b and a < e.span[2]:
                    return e
        return None

    def _evict(self, now: GpsNs) -> None:
        while self._recent and self._recent[0].ready_ns < now - self.horizon_ns:
            e = self._recent.popleft()
            for k in e.hit_keys:
                if self._by_hit.get(k) is e:
                    del self._by_hit[k]
