"""VOEvent Transport Protocol 2.0 over asyncio: the subscriber port and a subscriber.

:class:`TransportServer` is the subscriber-facing side of a broker [VTP2 §4, §7.3]:
subscribers connect and stay connected; each VOEvent published is sent to every
connected subscriber, which must answer ``ack`` or ``nak``; after an idle period
(at most 90 s [VTP2 §5]) the server sends ``iamalive`` and expects it echoed.
Only addresses on an allow-list may connect [VTP2 §9.1]; a subscriber is known by
the name of the allow-list entry it connects from, so its deliveries can be
followed across reconnects. Each subscriber has a bounded queue and its own
tasks, so one that is slow, stalled or misbehaving is cut off without holding
up the others. There is no store-and-forward [VTP2 §3.1]: a packet goes only to
the subscribers connected when it is published.

Every packet queued to a subscriber gets exactly one *delivery outcome*, passed
to ``on_result(subscriber, ivorn, outcome)``: ``"ack"`` or ``"nak"`` (the
subscriber's answer), ``"timeout"`` (no answer within ``reply_timeout_s``; the
subscriber is then disconnected), or ``"disconnected"`` (the connection ended,
or the subscriber's queue overflowed, before an answer).

:class:`TransportClient` is a subscriber [VTP2 §7.4]: it keeps a connection to a
broker, echoes ``iamalive``, checks each VOEvent with :mod:`tocsin.alerts.safexml`,
answers ``ack`` or ``nak`` (with the reason), hands each new packet to a callback
once (de-duplicated by the [VTP2 §8] key) and reconnects with a capped,
jittered geometric back-off when the connection drops or falls silent.

This layer only moves messages; all XML and framing rules live in
:mod:`tocsin.alerts.safexml` and :mod:`tocsin.alerts.framing`.
"""

from __future__ import annotations

import asyncio
import contextlib
import datetime as dt
import ipaddress
import logging
import random
from collections import Counter, OrderedDict
from collections.abc import Awaitable, Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, Final, Literal, Self

from tocsin.alerts import framing, safexml
from tocsin.alerts.safexml import DEFAULT_LIMITS, PacketRejected, XmlLimits

log = logging.getLogger(__name__)

DeliveryOutcome = Literal["ack", "nak", "timeout", "disconnected"]
ResultHook = Callable[[str, str, DeliveryOutcome], None]
PacketHandler = Callable[[bytes, Any], Awaitable[None]]
Clock = Callable[[], dt.datetime]
IPNetwork = ipaddress.IPv4Network | ipaddress.IPv6Network

MAX_IDLE_S: Final = 90.0
"""[VTP2 §5] the broker must send ``iamalive`` after at most 90 s of inactivity."""

DEFAULT_REPLY_BYTES: Final = 65_536
"""Cap on a frame from a subscriber (only small Transport messages are expected)."""

_QUIET_REASONS: Final = frozenset({"closed", "replaced", "server_closing"})


def utc_now() -> dt.datetime:
    """The default clock: the current time, timezone-aware UTC."""
    return dt.datetime.now(dt.UTC)


@dataclass(frozen=True, slots=True)
class AllowedNetwork:
    """An allow-list entry: subscribers connecting from ``network`` are called ``name``."""

    name: str
    network: IPNetwork

    @classmethod
    def parse(cls, name: str, cidr: str) -> AllowedNetwork:
        """Entry from a CIDR string such as ``"192.0.2.0/24"`` or ``"2001:db8::1/128"``."""
        try:
            return cls(name, ipaddress.ip_network(cidr, strict=True))
        except ValueError as exc:
            raise ValueError(f"allow-list entry {name!r}: bad network {cidr!r}: {exc}") from exc


