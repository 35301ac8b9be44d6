"""Alerts from the live service against a real Mosquitto: a SIGKILL during a burst of
alerts loses none and sends none twice; live and replay give the same IVORNs."""

from __future__ import annotations

import asyncio
import contextlib
import json
import signal
import sqlite3
import threading
import time
from collections import Counter
from pathlib import Path

import aiomqtt
import pytest

from tests.livenet import (
    SITES,
    demo_lines,
    publish_sync,
    running_service,
    wait_journal,
    write_config,
)
from tests.mosquitto import Mosquitto, free_port
from tocsin.alerts.packet import read_alert
from tocsin.cli.main import main
from tocsin.live.transport import TransportClient

pytestmark = [pytest.mark.broker, pytest.mark.slow]

WATCHER = "alert-watcher"


class VtpWatcher(threading.Thread):
    """A VOEvent transport subscriber in its own thread and event loop, reconnecting."""

    def __init__(self, port: int) -> None:
        super().__init__(daemon=True)
        self.port = port
        self.got: list[bytes] = []
        self.duplicates = 0
        self.connects = 0
        self._halt = threading.Event()

    def run(self) -> None:
        asyncio.run(self._main())

    async def _main(self) -> None:
        async def on_packet(raw: bytes, voevent: object) -> None:
            self.got.append(raw)

        client = TransportClient(
            "127.0.0.1", self.port, on_packet, backoff_min_s=0.2, backoff_max_s=1.0
        )
        await client.start()
        while not self._halt.is_set():
            await asyncio.sleep(0.05)
            self.duplicates = client.counters.duplicates
            self.connects = client.counters.connects
        await client.stop()

    def finish(self) -> None:
        self._halt.set()
        self.join(timeout=30)


def _config(tmp: Path, broker: Mosquitto, vtp_port: int) -> Path:
    return write_config(
        tmp,
        broker,
        extra=(
            "[engine]\ncandidate_far_per_year = 1e7\n"  # many weak candidates: a burst of alerts
            "[alerts]\n"
            'role = "test"\n'
            "internal_far_per_year = 1e9\npublic_far_per_year = 1e9\n"
            "burst = 1000\nmax_per_hour = 1e6\n"
            "[alerts.transport]\n"
            f"port = {vtp_port}\n"
            'allow = [{ name = "watcher", network = "127.0.0.1/32" }]\n'
        ),
    )


def _rows(db: Path, sql: str) -> list[tuple[object, ...]]:
    if not db.exists():
        return []
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10)
    try:
        return list(con.execute(sql).fetchall())
    except sqlite3.OperationalError:
        return []
    finally:
        con.close()


async def _watch(port: int, *, drain_s: float | None) -> list[bytes]:
    """Persistent-session subscriber: subscribe once, later collect what the broker kept."""
    out: list[bytes] = []
    async with aiomqtt.Client("127.0.0.1", port, identifier=WATCHER, clean_session=False) as c:
        await c.subscribe("tocsin/alerts", qos=1)
        if drain_s is None:
            return out
        with contextlib.suppress(TimeoutError):
            while True:
                msg = await asyncio.wait_for(anext(c.messages), drain_s)
                assert isinstance(msg.payload, bytes)
                out.append(msg.payload)
    return out


def _wait(pred: object, timeout_s: float, what: str) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if pred():  # type: ignore[operator]
            return
        time.sleep(0.2)
    raise TimeoutError(what)


