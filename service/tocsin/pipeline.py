"""Ordering stage + engine, fed one decoded batch at a time (:meth:`Pipeline.offer`)
or many (:meth:`Pipeline.feed`, :meth:`Pipeline.offer_many`: the same result).

The single code path from batches to candidates: ``tocsin replay`` drives it from
a recording, the live service from MQTT (and from its journal after a restart),
tuning from shifted recordings. Each batch carries its arrival time (``recv_ns``);
the watermark follows it, so the same arrivals give the same blocks and the same
candidates.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import numpy as np

from tocsin.engine.block import Block
from tocsin.engine.core import Engine
from tocsin.io.line_scan import scan_block
from tocsin.io.line_scan import warm_up as warm_line_scan
from tocsin.io.recording import Rejected
from tocsin.model.batch import NO_RECV, BatchColumns, HitBatch
from tocsin.model.candidate import Candidate
from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry
from tocsin.ordering import Orderer
from tocsin.types import NS_PER_S, GpsNs

REPLAY_BLOCK_S = 16.0
"""Blocks handed to the engine (s) when a recording is replayed (replay, tuning): long
for speed; the candidates do not depend on it."""


class Fed(NamedTuple):
    """What one block of :meth:`Pipeline.feed` gave."""

    rejected: list[Rejected]
    """The block's lines that could not be used, in order."""
    candidates: list[Candidate]
    """New candidates, in the order the engine gave them."""
    last_recv_ns: int | None
    """The latest arrival time (GPS ns) among the block's batches that give one (None:
    none does)."""
    last_live_end_ns: int | None
    """The latest live end (GPS ns) among those same batches."""


@dataclass(slots=True)
class IntakeCounters:
    """What happened to every batch offered."""

    batches: int = 0
    accepted: int = 0
    rejected: Counter[str] = field(default_factory=Counter)
    hits_accepted: int = 0
    new_gaps: int = 0


