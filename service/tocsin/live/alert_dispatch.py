"""Delivers archived alerts to their sinks: packet directory, MQTT alert topic, subscribers.

Works only from the archive (``deliveries`` rows not yet ``done``), so alerts made by
this process, by ``tocsin retract`` in another process, or before a crash are all sent
the same way, in archive order. Each delivery is marked ``sent`` (an attempt, outcome
unknown) before the packet leaves and ``done`` once the sink confirmed it:

* ``dir``: the file is fsynced and renamed into place (idempotent);
* ``mqtt``: the broker's PUBACK (QoS 1) on ``{root}/alerts``;
* ``vtp:<name>``: the subscriber's transport ``ack``. A ``nak`` is final (``failed``;
  VTP 2.0 §6.3 forbids re-delivery); a timeout or a dropped connection puts the
  delivery back to ``pending`` until the subscriber is connected again. A subscriber
  that stays away longer than ``EXPIRE_AFTER_S`` gets the delivery marked ``expired``.

After a crash, a delivery left ``sent`` is sent again with the same bytes; the
receiver may see that one packet twice and drops it as identical (VTP 2.0 §8, and
our IVORNs are unique per packet).
"""

from __future__ import annotations

import asyncio
import contextlib
import datetime as dt
import logging
from collections.abc import Callable
from pathlib import Path
from typing import Protocol

import aiomqtt

from tocsin.alerts.archive import Archive, utc_stamp
from tocsin.alerts.outbox import flush_directory
from tocsin.alerts.policy import SINK_MQTT, VTP_PREFIX
from tocsin.live.logs import event
from tocsin.live.metrics import Metrics

log = logging.getLogger("tocsin.alerts")

POLL_S = 1.0
"""The archive is looked at this often (s) even without a wake-up (retractions)."""
EXPIRE_AFTER_S = 86_400.0


class SubscriberServer(Protocol):
    """What the dispatcher needs of the transport server."""

    def connected(self) -> list[str]: ...

    def send_to(self, name: str, packet: bytes, ivorn: str) -> bool: ...


def _now() -> str:
    return utc_stamp(dt.datetime.now(dt.UTC))


class AlertDispatcher:
    """One per service. ``client`` is set while the MQTT connection is up."""

    def __init__(
        self,
        archive: Archive,
        packet_dir: Path,
        topic: str,
        metrics: Metrics,
        server: SubscriberServer | None = None,
        *,
        clock: Callable[[], dt.datetime] = lambda: dt.datetime.now(dt.UTC),
    ) -> None:
        self.archive = archive
        self.packet_dir = packet_dir
        self.topic = topic
        self.metrics = metrics
        self.server = server
        self.client: aiomqtt.Client | None = None
        self.wake = asyncio.Event()
        self.clock = clock
        self._inflight: set[tuple[str, str]] = set()

    # -- transport results (called by the server) ------------------------------
    def on_result(self, name: str, ivorn: str, outcome: str) -> None:
        """A subscriber answered (``ack``/``nak``) or could not (``timeout``/``disconnected``)."""
        self._inflight.discard((ivorn, name))
        sink = VTP_PREFIX + name
        if outcome == "ack":
            self.archive.mark(ivorn, sink, "done", _now())
        elif outcome == "nak":
            self.archive.mark(ivorn, sink, "failed", _now(), "subscriber sent nak")
            event(log, "alert_nak", logging.WARNING, ivorn=ivorn, subscriber=name)
        else:
            self.archive.mark(ivorn, sink, "pending", _now(), outcome)
        self.metrics.deliveries.labels("vtp", outcome).inc()
        self.wake.set()

    # -- the loop --------------------------------------------------------------
    async def run(self, stop: asyncio.Event) -> None:
        while not stop.is_set():
            try:
                await self.deliver_once()
            except Exception as exc:  # the loop must outlive any one bad delivery
                event(log, "dispatch_error", logging.ERROR, error=repr(exc))
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self.wake.wait(), POLL_S)
            self.wake.clear()
        # stopping: the packet directory still gets what was archived last (no
        # network sink is started now; they resume from the archive at the next start)
        try:
            self._flush_directory()
        except Exception as exc:
            event(log, "dispatch_error", logging.ERROR, error=repr(exc))

    def _flush_directory(self) -> int:
        n = flush_directory(self.archive, self.packet_dir)
        if n:
            self.metrics.deliveries.labels("dir", "done").inc(n)
        return n

    async def deliver_once(self) -> int:
        """One pass over the open deliveries; returns how many were completed or started."""
        n = self._flush_directory()
        connected = set(self.server.connected()) if self.server is not None else set()
        for d, xml in self.archive.open_deliveries():
            if d.sink == SINK_MQTT:
                if self.client is None:
                    continue
                self.archive.mark(d.ivorn, SINK_MQTT, "sent", _now())
                try:
                    await self.client.publish(self.topic, xml, qos=1)
                except aiomqtt.MqttError as exc:
                    self.archive.mark(d.ivorn, SINK_MQTT, "pending", _now(), str(exc))
                    self.metrics.deliveries.labels("mqtt", "error").inc()
                    continue
                self.archive.mark(d.ivorn, SINK_MQTT, "done", _now())
                self.metrics.deliveries.labels("mqtt", "done").inc()
                event(log, "alert_published", ivorn=d.ivorn, topic=self.topic)
                n += 1
            elif d.sink.startswith(VTP_PREFIX) and self.server is not None:
                name = d.sink[len(VTP_PREFIX) :]
                if (d.ivorn, name) in self._inflight:
                    continue
                if name not in connected:
                    if d.state == "pending" and self._stale(d.updated_utc):
                        self.archive.mark(d.ivorn, d.sink, "expired", _now(), "never connected")
                    continue
                self.archive.mark(d.ivorn, d.sink, "sent", _now())
                if self.server.send_to(name, xml, d.ivorn):
                    self._inflight.add((d.ivorn, name))
                    n += 1
                else:
                    self.archive.mark(d.ivorn, d.sink, "pending", _now(), "queue full")
        return n

    def _stale(self, updated_utc: str) -> bool:
        try:
            t = dt.datetime.fromisoformat(updated_utc)
        except ValueError:
            return False
        return (self.clock() - t).total_seconds() > EXPIRE_AFTER_S
