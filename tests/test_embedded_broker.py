"""The embedded broker of `tocsin demo`: it carries messages, and it closes the socket
of every connection it is done with (a client that goes before its CONNECT too)."""

from __future__ import annotations

import asyncio
import gc
import socket
import warnings

import aiomqtt

from tocsin.live.embedded_broker import embedded_broker


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


async def _round_trip_then_a_silent_client(port: int) -> list[bytes]:
    got: list[bytes] = []
    async with embedded_broker("127.0.0.1", port):
        async with aiomqtt.Client("127.0.0.1", port, identifier="reader") as sub:
            await sub.subscribe("t/x", qos=1)
            async with aiomqtt.Client("127.0.0.1", port, identifier="writer") as pub:
                await pub.publish("t/x", b"hello", qos=1)
            async with asyncio.timeout(5):
                async for msg in sub.messages:
                    got.append(bytes(msg.payload))
                    break
        # a client that connects and goes without a word (stopped while connecting)
        _, writer = await asyncio.open_connection("127.0.0.1", port)
        writer.close()
        await writer.wait_closed()
        await asyncio.sleep(0.3)  # the broker reads the end of the stream
        gc.collect()  # an unclosed socket would be found (and warned about) here
    return got


def test_messages_pass_and_no_socket_is_left_unclosed() -> None:
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        got = asyncio.run(_round_trip_then_a_silent_client(_free_port()))
        gc.collect()
    assert got == [b"hello"]
    unclosed = [str(w.message) for w in caught if issubclass(w.category, ResourceWarning)]
    assert not unclosed, unclosed[:2]