def test_sigkill_during_alert_burst_delivers_each_alert_once(
    mosquitto: Mosquitto, tmp_path: Path, stack: contextlib.ExitStack
) -> None:
    asyncio.run(_watch(mosquitto.port, drain_s=None))
    lines = demo_lines()
    vtp_port = free_port()
    cfg = _config(tmp_path, mosquitto, vtp_port)
    data = tmp_path / "data"
    db = data / "alerts.sqlite"
    svc = running_service(stack, cfg)
    watcher = VtpWatcher(vtp_port)
    watcher.start()
    stack.callback(watcher.finish)
    publish_sync(mosquitto.port, lines[: len(lines) // 2])
    _wait(lambda: len(_rows(db, "SELECT ivorn FROM alerts")) >= 30, 120, "30 alerts")
    svc.stop(signal.SIGKILL)  # in the middle of the burst
    # deliveries whose outcome the kill left unknown (packet may have left, no PUBACK seen)
    in_flight = {
        (str(i), str(s))
        for i, s in _rows(db, "SELECT ivorn, sink FROM deliveries WHERE state='sent'")
    }
    assert len(in_flight) <= 3  # at most one per sink (mqtt, vtp:watcher, dir) at a time
    done_before = {
        str(i)
        for (i,) in _rows(db, "SELECT ivorn FROM deliveries WHERE sink='mqtt' AND state='done'")
    }
    svc.start()
    svc.wait_connected()
    publish_sync(mosquitto.port, lines[len(lines) // 2 :])
    wait_journal(data, len(lines) - 2)  # the recording's two duplicates are not journaled
    # what replay makes of the journal (same policy, same config) ...
    out = tmp_path / "replay"
    journal = data / "journal"  # replay reads the segments in order
    argv = ["replay", str(journal), "--sites", str(SITES), "--config", str(cfg), "--out", str(out)]
    assert main([*argv, "--quiet"]) == 0
    replayed = {str(i) for (i,) in _rows(out / "alerts.sqlite", "SELECT ivorn FROM alerts")}
    assert len(replayed) > 100
    # ... the live service reaches too, once its idle tick has closed the last windows:
    # live and replay give the same IVORNs for the same candidates
    _wait(
        lambda: {str(i) for (i,) in _rows(db, "SELECT ivorn FROM alerts")} == replayed,
        120,
        "live alerts equal to the replayed ones",
    )
    _wait(
        lambda: _rows(db, "SELECT count(*) FROM deliveries WHERE state != 'done'")[0][0] == 0,
        120,
        "every delivery done",
    )
    # an operator withdraws one alert from another process; the running service sends it
    first = sorted(replayed)[0]
    assert main(["retract", first, "--reason", "drill: clock fault", "--config", str(cfg)]) == 0
    retraction = first + "-x"
    _wait(
        lambda: (
            _rows(db, "SELECT count(*) FROM deliveries WHERE state != 'done'")[0][0] == 0
            and len(_rows(db, f"SELECT 1 FROM deliveries WHERE ivorn = '{retraction}'")) == 3
        ),
        60,
        "the retraction delivered",
    )
    assert svc.stop(signal.SIGTERM) == 0
    alerts = {str(i): bytes(x) for i, x in _rows(db, "SELECT ivorn, xml FROM alerts")}  # type: ignore[arg-type]
    assert set(alerts) == replayed | {retraction}
    assert read_alert(alerts[retraction]).citations == [(first, "retraction")]
    assert len(done_before) >= 10  # the kill really came in the middle of deliveries
    print(
        f"alerts archived {len(alerts)}; MQTT deliveries done before the kill "
        f"{len(done_before)}; in flight at the kill {sorted(in_flight)}"
    )

    got = asyncio.run(_watch(mosquitto.port, drain_s=3.0))
    counts = Counter(read_alert(p).ivorn for p in got)
    assert set(counts) == set(alerts)  # every archived alert reached the MQTT subscriber
    for p in got:
        assert p == alerts[read_alert(p).ivorn]  # byte-identical to the archive
    twice = {i for i, n in counts.items() if n > 1}
    print(f"MQTT subscriber: {len(got)} packets, {len(counts)} distinct, twice: {sorted(twice)}")
    # none twice, except a packet whose acknowledgement the kill interrupted
    assert twice <= {i for i, s in in_flight if s == "mqtt"}
    assert not twice & done_before
    # the transport subscriber: every alert once (it drops a byte-identical resend,
    # VTP 2.0 §8; only the packet in flight at the kill can be resent)
    watcher.finish()
    assert watcher.connects >= 2  # it was cut off by the kill and came back
    vtp = Counter(read_alert(p).ivorn for p in watcher.got)
    assert set(vtp) == set(alerts)
    print(
        f"transport subscriber: {len(watcher.got)} packets, {len(vtp)} distinct, "
        f"identical resends dropped {watcher.duplicates}, connections {watcher.connects}"
    )
    assert max(vtp.values()) == 1
    assert watcher.duplicates <= sum(1 for _, s in in_flight if s == "vtp:watcher")
    for p in watcher.got:
        assert p == alerts[read_alert(p).ivorn]
    for ivorn, xml in alerts.items():  # the packet directory holds each alert once
        assert (data / "alerts" / (ivorn.split("#")[1] + ".xml")).read_bytes() == xml
    assert json.loads((out / "summary.json").read_text())["alerts_held"] == 0
