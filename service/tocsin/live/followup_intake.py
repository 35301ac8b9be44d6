"""Outside alerts into the live service: MQTT topic, transport brokers, a watched directory.

Every packet, whatever its source, takes the same path:

1. refused at once (``too_large``) if longer than ``max_packet_bytes`` — before it is
   queued or parsed; refused (``queue_full``) if ``QUEUE_MAX`` packets already wait;
2. checked in a worker thread by :func:`tocsin.alerts.external.parse_external`
   (size, no DOCTYPE so no entity of any kind, depth, XSD), waited for at most
   ``parse_timeout_s`` (``timeout`` otherwise; with the size cap a parse takes
   milliseconds, so the limit only guards against the unforeseen);
3. offered to the :class:`~tocsin.alerts.followup_desk.FollowupDesk` (roles,
   authors, duplicates, updates, retractions).

A refusal is counted (``tocsin_external_packets{outcome=<reason>}``), logged, and
written to ``DATA_DIR/external_rejected.jsonl``; it never stops the service.
``DATA_DIR/followup_status.json`` holds the running counts.

Every second the due events are searched: the data is cut from the ring buffer on
the event loop, the search runs in a worker thread, and the answer is archived on
the event loop (the archive's SQLite connection stays in one thread); the alert
dispatcher then delivers it like our own alerts.
"""

from __future__ import annotations

import asyncio
import contextlib
import datetime as dt
import logging
from collections import Counter
from pathlib import Path
from typing import Any

import orjson
from prometheus_client import CollectorRegistry
from prometheus_client import Counter as PromCounter

from tocsin.alerts.external import ExternalRejected, parse_external
from tocsin.alerts.followup_desk import FollowupDesk
from tocsin.alerts.safexml import PacketRejected, XmlLimits
from tocsin.io.hitring import HitRing
from tocsin.live.logs import event
from tocsin.live.transport import TransportClient
from tocsin.model.followup_config import FollowupConfig

log = logging.getLogger("tocsin.followup")

QUEUE_MAX = 64
"""Outside packets waiting to be parsed, at most."""
POLL_S = 1.0
"""Due searches and the watched directory are looked at this often (s)."""


