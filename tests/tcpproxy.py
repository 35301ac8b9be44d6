"""A loopback TCP proxy that a test can cut and restore (a site losing its network)."""

from __future__ import annotations

import asyncio
import contextlib
import threading

from tests.mosquitto import free_port


class CuttableProxy:
    """Forwards 127.0.0.1:port to 127.0.0.1:target_port; ``cut()`` drops every
    connection and refuses new ones until ``restore()``."""

    def __init__(self, target_port: int) -> None:
        self.port = free_port()
        self.target_port = target_port
        self._cut = False
        self._writers: set[asyncio.StreamWriter] = set()
        self._loop = asyncio.new_event_loop()
        self._ready = threading.Event()
        self._thread = threading.Thread(target=self._run, name="tcp-proxy", daemon=True)
        self._thread.start()
        self._ready.wait(5)

    def _run(self) -> None:
        asyncio.set_event_loop(self._loop)
        server = self._loop.run_until_complete(
            asyncio.start_server(self._handle, "127.0.0.1", self.port)
        )
        self._ready.set()
        try:
            self._loop.run_forever()
        finally:
            server.close()
            self._loop.run_until_complete(server.wait_closed())
            self._loop.close()

    async def _handle(self, r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
        if self._cut:
            w.close()
            return
        try:
            ur, uw = await asyncio.open_connection("127.0.0.1", self.target_port)
        except OSError:
            w.close()
            return
        self._writers |= {w, uw}

        async def pipe(src: asyncio.StreamReader, dst: asyncio.StreamWriter) -> None:
            with contextlib.suppress(OSError, asyncio.CancelledError):
                while data := await src.read(65536):
                    dst.write(data)
                    await dst.drain()
            dst.close()

        await asyncio.gather(pipe(r, uw), pipe(ur, w))
        self._writers -= {w, uw}

    def cut(self) -> None:
        def _do() -> None:
            self._cut = True
            for w in list(self._writers):
                w.close()

        self._loop.call_soon_threadsafe(_do)

    def restore(self) -> None:
        self._loop.call_soon_threadsafe(lambda: setattr(self, "_cut", False))

    def close(self) -> None:
        self.cut()
        self._loop.call_soon_threadsafe(self._loop.stop)
        self._thread.join(5)