@dataclass(slots=True)
class ServerCounters:
    """Running totals of a :class:`TransportServer` (the caller exports them)."""

    accepted: int = 0
    refused: int = 0
    sent: int = 0
    acked: int = 0
    naked: int = 0
    timed_out: int = 0
    undelivered: int = 0
    overflows: int = 0
    iamalive_sent: int = 0
    iamalive_echoed: int = 0
    callback_errors: int = 0
    disconnects: Counter[str] = field(default_factory=Counter)
    """By reason: closed, replaced, server_closing, overflow, ack_timeout, no_echo,
    frame_too_large, bad_message, protocol, send_failed, internal_error."""


@dataclass(slots=True)
class ClientCounters:
    """Running totals of a :class:`TransportClient`."""

    connects: int = 0
    connect_failures: int = 0
    accepted: int = 0
    duplicates: int = 0
    acks_sent: int = 0
    naks_sent: int = 0
    iamalive_echoed: int = 0
    callback_errors: int = 0
    unexpected: int = 0
    rejected: Counter[str] = field(default_factory=Counter)
    """By :data:`tocsin.alerts.safexml.REJECT_REASONS`."""
    disconnects: Counter[str] = field(default_factory=Counter)
    """By reason: closed, silent, frame_too_large, connection_error."""


@dataclass(frozen=True, slots=True)
class _Ended:
    reason: str
    detail: str


@dataclass(frozen=True, slots=True)
class _Delivery:
    frame: bytes  # length prefix + packet, built once and shared by all subscribers
    ivorn: str


@dataclass(frozen=True, slots=True)
class _Expect:
    kind: Literal["packet", "iamalive"]
    origin: str
    reply: asyncio.Future[framing.TransportMessage]


class _Subscriber:
    def __init__(
        self, name: str, peer: str, reader: asyncio.StreamReader, writer: asyncio.StreamWriter,
        queue_size: int,
    ) -> None:
        self.name = name
        self.peer = peer
        self.reader = reader
        self.writer = writer
        self.queue: asyncio.Queue[_Delivery] = asyncio.Queue(maxsize=queue_size)
        self.in_flight: _Delivery | None = None
        self.expect: _Expect | None = None
        self.ended: asyncio.Future[_Ended] = asyncio.get_running_loop().create_future()

    @property
    def closing(self) -> bool:
        return self.ended.done()

    def end(self, reason: str, detail: str) -> None:
        if not self.ended.done():
            self.ended.set_result(_Ended(reason, detail))


