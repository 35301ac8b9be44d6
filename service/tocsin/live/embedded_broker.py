"""A small MQTT broker inside the process (amqtt), for ``tocsin demo`` and for
``tocsin serve`` when no broker is configured: one command runs the whole chain.

Only for localhost and trials. Production and the reliability tests use
Mosquitto (see deploy/): amqtt's redelivery of persistent QoS 1 sessions is not
relied on for the no-loss guarantees.

amqtt (0.12) leaves the socket of a connection open when the client closes it
before its CONNECT packet (a client stopped while it connects): the socket is then
only closed, with a ResourceWarning, whenever the garbage collector finds it. The
broker here closes every connection's socket once it is done with the connection.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager


@asynccontextmanager
async def embedded_broker(host: str = "127.0.0.1", port: int = 1883) -> AsyncIterator[str]:
    """Run a broker on ``host:port`` for the duration of the block; yields its URL."""
    from amqtt.broker import Broker

    class _ClosingBroker(Broker):  # type: ignore[misc]
        async def stream_connected(
            self,
            reader: asyncio.StreamReader,
            writer: asyncio.StreamWriter,
            listener_name: str,
        ) -> None:
            try:
                await super().stream_connected(reader, writer, listener_name)
            finally:  # the connection is over (its message loop has returned)
                if not writer.is_closing():
                    writer.close()

    for name in ("amqtt", "transitions"):
        logging.getLogger(name).setLevel(logging.ERROR)
    broker = _ClosingBroker(
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
