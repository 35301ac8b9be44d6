"""A held-up event loop must not let the wall-clock tick overtake unread messages.

The service runs in this process against a real Mosquitto; a publisher in its own
thread sends every site's batches in real time (0.5 s each, like agents). Once the
service is caught up, its loop is held up for 3.3 s (as a long computation would),
while the publisher goes on. Batches sent meanwhile wait in the socket; none of them
may be judged late when the loop resumes (lateness allowance 3 s).
"""

from __future__ import annotations

import asyncio
import threading
import time
from pathlib import Path

import aiomqtt
import orjson
import pytest

from tests.mosquitto import Mosquitto
from tocsin.gpstime import gps_now_ns
from tocsin.live.service import Service
from tocsin.model.registry import SiteRegistry
from tocsin.model.service_config import BrokerConfig, MetricsConfig, ServiceConfig

pytestmark = [pytest.mark.broker, pytest.mark.slow, pytest.mark.asyncio]

STEP_NS = 500_000_000
RUN_S = 9.0


class Publisher(threading.Thread):
    def __init__(self, port: int, sites: list[str]) -> None:
        super().__init__(daemon=True)
        self.port, self.sites, self.sent = port, sites, 0

    def run(self) -> None:
        asyncio.run(self._main())

    async def _main(self) -> None:
        async with aiomqtt.Client("127.0.0.1", self.port, identifier="stall-pub") as c:
            t = gps_now_ns() // STEP_NS * STEP_NS
            seq = 0
            end = time.monotonic() + RUN_S
            while time.monotonic() < end:
                while gps_now_ns() < t + STEP_NS:
                    await asyncio.sleep(0.01)
                for s in self.sites:
                    batch = {
                        "v": 1,
                        "site": s,
                        "seq": seq,
                        "live": [t, t + STEP_NS],
                        "t": [t + STEP_NS // 2],
                    }
                    await c.publish(f"tocsin/site/{s}/hits", orjson.dumps(batch), qos=1)
                    self.sent += 1
                seq += 1
                t += STEP_NS


async def test_stalled_loop_does_not_make_waiting_batches_late(
    mosquitto: Mosquitto, tmp_path: Path, small_registry: SiteRegistry
) -> None:
    reg = tmp_path / "sites.toml"
    reg.write_text(small_registry.to_toml())
    cfg = ServiceConfig(
        registry=reg,
        data_dir=tmp_path / "data",
        broker=BrokerConfig(url=mosquitto.url, client_id="stall-service"),
        metrics=MetricsConfig(port=0),
    )
    service = Service(cfg)
    calls = {"n": 0}
    refresh = service.refresh_gauges

    def held_up_once() -> None:  # called about once a second inside the message loop
        calls["n"] += 1
        if calls["n"] == 4:
            time.sleep(3.3)  # blocks the event loop, as a long computation would
        refresh()

    service.refresh_gauges = held_up_once  # type: ignore[method-assign]
    stop = asyncio.Event()
    task = asyncio.create_task(service.run(stop))
    await asyncio.sleep(1.5)  # connected and subscribed
    pub = Publisher(mosquitto.port, small_registry.ids)
    pub.start()
    while pub.is_alive():
        await asyncio.sleep(0.2)
    await asyncio.sleep(2.0)
    stop.set()
    await task
    service.close()
    c = service.pipeline.counters
    assert calls["n"] >= 4  # the stall happened while batches were flowing
    assert pub.sent >= 3 * 15
    assert c.rejected.get("late", 0) == 0, c.rejected
    assert c.accepted == pub.sent
