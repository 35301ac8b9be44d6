"""The ordering stage: batches in arrival order -> time-ordered :class:`Block` s.

Pure and synchronous; the live service and replay both drive it with the
arrival time of each batch (``recv_ns``), which is what makes replay equal live.

Rules, per batch:

* **duplicate** — a ``seq`` already seen for that site is dropped (QoS 1 delivers
  at least once); counted.
* **late** — a batch is accepted only if it arrives within the lateness allowance
  ``L`` of the start of its live interval: ``live_start >= recv_ns - L``. This
  depends on the batch alone, so every consumer decides the same way whatever
  its timer ticks, and it guarantees that accepted data never falls into time
  already released to the engine (the watermark is always ``<= recv_ns - L``).
  Late batches are counted and returned to the caller, never merged silently;
  their interval is dead time for the engine.
* **gaps** — a jump in ``seq`` is a loss until the missing batch turns up.

The watermark ``W = now - L`` (rounded down to a multiple of ``quantum_ns``,
the engine's bin width, since the engine only judges whole bins) advances with
each arrival (and with :meth:`Orderer.release` on idle ticks); everything
before it is final and goes to the engine as one :class:`Block`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from tocsin.engine.block import Block
from tocsin.model.batch import NO_RECV, BatchColumns, HitBatch
from tocsin.types import GpsNs, I64Array

SEQ_MEMORY = 1 << 16
"""How many recent sequence numbers per site are remembered for duplicate detection."""


@dataclass(slots=True)
class SiteSeqState:
    """Sequence bookkeeping of one site: highest seq, recent seqs, open gaps."""

    max_seq: int = -1
    seen: set[int] = field(default_factory=set)
    missing: set[int] = field(default_factory=set)


@dataclass(frozen=True, slots=True)
class Verdict:
    """What became of one offered batch: ``accepted``, ``duplicate`` or ``late``."""

    status: str
    new_gaps: int = 0


_ACCEPTED = Verdict("accepted")
_DUPLICATE = Verdict("duplicate")
_LATE = Verdict("late")
"""Shared verdicts without new gaps (immutable; one batch after another gets them)."""


def _first(mask: np.ndarray, default: int) -> int:
    """Index of the first True in ``mask``; ``default`` when there is none."""
    k = int(mask.argmax()) if mask.size else 0
    return k if mask.size and mask[k] else default


class Orderer:
    """Reorders accepted batches into blocks behind a watermark ``now - lateness``."""

    def __init__(self, n_sites: int, *, lateness_ns: int, quantum_ns: int = 1) -> None:
        if lateness_ns < 0:
            raise ValueError(f"lateness_ns={lateness_ns} must be >= 0")
        if quantum_ns <= 0:
            raise ValueError(f"quantum_ns={quantum_ns} must be > 0")
        self.quantum_ns = quantum_ns
        self.n_sites = n_sites
        self.lateness_ns = lateness_ns
        self.watermark: GpsNs | None = None
        self._now: GpsNs | None = None
        self._pending: list[HitBatch | BatchColumns] = []
        """Accepted batches not yet released, in arrival order: single batches, and
        runs taken by :meth:`take_columns`."""
        self._seq = [SiteSeqState() for _ in range(n_sites)]
        self.n_duplicate = 0
        self.n_late = 0
        self.n_accepted = 0

    @property
    def now(self) -> GpsNs | None:
        """The latest arrival (or tick) time seen, GPS ns."""
        return self._now

    # -- intake ------------------------------------------------------------
    def offer(self, batch: HitBatch, recv_ns: GpsNs | None = None) -> Verdict:
        """Take one validated batch. ``recv_ns`` defaults to the batch's ``recv_ns``,
        else to its live end (arrival without delay)."""
        recv = recv_ns if recv_ns is not None else batch.recv_ns
        if recv is None:
            recv = batch.live_end
        now = recv if self._now is None else max(self._now, recv)
        self._now = now
        st = self._seq[batch.site_index]
        if batch.seq in st.seen or (batch.seq <= st.max_seq - SEQ_MEMORY):
            self.n_duplicate += 1
            return _DUPLICATE
        floor = now - self.lateness_ns
        if self.watermark is not None and self.watermark > floor:
            floor = self.watermark
        new_gaps = self._note_seq(st, batch.seq)
        if batch.live_start < floor:
            self.n_late += 1
            return Verdict("late", new_gaps) if new_gaps else _LATE
        self._pending.append(batch)
        self.n_accepted += 1
        return Verdict("accepted", new_gaps) if new_gaps else _ACCEPTED

    def take_columns(self, cols: BatchColumns, lo: int, hi: int) -> int:
        """Take the longest leading run of batches ``lo .. hi - 1`` of ``cols`` that
        :meth:`offer` would accept one by one with nothing else happening: no
        duplicate, no late batch, no new or filled gap (each site's ``seq`` one more
        than its last), no trimming of the remembered sequence numbers, and no
        arrival that would move the watermark (:meth:`release` returns None after
        each). Returns how many were taken (0 before the first release); the state is
        then exactly as after offering them one by one. Replay's bulk intake: a run
        of thousands of batches costs a few numpy passes instead of a Python call
        each."""
        m = hi - lo
        wm = self.watermark
        if m <= 0 or wm is None or self._now is None:
            return 0
        recv = cols.recv[lo:hi]
        now = np.maximum.accumulate(np.where(recv == NO_RECV, cols.live_end[lo:hi], recv))
        np.maximum(now, self._now, out=now)
        lag = now - self.lateness_ns
        stop = _first(lag - lag % self.quantum_ns > wm, m)  # would release
        stop = min(stop, _first(cols.live_start[lo:hi] < np.maximum(lag, wm), m))  # late
        if stop == 0:
            return 0
        sites = cols.site[lo : lo + stop]
        order = np.argsort(sites, kind="stable")
        ss, qs = sites[order], cols.seq[lo : lo + stop][order]
        head = np.ones(stop, dtype=bool)
        head[1:] = ss[1:] != ss[:-1]
        states = [self._seq[k] for k in ss[head].tolist()]
        last = np.array([st.max_seq for st in states], dtype=np.int64)
        expect = np.empty(stop, dtype=np.int64)
        expect[1:] = qs[:-1] + 1
        group = np.cumsum(head) - 1
        fresh = last[group] < 0  # a site's first batch ever: any seq, no gap
        expect[head] = last + 1
        bad = (qs != expect) & ~(head & fresh)
        # no trimming of remembered seqs inside the run (offer would trim midway)
        room = np.array([2 * SEQ_MEMORY - len(st.seen) for st in states], dtype=np.int64)
        rank = np.arange(stop) - np.flatnonzero(head)[group]  # position within its site
        bad |= rank >= room[group]
        if bad.any():  # the run ends before the first batch that needs a decision
            return self.take_columns(cols, lo, lo + int(order[bad].min()))
        self._pending.append(cols.rows(lo, lo + stop))
        self.n_accepted += stop
        self._now = int(now[stop - 1])
        firsts = qs[head].tolist()
        lasts = qs[np.r_[head[1:], True]].tolist()
        for st, a, b in zip(states, firsts, lasts, strict=True):
            st.seen.update(range(a, b + 1))
            st.max_seq = b
        return stop

    def _note_seq(self, st: SiteSeqState, seq: int) -> int:
        new_gaps = 0
        if seq > st.max_seq:
            if st.max_seq >= 0 and seq > st.max_seq + 1:
                gap = range(st.max_seq + 1, seq)
                new_gaps = len(gap)
                if new_gaps <= SEQ_MEMORY:
                    st.missing.update(gap)
            st.max_seq = seq
        else:
            st.missing.discard(seq)
        st.seen.add(seq)
        if len(st.seen) > 2 * SEQ_MEMORY:
            cut = st.max_seq - SEQ_MEMORY
            st.seen = {s for s in st.seen if s > cut}
            st.missing = {s for s in st.missing if s > cut}
        return new_gaps

    def open_gaps(self) -> dict[int, int]:
        """Per site index: number of sequence numbers still missing."""
        return {k: len(s.missing) for k, s in enumerate(self._seq) if s.missing}

    # -- release -----------------------------------------------------------
    def release(self, now_ns: GpsNs | None = None) -> Block | None:
        """Advance the watermark to ``now - lateness`` and return the data now final.

        Returns None when the watermark did not move. ``now_ns`` defaults to the
        latest arrival time seen. At the end of a recording call :meth:`flush`.
        """
        now = self._now if now_ns is None else max(now_ns, self._now or now_ns)
        if now is None:
            return None
        self._now = now
        w = now - self.lateness_ns
        w -= w % self.quantum_ns
        if self.watermark is not None and w <= self.watermark:
            return None  # the watermark does not move (most arrivals)
        return self._release_to(w)

    def data_end(self) -> GpsNs | None:
        """The latest of the watermark and the end of any pending live interval (ns)."""
        end = self._pending_end()
        if self.watermark is not None:
            end = self.watermark if end is None else max(end, self.watermark)
        return end

    def _pending_end(self) -> GpsNs | None:
        """The latest live end of the pending batches (None: nothing pending)."""
        ends: list[int] = []
        for p in self._pending:
            if type(p) is HitBatch:
                ends.append(p.live_end)
            elif len(p):
                ends.append(int(p.live_end.max()))  # type: ignore[union-attr]
        return GpsNs(max(ends)) if ends else None

    def release_through(self, w: GpsNs) -> Block | None:
        """Advance the watermark to ``w`` (rounded down to the quantum) with no new data."""
        return self._release_to(GpsNs(w - w % self.quantum_ns))

    def flush(self) -> Block | None:
        """Release everything pending (end of input)."""
        end = self._pending_end()
        return None if end is None else self._release_to(end)

    def _columns(self) -> BatchColumns:
        """Every pending batch, in arrival order, as one column set."""
        groups: list[BatchColumns] = []
        singles: list[HitBatch] = []
        for p in self._pending:
            if type(p) is HitBatch:
                singles.append(p)
                continue
            if singles:
                groups.append(BatchColumns.of(singles))
                singles = []
            groups.append(p)  # type: ignore[arg-type]
        if singles or not groups:
            groups.append(BatchColumns.of(singles))
        return BatchColumns.join(groups)

    def _release_to(self, w: GpsNs) -> Block | None:
        c: BatchColumns | None = None
        if self.watermark is None:
            if not self._pending:
                return None
            c = self._columns()
            self.watermark = GpsNs(int(c.live_start.min()))
        if w <= self.watermark:
            return None
        w0 = self.watermark
        if c is None:
            c = self._columns()
        starts, ends, t = c.live_start, c.live_end, c.t
        taken = starts < w
        take_idx = np.flatnonzero(taken)
        ta = c.t_a[take_idx]
        # each taken batch's hits before w (all of them unless it straddles w)
        below = np.zeros(t.size + 1, dtype=np.int64)
        np.cumsum(t < w, out=below[1:])
        cut = ta + (below[c.t_b[take_idx]] - below[ta])
        sizes = cut - ta
        ls = c.site[take_idx].astype(np.int32)
        t_all = t[_ranges(ta, sizes)]
        s_all = np.repeat(ls, sizes)
        if t_all.size:
            order = np.argsort(t_all, kind="stable")
            t_all, s_all = t_all[order], s_all[order]
        # batches not begun by w stay pending, in arrival order; the rest of a batch
        # that straddles w follows them
        rest = ends[take_idx] > w
        keep_idx = np.concatenate([np.flatnonzero(~taken), take_idx[rest]])
        n_wait = keep_idx.size - int(rest.sum())
        keep_a = np.concatenate([c.t_a[keep_idx[:n_wait]], cut[rest]])
        keep_b = c.t_b[keep_idx]
        keep_sizes = keep_b - keep_a
        keep_start = starts[keep_idx]
        keep_start[n_wait:] = w
        kept_t_b = np.cumsum(keep_sizes)
        kept = BatchColumns(
            c.site[keep_idx],
            c.seq[keep_idx],
            keep_start,
            ends[keep_idx],
            c.recv[keep_idx],
            kept_t_b - keep_sizes,
            kept_t_b,
            t[_ranges(keep_a, keep_sizes)],  # only the hits still pending
        )
        self._pending = [kept] if len(kept) else []
        self.watermark = w
        return Block(
            w0,
            w,
            t_all,
            s_all,
            ls,
            np.maximum(starts[take_idx], w0),
            np.minimum(ends[take_idx], w),
        )


def _ranges(start: I64Array, size: I64Array) -> I64Array:
    """Indices ``start[0] .. start[0] + size[0] - 1``, then those of the next range, ..."""
    total = int(size.sum())
    if total == 0:
        return np.zeros(0, dtype=np.int64)
    first = np.cumsum(size) - size
    out: I64Array = np.repeat(start - first, size) + np.arange(total, dtype=np.int64)
    return out
