"""Ordering stage + engine, fed one decoded batch at a time.

The single code path from batches to candidates: ``tocsin replay`` drives it from
a recording, the live service from MQTT, tuning from shifted recordings. Each
batch carries its arrival time (``recv_ns``); the watermark follows it, so the
same arrivals give the same blocks and the same candidates.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field

from tocsin.engine.block import Block
from tocsin.engine.core import Engine
from tocsin.io.recording import Rejected
from tocsin.model.batch import HitBatch
from tocsin.model.candidate import Candidate
from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry
from tocsin.ordering import Orderer
from tocsin.types import NS_PER_S


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

    def __init__(
        self,
        registry: SiteRegistry,
        cfg: EngineConfig,
        *,
        candidate_far_per_year: float | None = None,
        release_every_s: float | None = None,
    ) -> None:
        """``release_every_s``: how often data goes to the engine (default: every
        exposure bin, for the lowest latency). Replay uses longer blocks for speed;
        the engine's output does not depend on block length."""
        self.registry = registry
        self.engine = Engine(registry, cfg, candidate_far_per_year=candidate_far_per_year)
        self.orderer = Orderer(
            len(registry),
            lateness_ns=round(cfg.lateness_s * NS_PER_S),
            quantum_ns=self.engine.bin_ns
            * max(1, round((release_every_s or 0.0) / cfg.rate.bin_s)),
        )
        self.counters = IntakeCounters()
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
        c.hits_accepted += item.n_hits
        return self._run(self.orderer.release())

    def tick(self, now_ns: int) -> list[Candidate]:
        """Advance the watermark on an idle timer (live service)."""
        return self._run(self.orderer.release(now_ns))

    def finish(self) -> list[Candidate]:
        """End of input: release everything still pending."""
        return self._run(self.orderer.flush())

    def _run(self, block: Block | None) -> list[Candidate]:
        if block is None:
            return []
        return self.engine.process(block)
