"""Each site's live time between two instants, from the engine's recent live intervals.

A site that is dead for part of a coincidence slot can only have hits in the
live part. The coincidence statistics therefore measure where a hit lies in
its slot on the site's *live clock* (live nanoseconds since the slot start): a
Poisson site's hits are homogeneous on its live clock whatever its dead time
(a time change), so a position measured that way keeps the uniform tie-break
of a fully live slot. For a site live over the whole slot the live clock is
just the time since the slot start, to the nanosecond, so nothing changes for
it; :meth:`LiveClock.partial_sites` names the sites for which the lookup is
needed at all.
"""

from __future__ import annotations

import numpy as np

from tocsin.engine.exposure import BinStore
from tocsin.types import BoolArray, I64Array

_KEY_LIMIT = 2**62
"""Composite (site, time) keys must stay below this (int64 with room to spare)."""


class LiveIntervals:
    """Recent live intervals ``[start, end)`` (GPS ns) of every site, block by block.

    Intervals of one site never overlap (a :class:`~tocsin.engine.block.Block`
    guarantees it within a block, and blocks follow one another).
    """

    def __init__(self, n_sites: int) -> None:
        self.n_sites = n_sites
        self.site: I64Array = np.zeros(0, dtype=np.int64)
        self.start: I64Array = np.zeros(0, dtype=np.int64)
        self.end: I64Array = np.zeros(0, dtype=np.int64)

    def add(self, site: I64Array | np.ndarray, start: I64Array, end: I64Array) -> None:
        """Append one block's intervals (any order)."""
        keep = end > start
        if not keep.any():
            return
        self.site = np.concatenate([self.site, np.asarray(site, dtype=np.int64)[keep]])
        self.start = np.concatenate([self.start, start[keep]])
        self.end = np.concatenate([self.end, end[keep]])

    def trim(self, before_ns: int) -> None:
        """Forget intervals that end at or before ``before_ns`` (GPS ns)."""
        keep = self.end > before_ns
        if not keep.all():
            self.site, self.start, self.end = self.site[keep], self.start[keep], self.end[keep]


class LiveClock:
    """Live-time look-ups over the intervals held at one moment (build per engine call).

    ``live_ns(site, a, b)`` is the live time of ``site`` in ``[a, b)`` (ns), exact
    in integers. The look-up table (intervals sorted by site and time, with
    running sums of their lengths) is built on first use only.
    """

    def __init__(self, store: BinStore, intervals: LiveIntervals) -> None:
        self.store = store
        self.iv = intervals
        self._key: I64Array | None = None
        self._len: I64Array = np.zeros(0, dtype=np.int64)
        self._cum: I64Array = np.zeros(0, dtype=np.int64)
        self._ref = 0
        self._span = 1

    def partial_sites(self, t0: int, t1: int) -> BoolArray:
        """Sites live somewhere but not everywhere in ``[t0, t1)`` (GPS ns), judged on
        whole exposure bins (a superset: a site not named is live throughout, or dead
        throughout and so without hits)."""
        bn = self.store.bin_ns
        b0, b1 = t0 // bn, -(-t1 // bn)
        held0, held1 = self.store.first_bin, self.store.end_bin or 0
        live = self.store.live_ns(max(b0, held0), max(min(b1, held1), max(b0, held0)))
        some: BoolArray = np.asarray((live > 0).any(axis=1), dtype=bool)
        if b0 < held0 or b1 > held1:  # not all held: treat every live site as partial
            return some
        out: BoolArray = some & ~(live == bn).all(axis=1)
        return out

    def _build(self) -> None:
        iv = self.iv
        order = np.lexsort((iv.start, iv.site))
        s, a, b = iv.site[order], iv.start[order], iv.end[order]
        ref = int(a.min()) if a.size else 0
        span = (int(b.max()) - ref + 2) if a.size else 1
        if self.iv.n_sites * span >= _KEY_LIMIT:
            raise ValueError(
                f"live intervals span {span} ns over {self.iv.n_sites} sites: "
                "too long for one look-up table"
            )
        length = b - a
        self._ref, self._span = ref, span
        self._len = length
        self._cum = np.cumsum(length) - length
        # published last: a thread that sees the key sees the rest (engine threads
        # may build the same table at once; both build identical values)
        self._key = s * span + (a - ref)

    def _before(self, site: I64Array, t: I64Array) -> I64Array:
        """Running live total (ns) of all intervals up to ``(site, t)`` in key order."""
        if self._key is None:
            self._build()
        key = self._key
        assert key is not None
        if key.size == 0:
            return np.zeros(site.size, dtype=np.int64)
        q = site.astype(np.int64) * self._span + np.clip(t - self._ref, 0, self._span - 1)
        idx = np.searchsorted(key, q, side="right") - 1
        j = np.maximum(idx, 0)
        val = self._cum[j] + np.minimum(q - key[j], self._len[j])
        out: I64Array = np.where(idx >= 0, val, 0)
        return out

    def live_ns(self, site: I64Array, a: I64Array, b: I64Array) -> I64Array:
        """Live nanoseconds of ``site[i]`` in ``[a[i], b[i])`` (0 where ``b <= a``)."""
        out: I64Array = np.maximum(self._before(site, b) - self._before(site, a), 0)
        return out