class FollowupIntake:
    """Owns the follow-up sources and the search loop of one service."""

    def __init__(
        self,
        cfg: FollowupConfig,
        desk: FollowupDesk,
        ring: HitRing,
        data_dir: Path,
        registry: CollectorRegistry,
    ) -> None:
        self.cfg = cfg
        self.desk = desk
        self.ring = ring
        self.limits = XmlLimits(max_bytes=cfg.max_packet_bytes)
        self.queue: asyncio.Queue[tuple[bytes, str]] = asyncio.Queue(maxsize=QUEUE_MAX)
        self.counts: Counter[str] = Counter()
        self.rejected_path = data_dir / "external_rejected.jsonl"
        self.status_path = data_dir / "followup_status.json"
        self.metric = PromCounter(
            "tocsin_external_packets",
            "Outside alert packets, by outcome (accepted, or the reason they were refused)",
            ["outcome"],
            registry=registry,
        )
        self.answers = PromCounter(
            "tocsin_followups", "Follow-up answers, by outcome", ["outcome"], registry=registry
        )
        self.wake: asyncio.Event | None = None
        """Set after each archived answer (the alert dispatcher's wake-up)."""

    # -- intake ----------------------------------------------------------------
    def offer_nowait(self, raw: bytes, source: str) -> None:
        """Queue a packet (from the MQTT loop); never blocks, never raises."""
        if len(raw) > self.cfg.max_packet_bytes:
            self._refuse(
                source, "too_large", f"{len(raw)} bytes; the cap is {self.cfg.max_packet_bytes}"
            )
            return
        try:
            self.queue.put_nowait((raw, source))
        except asyncio.QueueFull:
            self._refuse(source, "queue_full", f"{QUEUE_MAX} packets already waiting")

    async def submit(self, raw: bytes, source: str) -> str:
        """Check and offer one packet now; returns the outcome (``accepted`` or a reason)."""
        if len(raw) > self.cfg.max_packet_bytes:
            return self._refuse(
                source, "too_large", f"{len(raw)} bytes; the cap is {self.cfg.max_packet_bytes}"
            )
        try:
            ev = await asyncio.wait_for(
                asyncio.to_thread(parse_external, raw, limits=self.limits),
                self.cfg.parse_timeout_s,
            )
        except TimeoutError:
            return self._refuse(source, "timeout", f"not parsed in {self.cfg.parse_timeout_s} s")
        except (PacketRejected, ExternalRejected) as exc:
            return self._refuse(source, exc.reason, exc.detail, exc.ivorn)
        try:
            status = self.desk.offer(ev)
        except ExternalRejected as exc:
            return self._refuse(source, exc.reason, exc.detail, exc.ivorn)
        self._count("accepted")
        event(log, "external_packet", source=source, ivorn=ev.ivorn, status=status)
        if status == "retracted" and self.wake is not None:
            self.wake.set()
        self._status()
        return "accepted"

    def _refuse(self, source: str, reason: str, detail: str, ivorn: str | None = None) -> str:
        self._count(reason)
        event(
            log,
            "external_refused",
            logging.WARNING,
            source=source,
            reason=reason,
            detail=detail[:300],
            ivorn=ivorn,
        )
        rec = {
            "recv_utc": dt.datetime.now(dt.UTC).isoformat(timespec="microseconds"),
            "source": source,
            "reason": reason,
            "detail": detail[:500],
            "ivorn": ivorn,
        }
        with open(self.rejected_path, "ab") as fh:
            fh.write(orjson.dumps(rec) + b"\n")
        self._status()
        return reason

    def _count(self, outcome: str) -> None:
        self.counts[outcome] += 1
        self.metric.labels(outcome).inc()

    def _status(self) -> None:
        obj: dict[str, Any] = {
            "packets": dict(sorted(self.counts.items())),
            "desk": dict(sorted(self.desk.counters.items())),
            "ring_start_gps_ns": self.ring.t_start,
            "ring_end_gps_ns": self.ring.t_end,
            "ring_bytes": self.ring.nbytes(),
        }
        tmp = self.status_path.with_suffix(".tmp")
        tmp.write_bytes(orjson.dumps(obj, option=orjson.OPT_INDENT_2))
        tmp.replace(self.status_path)

    # -- the tasks -----------------------------------------------------------------
    async def run(self, stop: asyncio.Event) -> None:
        """Parse queued packets, poll the directory, run due searches, until ``stop``."""
        clients = [
            TransportClient(r.host, r.port, self._from_transport, limits=self.limits)
            for r in self.cfg.remotes
        ]
        for c in clients:
            await c.start()
        worker = asyncio.create_task(self._worker(), name="followup-parse")
        self._status()
        try:
            while not stop.is_set():
                try:
                    await self._poll_directory()
                    await self.search_due()
                except Exception as exc:  # one bad search must not stop the service
                    event(log, "followup_error", logging.ERROR, error=repr(exc))
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(stop.wait(), POLL_S)
        finally:
            worker.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await worker
            for c in clients:
                await c.stop()

    async def _worker(self) -> None:
        while True:
            raw, source = await self.queue.get()
            try:
                await self.submit(raw, source)
            except Exception as exc:  # never let one packet end the worker
                self._refuse(source, "not_xml", f"unexpected error: {exc!r}")

    async def _from_transport(self, raw: bytes, voevent: Any) -> None:
        await self.submit(raw, "vtp")

    async def _poll_directory(self) -> None:
        d = self.cfg.directory
        if d is None or not d.is_dir():
            return
        for p in sorted(d.glob("*.xml")):
            size = p.stat().st_size
            src = f"dir:{p.name}"
            if size > self.cfg.max_packet_bytes:
                outcome = self._refuse(
                    src, "too_large", f"{size} bytes; the cap is {self.cfg.max_packet_bytes}"
                )
            else:
                outcome = await self.submit(p.read_bytes(), src)
            dest = d / ("done" if outcome == "accepted" else "refused")
            dest.mkdir(exist_ok=True)
            p.replace(dest / p.name)

    async def search_due(self) -> int:
        """Answer every due event; returns how many were answered."""
        n = 0
        for key, has_data in self.desk.due(self.ring.t_start, self.ring.t_end):
            if not has_data:
                row = self.desk.answer(
                    key,
                    None,
                    note="the event time lies before the oldest data this service holds "
                    f"({self.cfg.buffer_hours:g} h ring buffer)",
                )
            else:
                lo, hi = self.desk.span_needed(key, self.ring.t_start or 0)
                block = self.ring.block(lo, hi)
                result = await asyncio.to_thread(self.desk.search, key, block)
                row = self.desk.answer(key, result)
            n += 1
            outcome = "no_data" if not has_data else "searched"
            self.answers.labels(outcome).inc()
            event(
                log,
                "followup_answer",
                external_ivorn=key,
                followup_ivorn=None if row is None else row.ivorn,
                has_data=has_data,
            )
            if self.wake is not None:
                self.wake.set()
            self._status()
        return n
