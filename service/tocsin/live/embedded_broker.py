"""A small MQTT broker inside the process (amqtt), for ``tocsin demo`` and for
``tocsin serve`` when no broker is configured: one command runs the whole chain.

Only for localhost and trials. Production and the reliability tests use
Mosquitto (see deploy/): amqtt's redelivery of persistent QoS 1 sessions is not
relied on for the no-loss guarantees.
"""

from __future__ import annotations

import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager


@asynccontextmanager
async def embedded_broker(host: str = "127.0.0.1", port: int = 1883) -> AsyncIterator[str]:
    """Run a broker on ``host:port`` for the duration of the block; yields its URL."""
    from amqtt.broker import Broker

    for name in ("amqtt", "transitions"):
        logging.getLogger(name).setLevel(logging.ERROR)
    broker = Broker(
        {
            "listeners": {"default": {"type": "tcp", "bind": f"{host}:{port}"}},
            "plugins": {
                "amqtt.plugins.authentication.AnonymousAuthPlugin": {"allow_anonymous": True}
            },
        }
    )
    await broker.start()
    try:
        yield f"mqtt://{host}:{port}"
    finally:
        await broker.shutdown()
