"""The test broker is a real Mosquitto that keeps QoS 1 sessions across a restart."""

from __future__ import annotations

import asyncio

import aiomqtt
import pytest

from tests.mosquitto import Mosquitto

pytestmark = pytest.mark.broker


async def _roundtrip(broker: Mosquitto) -> list[bytes]:
    got: list[bytes] = []
    # a persistent subscriber registers, goes away, a message is published, the broker
    # restarts, the subscriber comes back: the message must still be there (MQTT 3.1.1 §3.1.2.4)
    async with aiomqtt.Client(
        "127.0.0.1", broker.port, identifier="fixture-sub", clean_session=False
    ) as sub:
        await sub.subscribe("t/x", qos=1)
    async with aiomqtt.Client("127.0.0.1", broker.port, identifier="fixture-pub") as pub:
        await pub.publish("t/x", b"kept", qos=1)
    broker.restart()
    async with aiomqtt.Client(
        "127.0.0.1", broker.port, identifier="fixture-sub", clean_session=False
    ) as sub:
        async with asyncio.timeout(5):
            async for m in sub.messages:
                got.append(bytes(m.payload))  # type: ignore[arg-type]
                break
    return got


def test_persistent_session_survives_restart(mosquitto: Mosquitto) -> None:
    assert asyncio.run(_roundtrip(mosquitto)) == [b"kept"]