class TransportServer:
    """The subscriber port of a VTP broker role (see the module docstring).

    ``origin``: our IVOID, sent in ``iamalive`` [VTP2 §6.1]. ``allow``: the
    allow-list, first match wins, names unique. ``idle_s``: quiet time before an
    ``iamalive`` (0 < idle_s ≤ 90 s). ``reply_timeout_s``: wait for an ``ack``,
    ``nak`` or echo. ``queue_size``: packets waiting per subscriber; one more
    disconnects it. ``max_packet_bytes``: largest packet published.
    ``max_reply_bytes``: largest frame accepted from a subscriber.
    ``on_result``/``on_connect``: called in the event loop, must not block;
    exceptions from them are logged and counted. ``host`` should be an address
    (with ``port=0``, a name such as ``localhost`` would get one port per
    address family). Use in one event loop only.
    """

    def __init__(
        self,
        *,
        origin: str,
        allow: Sequence[AllowedNetwork],
        host: str = "127.0.0.1",
        port: int = 0,
        idle_s: float = 60.0,
        reply_timeout_s: float = 30.0,
        queue_size: int = 64,
        max_packet_bytes: int = DEFAULT_LIMITS.max_bytes,
        max_reply_bytes: int = DEFAULT_REPLY_BYTES,
        on_result: ResultHook | None = None,
        on_connect: Callable[[str], None] | None = None,
        clock: Clock = utc_now,
    ) -> None:
        if not allow:
            raise ValueError("the allow-list is empty: no subscriber could connect")
        names = [entry.name for entry in allow]
        if len(set(names)) != len(names):
            raise ValueError(f"allow-list names must be unique, got {names}")
        if not 0 < idle_s <= MAX_IDLE_S:
            raise ValueError(f"idle_s {idle_s!r} must be in (0, {MAX_IDLE_S}] [VTP2 §5]")
        if not reply_timeout_s > 0:
            raise ValueError(f"reply_timeout_s {reply_timeout_s!r} must be > 0")
        if queue_size < 1:
            raise ValueError(f"queue_size {queue_size!r} must be >= 1")
        self._reply_limits = XmlLimits(max_bytes=max_reply_bytes)
        self._max_packet = XmlLimits(max_bytes=max_packet_bytes).max_bytes
        self._origin = origin
        self._allow = tuple(allow)
        self._host = host
        self._port = port
        self._idle_s = idle_s
        self._reply_timeout_s = reply_timeout_s
        self._queue_size = queue_size
        self._on_result = on_result
        self._on_connect = on_connect
        self._clock = clock
        self._server: asyncio.Server | None = None
        self._subs: dict[str, _Subscriber] = {}
        self._handlers: set[asyncio.Task[Any]] = set()
        self._closing = False
        self.counters = ServerCounters()

    async def start(self) -> None:
        """Start listening (``port=0`` picks a free port; see :attr:`port`)."""
        if self._server is not None:
            raise RuntimeError("TransportServer already started")
        self._server = await asyncio.start_server(self._handle, self._host, self._port)
        log.info("VTP server listening on %s:%d", self._host, self.port)

    @property
    def port(self) -> int:
        """The TCP port listened on."""
        if self._server is None or not self._server.sockets:
            raise RuntimeError("TransportServer is not listening (call start())")
        port: int = self._server.sockets[0].getsockname()[1]
        return port

    def connected(self) -> list[str]:
        """Names of the subscribers connected now (sorted)."""
        return sorted(name for name, sub in self._subs.items() if not sub.closing)

    def publish(self, packet: bytes, ivorn: str) -> int:
        """Queue ``packet`` (sent byte for byte) to every connected subscriber.

        Returns how many subscribers it was queued to. Raises ``PacketRejected``
        (``too_large``) for a packet over ``max_packet_bytes``.
        """
        delivery = self._delivery(packet, ivorn)
        return sum(self._enqueue(sub, delivery) for sub in list(self._subs.values()))

    def send_to(self, name: str, packet: bytes, ivorn: str) -> bool:
        """Queue ``packet`` to subscriber ``name`` only; False if it is not connected."""
        delivery = self._delivery(packet, ivorn)
        sub = self._subs.get(name)
        return sub is not None and self._enqueue(sub, delivery)

    async def close(self) -> None:
        """Stop listening, disconnect every subscriber and wait for their tasks."""
        self._closing = True
        if self._server is not None:
            self._server.close()
        for sub in list(self._subs.values()):
            sub.end("server_closing", "the server is closing")
        if self._handlers:
            _, late = await asyncio.wait(set(self._handlers), timeout=10.0)
            for task in late:
                task.cancel()
            if late:
                await asyncio.wait(late, timeout=1.0)
        if self._server is not None:
            await self._server.wait_closed()

    async def __aenter__(self) -> Self:
        await self.start()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.close()

    # ------------------------------------------------------------- internals

    def _delivery(self, packet: bytes, ivorn: str) -> _Delivery:
        if not ivorn:
            raise ValueError("a published packet needs its IVORN")
        return _Delivery(framing.encode_frame(packet, max_bytes=self._max_packet), ivorn)

    def _enqueue(self, sub: _Subscriber, delivery: _Delivery) -> bool:
        if sub.closing:
            return False
        try:
            sub.queue.put_nowait(delivery)
        except asyncio.QueueFull:
            self.counters.overflows += 1
            self._report(sub.name, delivery.ivorn, "disconnected")
            sub.end("overflow", f"queue of {self._queue_size} packets full at {delivery.ivorn!r}")
            return False
        return True

    def _match(self, ip: ipaddress.IPv4Address | ipaddress.IPv6Address) -> str | None:
        if isinstance(ip, ipaddress.IPv6Address) and ip.ipv4_mapped is not None:
            ip = ip.ipv4_mapped
        for entry in self._allow:
            if ip.version == entry.network.version and ip in entry.network:
                return entry.name
        return None

    async def _handle(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        task = asyncio.current_task()
        if task is not None:
            self._handlers.add(task)
        peer = writer.get_extra_info("peername")
        try:
            if peer is None:  # gone before we looked
                writer.transport.abort()
                return
            name = None if self._closing else self._match(ipaddress.ip_address(peer[0]))
            if name is None:
                self.counters.refused += 1
                why = "the server is closing" if self._closing else "not on the allow-list"
                log.warning("VTP server: refused connection from %s (%s)", peer[0], why)
                writer.close()
                with contextlib.suppress(OSError, TimeoutError):
                    await asyncio.wait_for(writer.wait_closed(), 1.0)
                return
            await self._serve(_Subscriber(name, f"{peer[0]}:{peer[1]}", reader, writer,
                                          self._queue_size))
        finally:
            if task is not None:
                self._handlers.discard(task)

    async def _serve(self, sub: _Subscriber) -> None:
        old = self._subs.get(sub.name)
        if old is not None:
            old.end("replaced", f"{sub.name!r} connected again from {sub.peer}")
        self._subs[sub.name] = sub
        self.counters.accepted += 1
        log.info("VTP server: subscriber %r connected from %s", sub.name, sub.peer)
        if self._on_connect is not None:
            try:
                self._on_connect(sub.name)
            except Exception:
                self.counters.callback_errors += 1
                log.exception("VTP server: on_connect(%r) failed", sub.name)
        reading = asyncio.create_task(self._read_loop(sub), name=f"vtp-read:{sub.name}")
        writing = asyncio.create_task(self._write_loop(sub), name=f"vtp-write:{sub.name}")
        try:
            await asyncio.wait({reading, writing, sub.ended}, return_when=asyncio.FIRST_COMPLETED)
            for task in (writing, reading):  # a loop's own reason, unless end() came first
                if task.done() and not task.cancelled():
                    exc = task.exception()
                    if exc is not None:
                        log.error("VTP server: %s failed", task.get_name(), exc_info=exc)
                        sub.end("internal_error", repr(exc))
                    else:
                        ended = task.result()
                        sub.end(ended.reason, ended.detail)
        finally:
            sub.end("server_closing", "handler cancelled")
            reading.cancel()
            writing.cancel()
            await asyncio.gather(reading, writing, return_exceptions=True)
            self._finish(sub)

    def _finish(self, sub: _Subscriber) -> None:
        ended = sub.ended.result()
        if self._subs.get(sub.name) is sub:
            del self._subs[sub.name]
        sub.writer.transport.abort()  # a stalled peer would never let close() flush
        self.counters.disconnects[ended.reason] += 1
        level = logging.INFO if ended.reason in _QUIET_REASONS else logging.WARNING
        log.log(level, "VTP server: subscriber %r (%s) disconnected: %s: %s",
                sub.name, sub.peer, ended.reason, ended.detail)
        lost = [] if sub.in_flight is None else [sub.in_flight]
        sub.in_flight = None
        while not sub.queue.empty():
            lost.append(sub.queue.get_nowait())
        for delivery in lost:
            self._report(sub.name, delivery.ivorn, "disconnected")

    async def _read_loop(self, sub: _Subscriber) -> _Ended:
        """Read the subscriber's frames; hand each awaited reply to the writer."""
        while True:
            try:
                header = await sub.reader.readexactly(framing.FRAME_HEADER.size)
                size = framing.frame_length(header, max_bytes=self._reply_limits.max_bytes)
                payload = await sub.reader.readexactly(size)
            except asyncio.IncompleteReadError as exc:
                where = f" {len(exc.partial)} bytes into a frame" if exc.partial else ""
                return _Ended("closed", f"the subscriber closed the connection{where}")
            except ConnectionError as exc:
                return _Ended("closed", repr(exc))
            except PacketRejected as exc:
                return _Ended("frame_too_large", exc.detail)
            try:
                msg = framing.parse_transport(payload, limits=self._reply_limits)
            except PacketRejected as exc:
                return _Ended("bad_message", f"{exc.reason}: {exc.detail} ({payload[:60]!r})")
            expect = sub.expect
            if expect is None or expect.reply.done():
                return _Ended("protocol", f"unsolicited {msg.role!r} for {msg.origin!r}")
            wanted = ("iamalive",) if expect.kind == "iamalive" else ("ack", "nak")
            if msg.role not in wanted:
                return _Ended("protocol", f"{msg.role!r} for {msg.origin!r} while waiting for "
                              f"the reply to {expect.kind} {expect.origin!r}")
            if msg.origin != expect.origin:
                # One message is in flight at a time, so this is its reply; a peer that
                # could not read the IVORN (e.g. of a packet it refused) may leave it out.
                log.warning("VTP server: %s from %r names %r, expected %r",
                            msg.role, sub.name, msg.origin, expect.origin)
            expect.reply.set_result(msg)

    async def _write_loop(self, sub: _Subscriber) -> _Ended:
        """Send queued packets one at a time, each awaiting its reply; keep the link alive."""
        while True:
            try:
                async with asyncio.timeout(self._idle_s):
                    delivery = await sub.queue.get()
            except TimeoutError:
                self.counters.iamalive_sent += 1
                frame = framing.encode_frame(framing.iamalive(self._origin, self._clock()))
                try:
                    await self._exchange(sub, frame, "iamalive", self._origin)
                except TimeoutError:
                    return _Ended("no_echo", f"no iamalive echo within {self._reply_timeout_s} s")
                except OSError as exc:
                    return _Ended("send_failed", repr(exc))
                self.counters.iamalive_echoed += 1
                continue
            sub.in_flight = delivery
            try:
                reply = await self._exchange(sub, delivery.frame, "packet", delivery.ivorn)
            except TimeoutError:
                sub.in_flight = None
                self.counters.timed_out += 1
                self._report(sub.name, delivery.ivorn, "timeout")
                return _Ended("ack_timeout", f"no ack or nak for {delivery.ivorn!r} "
                              f"within {self._reply_timeout_s} s")
            except OSError as exc:
                return _Ended("send_failed", repr(exc))
            sub.in_flight = None
            if reply.role == "nak":
                self.counters.naked += 1
                log.warning("VTP server: subscriber %r refused %s: %s",
                            sub.name, delivery.ivorn, reply.result)
                self._report(sub.name, delivery.ivorn, "nak")
            else:
                self.counters.acked += 1
                self._report(sub.name, delivery.ivorn, "ack")

    async def _exchange(
        self, sub: _Subscriber, frame: bytes, kind: Literal["packet", "iamalive"], origin: str
    ) -> framing.TransportMessage:
        """Send one frame and wait for its reply; TimeoutError after ``reply_timeout_s``."""
        reply: asyncio.Future[framing.TransportMessage] = asyncio.get_running_loop().create_future()
        sub.expect = _Expect(kind, origin, reply)
        try:
            async with asyncio.timeout(self._reply_timeout_s):
                sub.writer.write(frame)
                if kind == "packet":
                    self.counters.sent += 1
                await sub.writer.drain()
                return await reply
        finally:
            sub.expect = None

    def _report(self, name: str, ivorn: str, outcome: DeliveryOutcome) -> None:
        if outcome == "disconnected":
            self.counters.undelivered += 1
        if self._on_result is None:
            return
        try:
            self._on_result(name, ivorn, outcome)
        except Exception:
            self.counters.callback_errors += 1
            log.exception("VTP server: on_result(%r, %r, %r) failed", name, ivorn, outcome)


class TransportClient:
    """A VTP subscriber that keeps a connection to ``host:port`` (module docstring).

    ``on_packet(raw, voevent)`` is awaited for each new valid packet before the
    ``ack`` is sent (so an ``ack`` means the callback finished); if it raises, the
    packet is answered with ``nak``. ``response``: our IVOID for the
    ``Response`` element (optional [VTP2 §6.2]). ``silence_timeout_s``: a
    connection with no frame for this long is dropped (the broker sends
    ``iamalive`` after at most 90 s idle [VTP2 §5]; the default allows one to be
    missed). Back-off between attempts starts at ``backoff_min_s`` and doubles up
    to ``backoff_max_s``, with up to 10 % jitter; it restarts from the minimum
    after a connection that delivered a valid message. ``dedup_capacity``: how
    many [VTP2 §8] keys are remembered. ``local_addr``: source address to bind.
    """

    def __init__(
        self,
        host: str,
        port: int,
        on_packet: PacketHandler,
        *,
        response: str | None = None,
        limits: XmlLimits = DEFAULT_LIMITS,
        silence_timeout_s: float = 2 * MAX_IDLE_S,
        connect_timeout_s: float = 10.0,
        backoff_min_s: float = 1.0,
        backoff_max_s: float = 300.0,
        dedup_capacity: int = 10_000,
        local_addr: tuple[str, int] | None = None,
        clock: Clock = utc_now,
        rng: random.Random | None = None,
    ) -> None:
        if not 0 < backoff_min_s <= backoff_max_s:
            raise ValueError(f"need 0 < backoff_min_s ({backoff_min_s!r}) <= backoff_max_s "
                             f"({backoff_max_s!r})")
        for label, value in (("silence_timeout_s", silence_timeout_s),
                             ("connect_timeout_s", connect_timeout_s)):
            if not value > 0:
                raise ValueError(f"{label} {value!r} must be > 0")
        if dedup_capacity < 1:
            raise ValueError(f"dedup_capacity {dedup_capacity!r} must be >= 1")
        self._host = host
        self._port = port
        self._on_packet = on_packet
        self._response = response
        self._limits = limits
        self._silence_s = silence_timeout_s
        self._connect_timeout_s = connect_timeout_s
        self._backoff = (backoff_min_s, backoff_max_s)
        self._dedup_capacity = dedup_capacity
        self._local_addr = local_addr
        self._clock = clock
        self._rng = rng or random.Random()
        self._seen: OrderedDict[str, None] = OrderedDict()
        self._connected = asyncio.Event()
        self._task: asyncio.Task[None] | None = None
        self.counters = ClientCounters()

    @property
    def connected(self) -> bool:
        """Whether a connection to the broker is open now."""
        return self._connected.is_set()

    async def wait_connected(self) -> None:
        """Return once a connection is open (wrap in a timeout)."""
        await self._connected.wait()

    async def start(self) -> None:
        """Start connecting (in a background task)."""
        if self._task is not None:
            raise RuntimeError("TransportClient already started")
        self._task = asyncio.create_task(self._run(), name=f"vtp-client:{self._host}:{self._port}")

    async def stop(self) -> None:
        """Close the connection and stop reconnecting."""
        if self._task is None:
            return
        self._task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await self._task
        self._task = None

    async def __aenter__(self) -> Self:
        await self.start()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.stop()

    # ------------------------------------------------------------- internals

    async def _run(self) -> None:
        delay, top = self._backoff
        where = f"{self._host}:{self._port}"
        while True:
            try:
                reader, writer = await asyncio.wait_for(
                    asyncio.open_connection(self._host, self._port, local_addr=self._local_addr),
                    self._connect_timeout_s,
                )
            except (OSError, TimeoutError) as exc:
                self.counters.connect_failures += 1
                log.warning("VTP client: cannot connect to %s: %r", where, exc)
            else:
                self.counters.connects += 1
                self._connected.set()
                log.info("VTP client: connected to %s", where)
                try:
                    ended, healthy = await self._session(reader, writer)
                finally:
                    self._connected.clear()
                    writer.close()
                self.counters.disconnects[ended.reason] += 1
                level = logging.INFO if ended.reason == "closed" else logging.WARNING
                log.log(level, "VTP client: connection to %s ended: %s: %s",
                        where, ended.reason, ended.detail)
                if healthy:
                    delay = self._backoff[0]
            pause = delay * (1.0 + 0.1 * self._rng.random())
            log.info("VTP client: reconnecting to %s in %.2f s", where, pause)
            await asyncio.sleep(pause)
            delay = min(delay * 2.0, top)

    async def _session(
        self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter
    ) -> tuple[_Ended, bool]:
        """Serve one connection; returns why it ended and whether it carried a valid message."""
        healthy = False
        while True:
            try:
                async with asyncio.timeout(self._silence_s):
                    header = await reader.readexactly(framing.FRAME_HEADER.size)
                size = framing.frame_length(header, max_bytes=self._limits.max_bytes)
                async with asyncio.timeout(self._silence_s):
                    payload = await reader.readexactly(size)
            except TimeoutError:
                return _Ended("silent", f"nothing received for {self._silence_s} s"), healthy
            except asyncio.IncompleteReadError:
                return _Ended("closed", "the broker closed the connection"), healthy
            except ConnectionError as exc:
                return _Ended("connection_error", repr(exc)), healthy
            except PacketRejected as exc:  # cannot skip it without reading it: drop the link
                self.counters.rejected[exc.reason] += 1
                return _Ended("frame_too_large", exc.detail), healthy
            reply, valid = await self._handle(payload)
            healthy = healthy or valid
            if reply is None:
                continue
            try:
                writer.write(framing.encode_frame(reply))
                async with asyncio.timeout(self._silence_s):
                    await writer.drain()
            except (OSError, TimeoutError) as exc:
                return _Ended("connection_error", f"sending a reply: {exc!r}"), healthy

    async def _handle(self, payload: bytes) -> tuple[bytes | None, bool]:
        """The reply to one message (None for none) and whether the message was valid."""
        try:
            root = safexml.inspect_root(payload, limits=self._limits)
        except PacketRejected as exc:
            return self._nak(exc, exc.ivorn), False
        if root.local_name == "Transport":
            try:
                msg = framing.parse_transport(payload, limits=self._limits)
            except PacketRejected as exc:
                self.counters.rejected[exc.reason] += 1
                log.warning("VTP client: ignoring a bad Transport message: %s", exc)
                return None, False
            if msg.role != "iamalive":
                self.counters.unexpected += 1
                log.warning("VTP client: ignoring an unexpected Transport %r", msg.role)
                return None, True
            self.counters.iamalive_echoed += 1
            return framing.echo(msg, self._clock(), response=self._response), True
        try:
            packet = safexml.check_voevent(payload, limits=self._limits)
        except PacketRejected as exc:
            return self._nak(exc, exc.ivorn or root.attributes.get("ivorn")), True
        if packet.dedup_key in self._seen:
            self._seen.move_to_end(packet.dedup_key)
            self.counters.duplicates += 1
            log.info("VTP client: duplicate of %s (key %s) acknowledged, not passed on",
                     packet.ivorn, packet.dedup_key)
            return self._ack(packet.ivorn), True
        try:
            await self._on_packet(packet.raw, packet.voevent)
        except Exception as exc:
            self.counters.callback_errors += 1
            log.exception("VTP client: handling %s failed", packet.ivorn)
            self.counters.naks_sent += 1
            return framing.nak(packet.ivorn, self._clock(), f"receiver error: {exc!r}",
                               response=self._response), True
        self._seen[packet.dedup_key] = None
        if len(self._seen) > self._dedup_capacity:
            self._seen.popitem(last=False)
        self.counters.accepted += 1
        return self._ack(packet.ivorn), True

    def _ack(self, ivorn: str) -> bytes:
        self.counters.acks_sent += 1
        return framing.ack(ivorn, self._clock(), response=self._response)

    def _nak(self, exc: PacketRejected, ivorn: str | None) -> bytes:
        self.counters.rejected[exc.reason] += 1
        self.counters.naks_sent += 1
        log.warning("VTP client: refused packet %s: %s", ivorn or "(no IVORN)", exc)
        return framing.nak(ivorn or "", self._clock(), f"{exc.reason}: {exc.detail}",
                           response=self._response)