class Pipeline:
    """Validated batches in, merged candidates out."""

    block_sink: Callable[[Block], None] | None = None
    """Called with every block before the engine sees it (the follow-up ring buffer);
    not pickled with the pipeline's checkpoint."""

    def __init__(
        self,
        registry: SiteRegistry,
        cfg: EngineConfig,
        *,
        candidate_far_per_year: float | None = None,
        release_every_s: float | None = None,
        threads: int = 1,
    ) -> None:
        """``release_every_s``: how often data goes to the engine (default: every
        exposure bin, for the lowest latency). Replay uses longer blocks for speed;
        the engine's output does not depend on block length, nor on ``threads``
        (the engine's, see :class:`~tocsin.engine.core.Engine`)."""
        self.registry = registry
        self.engine = Engine(
            registry, cfg, candidate_far_per_year=candidate_far_per_year, threads=threads
        )
        self.orderer = Orderer(
            len(registry),
            lateness_ns=round(cfg.lateness_s * NS_PER_S),
            quantum_ns=self.engine.bin_ns
            * max(1, round((release_every_s or 0.0) / cfg.rate.bin_s)),
        )
        self.counters = IntakeCounters()
        warm_line_scan()
        self.last_status = ""
        """What became of the last batch offered: accepted, duplicate, late or a
        rejection reason."""
        self.last_new_gaps = 0

    def offer(self, item: HitBatch | Rejected) -> list[Candidate]:
        """Take one decoded recording line or received message; return new candidates."""
        c = self.counters
        c.batches += 1
        self.last_new_gaps = 0
        if isinstance(item, Rejected):
            c.rejected[item.reason] += 1
            self.last_status = item.reason
            return []
        verdict = self.orderer.offer(item)
        c.new_gaps += verdict.new_gaps
        self.last_new_gaps = verdict.new_gaps
        self.last_status = verdict.status
        if verdict.status != "accepted":
            c.rejected[verdict.status if verdict.status == "late" else "duplicate_seq"] += 1
            return []
        c.accepted += 1
        c.hits_accepted += len(item.t)
        return self._run(self.orderer.release())

    def offer_many(self, items: Sequence[HitBatch | Rejected]) -> list[Candidate]:
        """:meth:`offer` each item in turn; the same candidates, counters and engine
        state. Runs of batches go through :meth:`offer_columns`."""
        out: list[Candidate] = []
        n = len(items)
        i = 0
        while i < n:
            j = i
            while j < n and type(items[j]) is HitBatch:
                j += 1
            if j > i:
                run = BatchColumns.of(items[i:j])  # type: ignore[arg-type]
                out += self.offer_columns(run, 0, j - i)
            if j < n:
                out += self.offer(items[j])
            i = j + 1
        return out

    def offer_columns(self, cols: BatchColumns, lo: int, hi: int) -> list[Candidate]:
        """:meth:`offer` batches ``lo .. hi - 1`` of ``cols`` in turn; the same
        candidates, counters and engine state. Runs the orderer can take without a
        decision of its own (:meth:`Orderer.take_columns`) are taken in one step;
        the batch that ends a run goes alone."""
        out: list[Candidate] = []
        c = self.counters
        while lo < hi:
            taken = self.orderer.take_columns(cols, lo, hi)
            if taken:
                c.batches += taken
                c.accepted += taken
                c.hits_accepted += int(
                    (cols.t_b[lo : lo + taken] - cols.t_a[lo : lo + taken]).sum()
                )
                self.last_status = "accepted"
                self.last_new_gaps = 0
                lo += taken
            else:
                out += self.offer(cols.batch(lo, self.registry.ids))
                lo += 1
        return out

    def feed(self, blocks: Iterable[tuple[bytes, int]]) -> Iterator[Fed]:
        """Replay's intake: blocks of recording lines in (``(data, first line
        number)``, whole lines separated by newlines: :func:`~tocsin.io.recording.
        read_blocks`), each read by one compiled pass
        (:func:`~tocsin.io.line_scan.scan_block`) and offered in line order, the plain
        batches through :meth:`offer_columns`; one :class:`Fed` per block. The same
        candidates, in the same order, as ``offer(decode_line(line))`` for every
        stripped, non-empty line. Call :meth:`finish` at the end of input."""
        for data, first_line_no in blocks:
            scan = scan_block(data, self.registry, first_line_no)
            cols = scan.cols
            out: list[Candidate] = []
            bad: list[Rejected] = []
            with_recv = cols.recv != NO_RECV
            recv = [int(cols.recv.max())] if with_recv.any() else []
            ends = [int(cols.live_end[with_recv].max())] if recv else []
            row = 0
            for pos, item in scan.others:
                upto = int(np.searchsorted(scan.row_pos, pos))
                out += self.offer_columns(cols, row, upto)
                row = upto
                if type(item) is Rejected:
                    bad.append(item)
                elif item.recv_ns is not None:  # type: ignore[union-attr]
                    recv.append(item.recv_ns)  # type: ignore[union-attr]
                    ends.append(item.live_end)  # type: ignore[union-attr]
                out += self.offer(item)
            out += self.offer_columns(cols, row, len(cols))
            yield Fed(bad, out, max(recv, default=None), max(ends, default=None))

    def tick(self, now_ns: int) -> list[Candidate]:
        """Advance the watermark on an idle timer (live service).

        A jump far past the data (input stopped, or a restart long after it) goes in
        the steps :meth:`finish` takes — to the end of the data, then
        :attr:`horizon_ns` further, then to ``now`` — so the windows that reach the
        data close exactly as in a replay of the same journal.
        """
        out: list[Candidate] = []
        end = self.orderer.data_end()
        target = now_ns - self.orderer.lateness_ns
        if end is not None and target > end + self.horizon_ns:
            out += self._run(self.orderer.release_through(end))
            out += self._run(self.orderer.release_through(GpsNs(end + self.horizon_ns)))
        out += self._run(self.orderer.release(GpsNs(now_ns)))
        return out

    def finish(self) -> list[Candidate]:
        """End of input: release everything still pending, then let time run on.

        A live service whose input stops keeps ticking, so every window that
        overlaps the end of the data still closes (with no live time after it).
        Replay does the same by advancing the watermark a further
        :attr:`horizon_ns`, past which no window reaches; so a replayed journal
        gives the candidates the live service gave.
        """
        out = self._run(self.orderer.flush())
        w = self.orderer.watermark
        if w is not None:
            out += self._run(self.orderer.release_through(GpsNs(w + self.horizon_ns)))
        return out

    @property
    def horizon_ns(self) -> int:
        """The longest excess window plus the longest coincidence scale plus two bins (ns)."""
        c: EngineConfig = self.engine.cfg
        longest = max(c.excess.scales_s) + max(c.coincidence.scales_s) + 2 * c.rate.bin_s
        return round(longest * NS_PER_S)

    def _run(self, block: Block | None) -> list[Candidate]:
        if block is None:
            return []
        if self.block_sink is not None:
            self.block_sink(block)
        return self.engine.process(block)

    def __getstate__(self) -> dict[str, Any]:
        state = dict(self.__dict__)
        state.pop("block_sink", None)
        return state
