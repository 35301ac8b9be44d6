"""``tocsin serve``: MQTT in, the same pipeline as replay, candidates out.

What happens to a message on ``{root}/site/<id>/hits``:

1. refused with a reason if larger than ``max_message_bytes``, not JSON, or not
   a valid v1 batch of that topic's site (counted by reason, logged to
   ``rejected.jsonl``, acknowledged — a bad message is never redelivered);
2. given its *arrival time* ``recv = max(previous recv, last tick,
   min(wall clock, batch end))`` — after a restart the broker's backlog is
   data that was on time when it reached the broker, so it is taken as such
   instead of being thrown away as late; the journal records this value, so
   replaying the journal decides exactly as the live service did;
3. appended to the journal, which is fsynced in group commits (every 50 ms);
   only then is the MQTT message acknowledged (paho's manual acknowledgement:
   a crash before that makes the broker send it again, and the ordering stage
   drops the repeat by ``seq``);
4. offered to the :class:`~tocsin.pipeline.Pipeline`; new candidates go first to
   the alert policy (an alert is archived in ``alerts.sqlite`` before anything is
   sent; :mod:`tocsin.live.alert_dispatch` delivers it), then to ``candidates.jsonl``
   (an id and revision is written once, ever).

Idle ticks advance the watermark by the wall clock once the service has caught
up with real time. A checkpoint (pipeline + journal position) is written every
``CHECKPOINT_EVERY_S`` and on SIGTERM; at start the service loads it and replays
the journal after it, so a restart resumes with every rate estimate, and a
crash loses nothing that was acknowledged.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import math
import random
import ssl
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import aiomqtt
import numpy as np
import orjson

from tocsin.alerts.archive import Archive
from tocsin.alerts.policy import AlertDesk
from tocsin.engine.core import default_threads
from tocsin.engine.sky import ecef_unit_to_radec
from tocsin.errors import BatchRejected
from tocsin.gpstime import gps_now_ns
from tocsin.io import checkpoint
from tocsin.io.journal import Journal, prune, read_from, segments
from tocsin.io.recording import join_lines
from tocsin.live import topics
from tocsin.live.alert_dispatch import AlertDispatcher
from tocsin.live.followup_wiring import followup_for, refill_ring, start_followup
from tocsin.live.logs import event
from tocsin.live.metrics import Metrics
from tocsin.live.transport import AllowedNetwork, TransportServer
from tocsin.model.batch import parse_batch
from tocsin.model.candidate import Candidate
from tocsin.model.registry import SiteRegistry
from tocsin.model.service_config import BrokerConfig, ServiceConfig
from tocsin.pipeline import Pipeline
from tocsin.types import NS_PER_S

log = logging.getLogger("tocsin.serve")

SYNC_EVERY_S = 0.05
"""Group commit: the journal is fsynced (and messages acknowledged) this often (s)."""
TICK_EVERY_S = 0.25
"""Idle ticks advance the watermark this often (s)."""
IDLE_TICK_AFTER_S = 10.0
"""After this long (s) of waiting with no message, ticks advance the watermark even
when the data are behind the wall clock (input stopped)."""
RELEASE_SLACK_S = 0.002
"""A boundary tick waits this much (s) past the release boundary it is for."""
STALL_S = 0.5
"""An iteration of the message loop taking this much (s) beyond a tick is a stall, or half
the lateness allowance if that is longer: a batch is published within about a second of
its end, so one left unread for less than half the allowance cannot be made late by a
tick that overtakes it (the engine's own work on a block, ~0.5 s at 100,000 hits/s, is
then no stall, and the next release boundary's tick is not held back)."""
CHECKPOINT_EVERY_S = 300.0
REBUILD_S = 7200.0
"""Without a checkpoint, this much recent journal (s) is replayed at start."""
MAX_FUTURE_S = 60.0
"""A batch starting this far (s) after the service's clock is refused: a site clock is wrong."""
QUEUE_MAX = 20_000
"""Messages waiting for the pipeline; beyond this the reader waits (the broker holds the rest)."""
REJECTED_LOG_BYTES = 64 * 1024 * 1024
"""``rejected.jsonl`` is moved to ``rejected.jsonl.1`` (replacing an older one) when it
reaches this size: a site that keeps sending bad batches cannot fill the disk. The
counts stay in the metrics."""


class Service:
    """The service's state and its synchronous message handling (no I/O waits)."""

    def __init__(self, cfg: ServiceConfig, *, clock: Callable[[], int] = gps_now_ns) -> None:
        self.cfg = cfg
        self.broker = cfg.broker or BrokerConfig()
        self.root = self.broker.topic_root
        self.registry = SiteRegistry.from_toml(cfg.registry)
        self.clock = clock
        self.metrics = Metrics()
        data = cfg.data_dir
        data.mkdir(parents=True, exist_ok=True)
        self.journal = Journal(data / "journal")
        self.ckpt_path = data / "checkpoint.pickle"
        self.cand_path = data / "candidates.jsonl"
        self._written = _written_keys(self.cand_path)
        self._cand_fh = open(self.cand_path, "ab")  # noqa: SIM115 - closed in close()
        self.rej_path = data / "rejected.jsonl"
        self._rej_fh = open(self.rej_path, "ab")  # noqa: SIM115
        self.key = checkpoint.state_key(self.registry, cfg.engine)
        self.lateness_ns = round(cfg.engine.lateness_s * NS_PER_S)
        self._last_recv = 0
        self._last_tick = 0
        self._max_live_end = 0
        self._last_ckpt = time.monotonic()
        self.listeners: list[Callable[[Candidate], None]] = []
        """Called with every candidate written (the demo's display)."""
        a = cfg.alerts
        self.archive = Archive(data / "alerts.sqlite", stream=a.stream_ivorn, role=a.role)
        self.packet_dir = a.directory or data / "alerts"
        subscribers = [e.name for e in a.transport.allow] if a.transport is not None else []
        self.desk = AlertDesk(
            a, self.archive, packet_dir=self.packet_dir, mqtt=True, subscribers=subscribers
        )
        self.dispatcher = AlertDispatcher(
            self.archive, self.packet_dir, topics.alerts_topic(self.root), self.metrics
        )
        self.transport: TransportServer | None = None
        self.followup = followup_for(self)  # before _restore: the ring takes the journal too
        self.pipeline = self._restore()
        # astropy loads its Earth-orientation tables on the first sky transform (~0.5 s):
        # do it now, not when the first candidate's direction is fitted
        ecef_unit_to_radec(np.array([0.0, 0.0, 1.0]), self.clock())

    # -- start and stop ------------------------------------------------------
    def _restore(self) -> Pipeline:
        ck = checkpoint.load(self.ckpt_path, self.key)
        pipe = ck.pipeline if ck is not None else Pipeline(self.registry, self.cfg.engine)
        pipe.engine.threads = self.cfg.engine_threads or default_threads()
        pipe.block_sink = self.followup.ring.add if self.followup is not None else None
        w_ck = pipe.orderer.watermark
        if ck is not None and self.followup is not None and w_ck is not None:
            # the ring is not checkpointed: the journal of before it, up to where the
            # restored pipeline's blocks begin (as after a restart without one)
            refill_ring(
                self.followup,
                self.journal.directory,
                self.registry,
                since_ns=self.clock() - round(REBUILD_S * NS_PER_S),
                upto_ns=w_ck,
                lateness_ns=self.lateness_ns,
                quantum_ns=pipe.orderer.quantum_ns,
            )
        offered_before = pipe.counters.batches
        # Without a checkpoint, the last two background stretches rebuild every rate
        # estimate; older journal (months of it) is not needed.
        since = None if ck is not None else self.clock() - round(REBUILD_S * NS_PER_S)
        lines = read_from(self.journal.directory, ck.position if ck else None, since_ns=since)
        for fed in pipe.feed(join_lines(lines)):  # as replay reads it
            if fed.last_recv_ns is not None and fed.last_live_end_ns is not None:
                self._last_recv = max(self._last_recv, fed.last_recv_ns)
                self._max_live_end = max(self._max_live_end, fed.last_live_end_ns)
            self._write(fed.candidates, live=False)
        n = pipe.counters.batches - offered_before
        now = pipe.orderer.now or 0
        self._last_recv = max(self._last_recv, now)
        self._max_live_end = max(self._max_live_end, now)
        rates = pipe.engine.last_rates_hz
        event(
            log,
            "restored",
            checkpoint=ck is not None,
            journal_lines_replayed=n,
            watermark=pipe.orderer.watermark,
            sites_with_rates=0 if rates is None else int(np.count_nonzero(rates)),
        )
        return pipe

    def save_checkpoint(self) -> None:
        """Sync the journal and write the checkpoint (between messages only)."""
        self.journal.sync()
        checkpoint.save(
            self.ckpt_path, checkpoint.Checkpoint(self.pipeline, self.journal.position, self.key)
        )
        self._last_ckpt = time.monotonic()
        self.metrics.checkpoints.inc()
        keep_days = self.cfg.journal_keep_days
        if keep_days > 0:
            cutoff = self.clock() - round(keep_days * 86_400 * NS_PER_S)
            gone = prune(self.journal.directory, before_ns=cutoff, keep=self.journal.position)
            if gone:
                self.metrics.journal_segments_deleted.inc(len(gone))
                event(
                    log,
                    "journal_pruned",
                    segments=len(gone),
                    keep_days=keep_days,
                    last=gone[-1].name,
                )
        self.metrics.journal_bytes.set(
            sum(seg.stat().st_size for seg in segments(self.journal.directory))
        )

    def close(self) -> None:
        self.archive.close()
        self.journal.close()
        self._cand_fh.close()
        self._rej_fh.close()

    # -- messages ------------------------------------------------------------
    def on_hits(self, topic_site: str, payload: bytes) -> bool:
        """Handle one hits message. Returns True if it was journaled (ack after sync)."""
        wall = self.clock()
        if len(payload) > self.broker.max_message_bytes:
            self._reject(
                topic_site,
                "too_large",
                "<payload>",
                f"{len(payload)} bytes exceed {self.broker.max_message_bytes}",
                wall,
            )
            return False
        try:
            obj = orjson.loads(payload)
        except orjson.JSONDecodeError as exc:
            self._reject(topic_site, "bad_json", "<payload>", f"not JSON: {exc}", wall)
            return False
        try:
            batch = parse_batch(obj, self.registry, topic_site=topic_site)
        except BatchRejected as exc:
            self._reject(topic_site, exc.reason, exc.field, exc.detail, wall)
            return False
        if batch.live_start > wall + MAX_FUTURE_S * NS_PER_S:
            ahead_s = (batch.live_start - wall) / NS_PER_S
            self._reject(
                topic_site,
                "future",
                "live",
                f"live interval starts {ahead_s:.1f} s after the service's clock",
                wall,
            )
            return False
        recv = max(self._last_recv, self._last_tick, min(wall, batch.live_end))
        self._last_recv = recv
        self._max_live_end = max(self._max_live_end, batch.live_end)
        batch = batch._replace(recv_ns=recv)
        self.journal.append(orjson.dumps(batch.to_json_obj()), recv)
        self.metrics.journal_lines.inc()
        cands = self.pipeline.offer(batch)
        status = self.pipeline.last_status
        site = batch.site
        m = self.metrics
        if status == "accepted":
            m.batches.labels(site).inc()
            m.hits.labels(site).inc(batch.n_hits)
        elif status == "duplicate":
            m.duplicates.labels(site).inc()
        elif status == "late":
            m.late.labels(site).inc()
        if self.pipeline.last_new_gaps:
            m.gaps.labels(site).inc(self.pipeline.last_new_gaps)
        m.live.labels(site).set(1)
        self._write(cands, live=True)
        return True

    def on_status(self, topic_site: str, payload: bytes) -> None:
        """A site's agent status (retained; the last will says offline)."""
        if topic_site not in self.registry:
            return
        try:
            obj = orjson.loads(payload)
        except orjson.JSONDecodeError:
            return
        state = obj.get("state") if isinstance(obj, dict) else None
        if state in ("online", "offline", "spooling"):
            self.metrics.live.labels(topic_site).set(0 if state == "offline" else 1)
            event(log, "site_status", site=topic_site, state=state)

    def tick(self, quiet_s: float = math.inf) -> None:
        """Advance the watermark by the wall clock when caught up, or after ``quiet_s``
        (s) of the event loop waiting with no message arriving exceeds the idle limit."""
        wall = self.clock()
        behind = wall - self._max_live_end > self.lateness_ns + NS_PER_S
        idle = quiet_s > IDLE_TICK_AFTER_S
        if behind and not idle:
            return
        self._last_tick = max(self._last_tick, wall)
        self._write(self.pipeline.tick(wall), live=True)

    def release_step(self) -> int:
        """How many release quanta of the wall clock minus the lateness allowance
        have begun (the watermark steps by a quantum, normally one bin)."""
        q = self.pipeline.orderer.quantum_ns
        return (self.clock() - self.lateness_ns) // q

    def until_release_s(self) -> float:
        """Wall-clock seconds until :meth:`release_step` next increases."""
        q = self.pipeline.orderer.quantum_ns
        return (q - (self.clock() - self.lateness_ns) % q) / NS_PER_S

    def refresh_gauges(self) -> None:
        """Processing lag and per-site rate estimates (called about once a second)."""
        wm = self.pipeline.orderer.watermark
        if wm is not None:
            self.metrics.lag.set((self.clock() - wm) / NS_PER_S)
        tr = self.transport
        if tr is not None:
            self.metrics.transport_subscribers.set(len(tr.connected()))
            c = tr.counters
            for k in ("accepted", "refused", "sent", "acked", "naked", "timed_out", "overflows"):
                self.metrics.transport_totals.labels(k).set(getattr(c, k))
            for reason, n in c.disconnects.items():
                self.metrics.transport_totals.labels(f"disconnect_{reason}").set(n)
        est = self.pipeline.engine.last_rates_hz
        if est is not None:
            for sid, r in zip(self.registry.ids, est, strict=True):
                self.metrics.rate.labels(sid).set(float(r))

    def _reject(self, site: str, reason: str, field: str, detail: str, wall: int) -> None:
        self.metrics.rejected.labels(reason).inc()
        rec = {
            "recv_ns": wall,
            "topic_site": site,
            "reason": reason,
            "field": field,
            "detail": detail[:500],
        }
        self._rej_fh.write(orjson.dumps(rec) + b"\n")
        if self._rej_fh.tell() >= REJECTED_LOG_BYTES:
            self._rej_fh.close()
            self.rej_path.replace(self.rej_path.with_name(self.rej_path.name + ".1"))
            self._rej_fh = open(self.rej_path, "ab")  # noqa: SIM115 - closed in close()

    def _write(self, cands: list[Candidate], *, live: bool) -> None:
        if not cands:
            return
        wall = self.clock()
        for c in cands:
            k = (c.id, c.revision)
            if k in self._written:
                continue
            # archive the alert before the candidate line: a crash between the two
            # writes the line again at restart, and the alert exists once (by IVORN)
            try:
                alert = self.desk.consider(c)
            except Exception as exc:  # an alert that cannot be made must not stop intake
                self.metrics.alerts.labels("error", "-", "failed").inc()
                event(log, "alert_failed", logging.ERROR, id=c.id, error=repr(exc))
                alert = None
            if alert is not None:
                self.metrics.alerts.labels(alert.kind, alert.level, alert.status).inc()
                self.dispatcher.wake.set()
                event(
                    log,
                    "alert",
                    logging.WARNING if alert.status == "held" else logging.INFO,
                    ivorn=alert.ivorn,
                    kind=alert.kind,
                    alert_level=alert.level,
                    status=alert.status,
                    far_per_year=alert.far_per_year,
                )
            self._written.add(k)
            self._cand_fh.write(c.to_json_line())
            for listener in self.listeners:
                listener(c)
            self.metrics.candidates.labels(c.trigger, c.statistic).inc()
            ready = c.details.get("ready_gps_ns")
            if live and isinstance(ready, int):
                self.metrics.latency.observe(max(wall - ready, 0) / NS_PER_S)
            event(
                log,
                "candidate",
                id=c.id,
                revision=c.revision,
                trigger=c.trigger,
                statistic=c.statistic,
                far_per_year=c.far_per_year,
                sites=len(c.sites),
            )
        self._cand_fh.flush()

    # -- the MQTT loop -------------------------------------------------------
    async def run(self, stop: asyncio.Event) -> None:
        """Connect, consume and reconnect until ``stop`` is set; then checkpoint."""
        backoff = 0.5
        self.transport = await self._start_transport()
        deliver = asyncio.create_task(self.dispatcher.run(stop), name="alert-dispatch")
        fu = start_followup(self, stop)
        try:
            while not stop.is_set():
                client = self._client()
                # acknowledge only after the journal is synced (see module doc)
                client._client.manual_ack_set(True)
                try:
                    async with client:
                        self.metrics.connected.set(1)
                        event(log, "connected", broker=self.broker.url)
                        backoff = 0.5
                        await client.subscribe(topics.all_hits_filter(self.root), qos=1)
                        await client.subscribe(topics.all_status_filter(self.root), qos=1)
                        if self.followup is not None and self.cfg.followup.mqtt:
                            await client.subscribe(topics.external_topic(self.root), qos=1)
                        self.dispatcher.client = client
                        self.dispatcher.wake.set()
                        try:
                            await self._consume(client, stop)
                        finally:
                            self.dispatcher.client = None
                except aiomqtt.MqttError as exc:
                    self.metrics.connected.set(0)
                    event(
                        log,
                        "broker_unreachable",
                        logging.WARNING,
                        error=str(exc),
                        retry_in_s=round(backoff, 2),
                    )
                    with contextlib.suppress(TimeoutError):
                        await asyncio.wait_for(stop.wait(), backoff)
                    backoff = min(backoff * 2, 30.0) * random.uniform(0.8, 1.2)
        finally:
            self.metrics.connected.set(0)
            stop.set()
            with contextlib.suppress(asyncio.CancelledError):
                await deliver
            if self.transport is not None:
                await self.transport.close()
            if fu is not None:
                with contextlib.suppress(asyncio.CancelledError):
                    await fu
            self.save_checkpoint()
            event(log, "stopped", checkpoint=str(self.ckpt_path))

    async def _start_transport(self) -> TransportServer | None:
        """The VOEvent transport server for subscribers, if configured (port 0: none)."""
        t = self.cfg.alerts.transport
        if t is None or not t.port or not t.allow:
            return None
        server = TransportServer(
            origin=self.cfg.alerts.stream_ivorn,
            allow=[AllowedNetwork.parse(e.name, e.network) for e in t.allow],
            host=t.host,
            port=t.port,
            idle_s=t.idle_s,
            reply_timeout_s=t.ack_timeout_s,
            on_result=self.dispatcher.on_result,
            on_connect=lambda name: self.dispatcher.wake.set(),
        )
        await server.start()
        self.dispatcher.server = server
        event(log, "transport_listening", host=t.host, port=server.port)
        return server

    def _client(self) -> aiomqtt.Client:
        b = self.broker
        tls: ssl.SSLContext | None = None
        if b.tls:
            tls = ssl.create_default_context(cafile=str(b.ca_file) if b.ca_file else None)
            if b.cert_file is not None:
                tls.load_cert_chain(str(b.cert_file), str(b.key_file) if b.key_file else None)
        return aiomqtt.Client(
            b.host,
            b.port,
            identifier=b.client_id,
            username=b.username,
            password=b.password,
            keepalive=b.keepalive_s,
            clean_session=False,
            tls_context=tls,
            max_queued_incoming_messages=QUEUE_MAX,
        )

    async def _consume(self, client: aiomqtt.Client, stop: asyncio.Event) -> None:
        queue: asyncio.Queue[aiomqtt.Message] = asyncio.Queue(maxsize=QUEUE_MAX)

        async def reader() -> None:
            async for msg in client.messages:
                await queue.put(msg)

        pending: list[tuple[int, int]] = []
        last_sync = last_tick = last_gauges = time.monotonic()
        task = asyncio.create_task(reader(), name="mqtt-reader")
        # Ticks move the watermark by the wall clock, so they must never overtake
        # messages that are still unread. After the loop was held up (a long
        # computation anywhere in it), messages may wait in the socket or the
        # client while our queue looks empty: ticks pause until a wait of a full
        # TICK_EVERY_S passes with nothing arriving. ``quiet`` adds up such waits.
        # Besides every TICK_EVERY_S, a tick falls just after the wall clock takes the
        # watermark across a release boundary (the end of a bin plus the lateness
        # allowance): the bin's windows close then, not when the next batch arrives.
        stalled = False
        quiet = 0.0
        tick_step = self.release_step()
        stall_s = max(TICK_EVERY_S + STALL_S, self.lateness_ns / NS_PER_S / 2)
        try:
            while True:
                if stop.is_set():
                    while not queue.empty():
                        self._dispatch(client, queue.get_nowait(), pending)
                    break
                t_wait = time.monotonic()
                try:
                    timeout = min(TICK_EVERY_S, self.until_release_s() + RELEASE_SLACK_S)
                    msg = await asyncio.wait_for(queue.get(), timeout)
                    self._dispatch(client, msg, pending)
                    quiet = 0.0
                except TimeoutError:
                    waited = time.monotonic() - t_wait
                    if waited < stall_s:
                        if waited >= TICK_EVERY_S:
                            stalled = False
                        quiet += waited
                    else:  # the loop was held up during the wait itself
                        stalled = True
                if task.done():  # connection lost: re-raise its MqttError
                    task.result()
                now = time.monotonic()
                if pending and (now - last_sync >= SYNC_EVERY_S or len(pending) >= 1000):
                    self._sync_and_ack(client, pending)
                    last_sync = now
                step_now = self.release_step()
                due = now - last_tick >= TICK_EVERY_S or step_now > tick_step
                if queue.empty() and not stalled and due:
                    self.tick(quiet)
                    last_tick = now
                    tick_step = step_now
                if now - last_gauges >= 1.0:
                    self.refresh_gauges()
                    last_gauges = now
                if now - self._last_ckpt >= CHECKPOINT_EVERY_S:
                    self._sync_and_ack(client, pending)
                    self.save_checkpoint()
                if time.monotonic() - t_wait > stall_s:
                    stalled = True  # this iteration's own work held the loop up
        finally:
            self._sync_and_ack(client, pending)
            task.cancel()
            with contextlib.suppress(asyncio.CancelledError, aiomqtt.MqttError):
                await task

    def _dispatch(
        self, client: aiomqtt.Client, msg: aiomqtt.Message, pending: list[tuple[int, int]]
    ) -> None:
        parsed = topics.site_of(self.root, msg.topic.value)
        payload = msg.payload if isinstance(msg.payload, bytes) else str(msg.payload).encode()
        journaled = False
        if self.followup is not None and msg.topic.value == topics.external_topic(self.root):
            self.followup.offer_nowait(payload, "mqtt")
        elif parsed is None:
            self._reject(
                "?", "bad_topic", "<topic>", f"unexpected topic {msg.topic.value!r}", self.clock()
            )
        elif parsed[1] == "hits":
            journaled = self.on_hits(parsed[0], payload)
        else:
            self.on_status(parsed[0], payload)
        if msg.qos > 0:
            if journaled:
                pending.append((msg.mid, msg.qos))
            else:
                _ack(client, msg.mid, msg.qos)

    def _sync_and_ack(self, client: aiomqtt.Client, pending: list[tuple[int, int]]) -> None:
        if not pending:
            return
        self.journal.sync()
        for mid, qos in pending:
            _ack(client, mid, qos)
        pending.clear()


def _ack(client: aiomqtt.Client, mid: int, qos: int) -> None:
    with contextlib.suppress(Exception):  # the connection may be gone: the broker resends
        client._client.ack(mid, qos)


def _written_keys(path: Path) -> set[tuple[str, int]]:
    """(id, revision) of every candidate already in ``candidates.jsonl``."""
    out: set[tuple[str, int]] = set()
    if not path.is_file():
        return out
    with open(path, "rb") as fh:
        for line in fh:
            try:
                obj: Any = orjson.loads(line)
                out.add((str(obj["id"]), int(obj.get("revision", 1))))
            except (orjson.JSONDecodeError, KeyError, TypeError, ValueError):
                continue
    return out
