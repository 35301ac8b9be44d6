"""Alerts from the live service against a real Mosquitto: a SIGKILL during a burst of
alerts loses none and sends none twice; live and replay give the same IVORNs."""

from __future__ import annotations

import asyncio
import contextlib
import json
import signal
import sqlite3
import time
from collections import Counter
from pathlib import Path

import aiomqtt
import pytest

from tests.livenet import SITES, demo_lines, publish_sync, running_service, wait_journal
from tests.mosquitto import Mosquitto
from tocsin.alerts.packet import read_alert
from tocsin.cli.main import main

pytestmark = [pytest.mark.broker, pytest.mark.slow]

WATCHER = "alert-watcher"


def _config(tmp: Path, broker: Mosquitto) -> Path:
    cfg = tmp / "tocsin.toml"
    cfg.write_text(
        f'registry = "{SITES}"\n'
        f'data_dir = "{tmp / "data"}"\n'
        "[broker]\n"
        f'url = "{broker.url}"\n'
        'client_id = "tocsin-test-service"\n'
        "[metrics]\nport = 0\n"
        "[engine]\ncandidate_far_per_year = 1e7\n"  # many weak candidates: a burst of alerts
        "[alerts]\n"
        'role = "test"\n'
        "internal_far_per_year = 1e9\npublic_far_per_year = 1e9\n"
        "burst = 1000\nmax_per_hour = 1e6\n"
    )
    return cfg


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
    cfg = _config(tmp_path, mosquitto)
    data = tmp_path / "data"
    db = data / "alerts.sqlite"
    svc = running_service(stack, cfg)
    publish_sync(mosquitto.port, lines[: len(lines) // 2])
    _wait(lambda: len(_rows(db, "SELECT ivorn FROM alerts")) >= 30, 120, "30 alerts")
    svc.stop(signal.SIGKILL)  # in the middle of the burst
    # deliveries whose outcome the kill left unknown (packet may have left, no PUBACK seen)
    in_flight = {
        (str(i), str(s))
        for i, s in _rows(db, "SELECT ivorn, sink FROM deliveries WHERE state='sent'")
    }
    assert len(in_flight) <= 2  # at most one per sink at a time
    done_before = {
        str(i)
        for (i,) in _rows(db, "SELECT ivorn FROM deliveries WHERE sink='mqtt' AND state='done'")
    }
    svc.start()
    svc.wait_connected()
    publish_sync(mosquitto.port, lines[len(lines) // 2 :])
    wait_journal(data, len(lines) - 2)  # the recording's two duplicates are not journaled
    # what replay makes of the journal (same policy, same config) ...
    rec = tmp_path / "journal.jsonl"
    rec.write_bytes(b"".join(p.read_bytes() for p in sorted((data / "journal").glob("*.jsonl"))))
    out = tmp_path / "replay"
    argv = ["replay", str(rec), "--sites", str(SITES), "--config", str(cfg), "--out", str(out)]
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
    assert svc.stop(signal.SIGTERM) == 0
    alerts = {str(i): bytes(x) for i, x in _rows(db, "SELECT ivorn, xml FROM alerts")}  # type: ignore[arg-type]
    assert set(alerts) == replayed
    assert len(done_before) >= 10  # the kill really came in the middle of deliveries

    got = asyncio.run(_watch(mosquitto.port, drain_s=3.0))
    counts = Counter(read_alert(p).ivorn for p in got)
    assert set(counts) == set(alerts)  # every archived alert reached the MQTT subscriber
    for p in got:
        assert p == alerts[read_alert(p).ivorn]  # byte-identical to the archive
    twice = {i for i, n in counts.items() if n > 1}
    # none twice, except a packet whose acknowledgement the kill interrupted
    assert twice <= {i for i, s in in_flight if s == "mqtt"}
    assert not twice & done_before
    for ivorn, xml in alerts.items():  # the packet directory holds each alert once
        assert (data / "alerts" / (ivorn.split("#")[1] + ".xml")).read_bytes() == xml
    assert json.loads((out / "summary.json").read_text())["alerts_held"] == 0
