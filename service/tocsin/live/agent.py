"""The site agent: one site's hits -> hit batches v1 -> disk spool -> MQTT (QoS 1).

Batches (contract §3): :class:`Cutter` cuts the hit stream into contiguous
``live`` intervals on a GPS-aligned grid of ``batch_s`` (earlier when
``max_batch_hits`` is reached), with empty batches as heartbeats. Live time has
an explicit gap — one batch's end before the next one's start — wherever the
agent did not run, the source was down or stalled, or the spool was full.

Delivery: every batch goes to the :class:`~tocsin.live.spool.Spool` first
(fsynced, group commits), then is published at QoS 1 to
``{root}/site/{site}/hits`` in seq order, a few at a time, and leaves the spool
only when the broker has acknowledged it. After a reconnect the spool is sent
again from its oldest unacknowledged batch, so batches reach the broker in seq
order (repeats possible; receivers de-duplicate by ``seq``). ``seq`` is the
spool's record number, so it continues across restarts and is never reused,
and a batch the full spool refuses takes no seq (a gap in live time, not a
jump in seq).

Status: retained JSON on ``{root}/site/{site}/status``, ``state`` ``online``,
``spooling`` (connected, still sending batches held while offline) or
``offline`` (the last will, and the clean exit), at each connect, each change
and every ``status_every_s``. The will is registered at connect time, so its
``t_gps_ns``, ``spooled`` and ``seq`` are those of the moment of connecting.

Caveat: over MQTT 3.1.1 a broker also acknowledges a publish that its ACL
refuses (and drops it). A site whose credentials may not write its own hits
topic therefore loses batches silently: check the ACL when a site is set up.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import random
import ssl
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any

import aiomqtt
import numpy as np
import orjson

from tocsin import __version__
from tocsin.gpstime import gps_now_ns
from tocsin.live.logs import event
from tocsin.live.sources import HitSource, RealtimeSource, UploadSource
from tocsin.live.spool import Spool, SpoolError
from tocsin.live.topics import hits_topic, status_topic, valid_site_id
from tocsin.model.batch import MAX_HITS_PER_BATCH
from tocsin.model.service_config import BrokerConfig
from tocsin.types import NS_PER_S, I64Array

log = logging.getLogger("tocsin.agent")

UPLOAD_STEP_BATCHES = 256
"""Upload mode cuts this many batches at a time and waits while more are queued."""
COMMIT_EVERY_S = 1.0
"""How often acknowledgements are saved and sent segments deleted (s)."""
CONNECT_TIMEOUT_S = 15.0
TASK_END_TIMEOUT_S = 15.0
"""How long a cancelled task may take to finish (a clean MQTT disconnect takes <= 10 s)."""
STATUS_TIMEOUT_S = 5.0
DROP_REPORT_EVERY_S = 10.0
MAX_FUTURE_END_S = 60.0
"""A spooled live end further ahead of the clock than this is ignored at start (s)."""
_SERVICE_CLIENT_ID = BrokerConfig.model_fields["client_id"].default


MAX_UPLOAD_BATCHES = 10_000_000
"""An upload spanning more grid batches than this is refused (a typo in a date, likely)."""


def upload_span(t: I64Array, batch_ns: int) -> tuple[int, int]:
    """``[start, end)`` of an upload: ``floor(first)`` to ``ceil(last + 1 ns)`` on the grid."""
    return int(t[0]) // batch_ns * batch_ns, -(-(int(t[-1]) + 1) // batch_ns) * batch_ns


def upload_batches(t: I64Array, batch_ns: int) -> int:
    """Number of grid batches an upload of sorted hits ``t`` spans (before size splits)."""
    start, end = upload_span(t, batch_ns)
    return (end - start) // batch_ns


def default_client_id(site: str) -> str:
    """``tocsin-agent-{site}``, shortened to MQTT-friendly 64 characters for long ids."""
    cid = f"tocsin-agent-{site}"
    return cid if len(cid) <= 64 else cid[:64]


@dataclass(frozen=True, kw_only=True)
class AgentSettings:
    """What one agent needs. Durations in seconds; ``spool_max_bytes`` in bytes.

    ``broker.client_id`` is the agent's fixed MQTT client id; left at the
    service's default it becomes :func:`default_client_id`.
    """

    site: str
    broker: BrokerConfig
    spool_dir: Path
    batch_s: float = 1.0
    max_batch_hits: int = 50_000
    spool_max_bytes: int = 256_000_000
    status_every_s: float = 30.0
    flush_timeout_s: float = 5.0
    publish_timeout_s: float = 10.0
    backoff_first_s: float = 0.5
    backoff_max_s: float = 30.0
    in_flight: int = 16

    def __post_init__(self) -> None:
        if not valid_site_id(self.site):
            raise ValueError(f"site id {self.site!r} must match [a-z0-9][a-z0-9-]{{0,62}}")
        if not 0.01 <= self.batch_s <= 3600.0:
            raise ValueError(f"batch length {self.batch_s!r} s must be in [0.01, 3600]")
        if not 1 <= self.max_batch_hits <= MAX_HITS_PER_BATCH:
            raise ValueError(
                f"max hits per batch {self.max_batch_hits!r} must be in [1, {MAX_HITS_PER_BATCH}]"
            )
        if self.spool_max_bytes < 4096:
            raise ValueError(f"spool bound {self.spool_max_bytes!r} bytes is below 4096")
        for name in ("status_every_s", "publish_timeout_s", "backoff_first_s"):
            if not getattr(self, name) > 0:
                raise ValueError(f"{name} {getattr(self, name)!r} must be positive")
        if not 0 <= self.flush_timeout_s <= 3600:
            raise ValueError(f"flush_timeout_s {self.flush_timeout_s!r} must be in [0, 3600]")
        if not self.backoff_first_s <= self.backoff_max_s:
            raise ValueError(
                f"backoff_max_s {self.backoff_max_s!r} is below backoff_first_s "
                f"{self.backoff_first_s!r}"
            )
        if not 1 <= self.in_flight <= 1000:
            raise ValueError(f"in_flight {self.in_flight!r} must be in [1, 1000]")
        if self.broker.client_id == _SERVICE_CLIENT_ID:
            b = self.broker.model_copy(update={"client_id": default_client_id(self.site)})
            object.__setattr__(self, "broker", b)

    @property
    def batch_ns(self) -> int:
        return round(self.batch_s * NS_PER_S)


@dataclass(frozen=True, slots=True)
class Closed:
    """A finished batch before it has a seq: ``live`` = [start, end) GPS ns, sorted ``t``."""

    start: int
    end: int
    t: I64Array


class Cutter:
    """Cuts hits into contiguous batches on a grid of ``batch_ns`` (pure: no clock, no I/O).

    ``open_at(at)`` starts live time (never before the end of the last batch),
    ``put(t)`` adds hits (those before the open batch are dropped and counted),
    ``advance(upto)`` closes every batch that ends at or before ``upto`` (all
    hits before ``upto`` must have been put), ``cut(at)`` ends live time at ``at``.
    A batch ends at the next multiple of ``batch_ns``, or earlier, at a hit,
    when it would hold more than ``max_hits`` hits.
    """

    def __init__(self, batch_ns: int, max_hits: int) -> None:
        self.batch_ns = batch_ns
        self.max_hits = max_hits
        self.start: int | None = None
        """Start of the open batch (GPS ns), None while not live."""
        self.last_end: int | None = None
        """End of the last batch closed or cut."""
        self._t: I64Array = np.empty(0, dtype=np.int64)
        self._chunks: list[I64Array] = []

    @property
    def is_open(self) -> bool:
        return self.start is not None

    def open_at(self, at: int) -> int:
        start = at if self.last_end is None else max(at, self.last_end)
        self.start = start
        return start

    def put(self, t: I64Array) -> int:
        """Add hits (any order); returns how many were dropped (not live, or too old)."""
        if self.start is None:
            return int(t.size)
        keep = t[t >= self.start]
        if keep.size:
            self._chunks.append(keep)
        return int(t.size - keep.size)

    def _pending(self) -> I64Array:
        if self._chunks:
            self._t = np.sort(np.concatenate([self._t, *self._chunks]), kind="stable")
            self._chunks = []
        return self._t

    def advance(self, upto: int) -> list[Closed]:
        if self.start is None:
            return []
        t, b, start, i = self._pending(), self.batch_ns, self.start, 0
        out: list[Closed] = []
        while True:
            end = (start // b + 1) * b
            j = i + int(np.searchsorted(t[i:], end))
            if j - i > self.max_hits:
                end = max(int(t[i + self.max_hits]), start + 1)
                j = i + int(np.searchsorted(t[i:], end))
            if end > upto:
                break
            out.append(Closed(start, end, t[i:j]))
            i, start = j, end
        if out:
            self._t, self.start, self.last_end = t[i:], start, start
        return out

    def cut(self, at: int) -> tuple[list[Closed], int]:
        """End live time at ``at``: closed batches and the number of hits dropped (>= at)."""
        if self.start is None:
            return [], 0
        at = max(at, self.start)
        out = self.advance(at)
        t = self._pending()
        j = int(np.searchsorted(t, at))
        if at > self.start:
            out.append(Closed(self.start, at, t[:j]))
        self._t, self.start, self.last_end = np.empty(0, dtype=np.int64), None, at
        return out, int(t.size - j)


class _Batcher:
    """The :class:`~tocsin.live.sources.HitSink` a real-time source drives."""

    def __init__(self, cutter: Cutter, emit: Callable[[list[Closed]], None], stats: AgentStats):
        self.cutter = cutter
        self.emit = emit
        self.stats = stats
        self.last_mark: int | None = None
        self._drops = 0
        self._drops_logged = time.monotonic() - DROP_REPORT_EVERY_S  # the first is reported

    def up(self, at_ns: int) -> None:
        if not self.cutter.is_open:
            prev = self.cutter.last_end
            start = self.cutter.open_at(at_ns)
            gap = None if prev is None else (start - prev) / NS_PER_S
            event(log, "live", start_gps_ns=start, gap_s=gap)

    def put(self, t: I64Array) -> None:
        dropped = self.cutter.put(t)
        self.stats.hits_in += int(t.size)
        if dropped:  # reported at most every DROP_REPORT_EVERY_S, with the count since
            self.stats.hits_dropped += dropped
            self._drops += dropped
            now = time.monotonic()
            if now - self._drops_logged >= DROP_REPORT_EVERY_S:
                event(log, "hits_dropped", logging.WARNING, count=self._drops,
                      reason="older than the open batch (arrived after its batch was closed)")
                self._drops, self._drops_logged = 0, now

    def mark(self, upto_ns: int) -> None:
        self.last_mark = upto_ns
        closed = self.cutter.advance(upto_ns)
        if closed:
            self.emit(closed)

    def down(self, at_ns: int) -> None:
        closed, dropped = self.cutter.cut(at_ns)
        self.stats.hits_dropped += dropped
        if closed:
            self.emit(closed)
        if self.cutter.last_end is not None:
            event(log, "not_live", end_gps_ns=self.cutter.last_end, hits_dropped=dropped)


@dataclass(slots=True)
class AgentStats:
    """Counters of one agent run."""

    hits_in: int = 0
    hits_dropped: int = 0
    batches_closed: int = 0
    batches_spooled: int = 0
    batches_refused: int = 0
    refused_ns: int = 0
    published: int = 0
    connects: int = 0
    first_seq: int | None = None
    last_seq: int | None = None

    def as_dict(self) -> dict[str, Any]:
        return {f.name: getattr(self, f.name) for f in fields(self)}


class _Backoff:
    """Capped exponential backoff with jitter: the n-th delay is in [d/2, d], d = first*2^n."""

    def __init__(self, first_s: float, cap_s: float) -> None:
        self.first_s, self.cap_s, self.n = first_s, cap_s, 0

    def next(self) -> float:
        d = min(self.cap_s, self.first_s * 2.0 ** min(self.n, 30))
        self.n += 1
        return d / 2 + random.uniform(0.0, d / 2)

    def reset(self) -> None:
        self.n = 0


class Agent:
    """One site's agent. ``async with Agent(settings, source) as a: await a.wait()``.

    Entering opens the spool and starts the agent's tasks (source, spool
    writer, publisher, status) in a task group; :meth:`stop` (or the end of an
    upload) starts the shutdown that leaving waits for: the open batch is
    closed, what can be published within ``flush_timeout_s`` is published, the
    rest stays in the spool, ``offline`` is published and the connection closed.
    """

    def __init__(self, settings: AgentSettings, source: HitSource) -> None:
        self.settings = settings
        self.source = source
        self.stats = AgentStats()
        root = settings.broker.topic_root
        self.hits_topic = hits_topic(root, settings.site)
        self.status_topic = status_topic(root, settings.site)
        self.upload = isinstance(source, UploadSource)
        self._spool: Spool | None = None
        self._main: asyncio.Task[None] | None = None
        self._cutter = Cutter(settings.batch_ns, settings.max_batch_hits)
        self._batcher = _Batcher(self._cutter, self._emit, self.stats)
        self._closed: deque[Closed] = deque()
        self._stop = asyncio.Event()
        self._finished = asyncio.Event()
        self._closed_ready = asyncio.Event()
        self._queue_drained = asyncio.Event()
        self._new_data = asyncio.Event()
        self._acked = asyncio.Event()
        self._status_due = asyncio.Event()
        self._client: aiomqtt.Client | None = None
        self._backlog = False
        self._source_done = False
        self._writing = False
        self._writer_stop = False
        self._refusing: list[float] | None = None  # [batches, seconds] of a full-spool episode

    @property
    def spool(self) -> Spool:
        if self._spool is None:
            raise RuntimeError("the agent's spool is open only inside 'async with Agent(...)'")
        return self._spool

    @property
    def connected(self) -> bool:
        return self._client is not None

    # -- lifespan ----------------------------------------------------------------
    async def __aenter__(self) -> Agent:
        s = self.settings
        self._spool = await asyncio.to_thread(
            Spool, s.spool_dir, site=s.site, max_bytes=s.spool_max_bytes
        )
        rec = self._spool.recovery
        event(log, "agent_start", site=s.site, source=self.source.describe(), broker=s.broker.url,
              client_id=s.broker.client_id, spool=str(s.spool_dir), pending=rec.pending,
              next_seq=self._spool.next_seq, version=__version__)
        if rec.discarded_bytes:
            event(log, "spool_repaired", logging.WARNING, discarded_bytes=rec.discarded_bytes,
                  segments=list(rec.damaged_segments), kept=rec.records)
        self._main = asyncio.create_task(self._run(), name=f"tocsin-agent-{s.site}")
        return self

    def stop(self) -> None:
        """Ask the agent to shut down (safe from a signal handler)."""
        self._stop.set()

    async def wait(self) -> None:
        """Until the agent stops, fails, or has sent everything of a source that ended."""
        if self._main is None:
            raise RuntimeError("Agent.wait() outside 'async with Agent(...)'")
        waiters = [asyncio.ensure_future(e.wait()) for e in (self._stop, self._finished)]
        try:
            await asyncio.wait([self._main, *waiters], return_when=asyncio.FIRST_COMPLETED)
        finally:
            for w in waiters:
                w.cancel()

    async def __aexit__(self, *exc: object) -> None:
        self.stop()
        try:
            if self._main is not None:
                await self._main
        finally:
            if self._spool is not None:
                self._spool.close()
            event(log, "agent_stopped", pending=self.spool.pending, **self.stats.as_dict(),
                  lines=self.source.stats.lines, bad_lines=self.source.stats.bad_lines)

    async def _run(self) -> None:
        async with asyncio.TaskGroup() as tg:
            tasks = (
                tg.create_task(self._source_task(), name="agent-source"),
                tg.create_task(self._writer_task(), name="agent-spool-writer"),
                tg.create_task(self._status_task(), name="agent-status"),
                tg.create_task(self._publisher_task(), name="agent-publisher"),
            )
            stop = asyncio.ensure_future(self._stop.wait())
            done = asyncio.ensure_future(self._finished.wait())
            try:
                await asyncio.wait([stop, done], return_when=asyncio.FIRST_COMPLETED)
            finally:
                stop.cancel()
                done.cancel()
            await self._shutdown(*tasks)

    async def _shutdown(
        self, source: asyncio.Task[None], writer: asyncio.Task[None],
        status: asyncio.Task[None], publisher: asyncio.Task[None],
    ) -> None:
        s = self.settings
        source.cancel()
        await asyncio.wait([source], timeout=TASK_END_TIMEOUT_S)
        if self.upload and self._cutter.is_open:
            event(log, "upload_stopped", logging.WARNING, not_sent_from_gps_ns=self._cutter.start)
        elif self._cutter.is_open:  # close the open batch where the data is complete
            mark = self._batcher.last_mark
            self._batcher.down(mark if mark is not None else self._cutter.start or 0)
        self._writer_stop = True
        self._closed_ready.set()
        await asyncio.wait([writer], timeout=s.flush_timeout_s + 30.0)
        if self.connected:
            await self._drain(s.flush_timeout_s)
        status.cancel()
        await asyncio.wait([status], timeout=TASK_END_TIMEOUT_S)
        publisher.cancel()  # publishes "offline" before it disconnects
        await asyncio.wait([publisher], timeout=TASK_END_TIMEOUT_S)
        if self._refusing is not None:
            self._end_refusing()
        if self.spool.pending:
            event(log, "kept_in_spool", batches=self.spool.pending)

    async def _drain(self, timeout_s: float) -> None:
        deadline = time.monotonic() + timeout_s
        while self.spool.pending and (left := deadline - time.monotonic()) > 0:
            self._acked.clear()
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._acked.wait(), left)

    def _check_finished(self) -> None:
        sp = self.spool
        if self._source_done and not self._closed and not self._writing and not (
            sp.staged or sp.pending
        ):
            self._finished.set()

    # -- source and spool writer -------------------------------------------------------
    def _emit(self, batches: list[Closed]) -> None:
        self._closed.extend(batches)
        self.stats.batches_closed += len(batches)
        self._closed_ready.set()

    async def _source_task(self) -> None:
        src = self.source
        if isinstance(src, UploadSource):
            await self._feed_upload(src)
        elif isinstance(src, RealtimeSource):
            last = self.spool.last_mark
            if last is not None:
                ahead = (last - gps_now_ns()) / NS_PER_S
                if ahead > MAX_FUTURE_END_S:
                    event(log, "spool_end_in_future", logging.WARNING, ahead_s=ahead)
                else:
                    self._cutter.last_end = last
            await src.run(self._batcher)
        self._source_done = True
        self._check_finished()

    async def _feed_upload(self, src: UploadSource) -> None:
        t, b = src.hits, self.settings.batch_ns
        start, end = upload_span(t, b)
        event(log, "upload", hits=int(t.size), start_gps_ns=start, end_gps_ns=end,
              batches_at_least=(end - start) // b)
        self._cutter.open_at(start)
        self._cutter.put(t)
        self.stats.hits_in = int(t.size)
        pos = start
        while pos < end:
            pos = min(end, pos + UPLOAD_STEP_BATCHES * b)
            self._emit(self._cutter.advance(pos))
            while len(self._closed) > 4 * UPLOAD_STEP_BATCHES:
                self._queue_drained.clear()
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(self._queue_drained.wait(), 1.0)
            await asyncio.sleep(0)
        self._cutter.cut(end)

    async def _writer_task(self) -> None:
        last_commit = time.monotonic()
        while True:
            self._closed_ready.clear()
            if self._closed:
                batches = list(self._closed)
                self._closed.clear()
                self._queue_drained.set()
                await self._spool_batches(batches)
                continue
            if self._writer_stop or time.monotonic() - last_commit >= COMMIT_EVERY_S:
                await asyncio.to_thread(self.spool.commit)
                last_commit = time.monotonic()
                if self._writer_stop:
                    return
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._closed_ready.wait(), COMMIT_EVERY_S)

    async def _spool_batches(self, batches: list[Closed]) -> None:
        sp = self.spool
        self._writing = True
        try:
            for b in batches:
                while True:
                    seq = sp.next_seq
                    payload = self._encode(b, seq)
                    # once full, stay refusing until a tenth of the bound is free (one gap,
                    # not a gap for every large batch while small ones still fit)
                    need = len(payload) if self._refusing is None else sp.max_bytes // 10
                    if sp.room_for(need) and sp.put(seq, payload, mark=b.end):
                        self._accepted(seq, b)
                        break
                    if sp.reclaimable():  # delivered segments still take space: free them
                        await asyncio.to_thread(sp.commit)
                        continue
                    if not self.upload:
                        self._refused(b)
                        break
                    await self._make_room(len(payload))
            if sp.staged:
                await asyncio.to_thread(sp.sync)
                self._new_data.set()
        finally:
            self._writing = False
        self._check_finished()

    def _encode(self, b: Closed, seq: int) -> bytes:
        obj = {"v": 1, "site": self.settings.site, "seq": seq, "live": [b.start, b.end], "t": b.t}
        return orjson.dumps(obj, option=orjson.OPT_SERIALIZE_NUMPY)

    def _accepted(self, seq: int, b: Closed) -> None:
        st = self.stats
        st.batches_spooled += 1
        st.first_seq = seq if st.first_seq is None else st.first_seq
        st.last_seq = seq
        if self._refusing is not None:
            self._end_refusing()

    def _refused(self, b: Closed) -> None:
        st = self.stats
        st.batches_refused += 1
        st.refused_ns += b.end - b.start
        if self._refusing is None:
            self._refusing = [0, 0.0]
            event(log, "spool_full", logging.WARNING, bound_bytes=self.spool.max_bytes,
                  pending=self.spool.pending,
                  effect="new batches are not kept; their time becomes dead time")
        self._refusing[0] += 1
        self._refusing[1] += (b.end - b.start) / NS_PER_S

    def _end_refusing(self) -> None:
        assert self._refusing is not None
        n, dead = self._refusing
        self._refusing = None
        event(log, "spool_full_episode", logging.WARNING, refused_batches=int(n),
              dead_time_s=round(dead, 6))

    async def _make_room(self, nbytes: int) -> None:
        """Upload mode: wait (syncing and committing) until the spool has room for a record."""
        sp = self.spool
        if sp.staged:
            await asyncio.to_thread(sp.sync)
            self._new_data.set()
        await asyncio.to_thread(sp.commit)
        if sp.room_for(nbytes):
            return
        if sp.pending == 0:
            raise SpoolError(
                f"a batch of {nbytes} bytes does not fit in the spool bound of {sp.max_bytes} bytes"
            )
        self._acked.clear()
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(self._acked.wait(), COMMIT_EVERY_S)

    # -- MQTT ------------------------------------------------------------------------
    def _make_client(self) -> aiomqtt.Client:
        s, b = self.settings, self.settings.broker
        tls: ssl.SSLContext | None = None
        if b.tls:
            tls = ssl.create_default_context(cafile=str(b.ca_file) if b.ca_file else None)
            if b.cert_file is not None:
                tls.load_cert_chain(str(b.cert_file), str(b.key_file) if b.key_file else None)
        will = aiomqtt.Will(self.status_topic, self._status_payload("offline"), qos=1, retain=True)
        client = aiomqtt.Client(
            b.host, b.port, identifier=b.client_id, username=b.username, password=b.password,
            keepalive=b.keepalive_s, clean_session=True, will=will, tls_context=tls,
            max_inflight_messages=s.in_flight, timeout=s.publish_timeout_s,
        )
        client.pending_calls_threshold = s.in_flight + 8  # ours are bounded by in_flight
        return client

    async def _publisher_task(self) -> None:
        s = self.settings
        backoff = _Backoff(s.backoff_first_s, s.backoff_max_s)
        failures = 0
        while True:
            client = self._make_client()
            error: BaseException | None = None
            was_connected = False
            try:
                async with contextlib.AsyncExitStack() as stack:
                    async with asyncio.timeout(CONNECT_TIMEOUT_S):
                        await stack.enter_async_context(client)
                    failures, was_connected = 0, True
                    backoff.reset()
                    await self._session(client)
            except* (aiomqtt.MqttError, OSError, TimeoutError) as eg:
                error = eg.exceptions[0]
            finally:
                self._client = None
            failures += 1
            delay = backoff.next()
            event(log, "disconnected" if was_connected else "broker_unreachable",
                  logging.WARNING if failures <= 2 else logging.INFO, error=str(error),
                  attempt=failures, retry_in_s=round(delay, 2), pending=self.spool.pending)
            await asyncio.sleep(delay)

    async def _session(self, client: aiomqtt.Client) -> None:
        self._client = client
        self.stats.connects += 1
        self._backlog = self.spool.pending > 0
        event(log, "connected", broker=self.settings.broker.url, pending=self.spool.pending)
        self._status_due.set()
        try:
            async with asyncio.TaskGroup() as tg:
                tg.create_task(self._watch(client), name="agent-connection-watch")
                await self._send(client, tg)
        except asyncio.CancelledError:  # the agent stops (or failed): say so, then disconnect
            try:
                await client.publish(self.status_topic, self._status_payload("offline"), qos=1,
                                     retain=True, timeout=STATUS_TIMEOUT_S)
            except aiomqtt.MqttError as exc:
                event(log, "offline_not_published", logging.WARNING, error=str(exc))
            raise

    @staticmethod
    async def _watch(client: aiomqtt.Client) -> None:
        # nothing is subscribed: the iterator only ends, with MqttError, when the connection drops
        async for _ in client.messages:
            pass

    async def _send(self, client: aiomqtt.Client, tg: asyncio.TaskGroup) -> None:
        sp = self.spool
        window = asyncio.Semaphore(self.settings.in_flight)
        after = 0
        while True:
            self._new_data.clear()
            seq = sp.next_pending(after)
            if seq is None:
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(self._new_data.wait(), 1.0)
                continue
            await window.acquire()
            after = seq + 1
            if not sp.is_pending(seq):
                window.release()
                continue
            tg.create_task(self._publish(client, seq, sp.read(seq), window))

    async def _publish(
        self, client: aiomqtt.Client, seq: int, payload: bytes, window: asyncio.Semaphore
    ) -> None:
        try:
            # Completes on the broker's PUBACK: aiomqtt 2.5 Client.publish waits for an event set
            # by its on_publish callback, which paho-mqtt 2.2 calls for QoS 1 only from
            # _handle_pubackcomp (the PUBACK); with a timeout it raises MqttError instead.
            await client.publish(self.hits_topic, payload, qos=1,
                                 timeout=self.settings.publish_timeout_s)
        finally:
            window.release()
        if self.spool.ack(seq):
            self.stats.published += 1
        self._acked.set()
        if self._backlog and self.spool.pending == 0:
            self._backlog = False
            self._status_due.set()
        self._check_finished()

    def _status_payload(self, state: str) -> bytes:
        sp = self._spool
        spooled = 0 if sp is None else sp.pending + sp.staged
        last = None if sp is None or sp.next_seq == 0 else sp.next_seq - 1
        return orjson.dumps({
            "v": 1, "site": self.settings.site, "state": state, "t_gps_ns": gps_now_ns(),
            "spooled": spooled, "seq": last, "agent": f"tocsin/{__version__}",
        })

    async def _status_task(self) -> None:
        while True:
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._status_due.wait(), self.settings.status_every_s)
            self._status_due.clear()
            client = self._client
            if client is None:
                continue
            state = "spooling" if self._backlog else "online"
            with contextlib.suppress(aiomqtt.MqttError):  # a lost connection is the publisher's
                await client.publish(self.status_topic, self._status_payload(state), qos=1,
                                     retain=True, timeout=STATUS_TIMEOUT_S)
