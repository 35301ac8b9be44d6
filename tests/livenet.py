"""Helpers for tests of the live service: run `tocsin serve` as a process, publish batches."""

from __future__ import annotations

import asyncio
import contextlib
import gzip
import os
import signal
import subprocess
import sys
import time
import urllib.request
from collections.abc import Iterable
from pathlib import Path

import aiomqtt
import orjson

from tests.mosquitto import Mosquitto, free_port
from tocsin.io.journal import read_from

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "replay_data" / "demo.jsonl.gz"
SITES = ROOT / "replay_data" / "network.toml"


def demo_lines() -> list[bytes]:
    """The shipped demo recording's lines without ``recv_ns`` (what agents send)."""
    out = []
    with gzip.open(DEMO, "rb") as fh:
        for line in fh:
            obj = orjson.loads(line)
            obj.pop("recv_ns", None)
            out.append(orjson.dumps(obj))
    return out


def write_config(
    tmp: Path,
    broker: Mosquitto,
    *,
    metrics_port: int = 0,
    max_message_bytes: int = 4_000_000,
    extra: str = "",
) -> Path:
    """The service config of a test: registry, data dir, broker, metrics, then ``extra``
    (more TOML tables)."""
    cfg = tmp / "tocsin.toml"
    cfg.write_text(
        f'registry = "{SITES}"\n'
        f'data_dir = "{tmp / "data"}"\n'
        "[broker]\n"
        f'url = "{broker.url}"\n'
        'client_id = "tocsin-test-service"\n'
        f"max_message_bytes = {max_message_bytes}\n"
        "[metrics]\n"
        f"port = {metrics_port}\n" + extra
    )
    return cfg


class ServiceProcess:
    """`tocsin serve` in a subprocess (so tests can SIGKILL it)."""

    def __init__(self, config: Path) -> None:
        self.config = config
        self.proc: subprocess.Popen[bytes] | None = None
        self.log = config.parent / "serve.log"
        self._log_from = 0

    def start(self) -> None:
        self._log_from = self.log.stat().st_size if self.log.exists() else 0
        env = dict(os.environ)
        with open(self.log, "ab") as fh:
            self.proc = subprocess.Popen(
                [sys.executable, "-m", "tocsin.cli.main", "serve", "--config", str(self.config)],
                stdout=fh,
                stderr=fh,
                env=env,
            )

    def wait_connected(self, timeout_s: float = 30.0) -> None:
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.log.exists() and b'"connected"' in self.log.read_bytes()[self._log_from :]:
                return
            assert self.proc is not None and self.proc.poll() is None, self.log.read_text()
            time.sleep(0.05)
        raise TimeoutError(f"service did not connect: {self.log.read_text()[-2000:]}")

    def __enter__(self) -> ServiceProcess:
        return self

    def __exit__(self, *exc: object) -> None:
        """Never leave a service running behind a failed test."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(timeout=10)
        self.proc = None

    def stop(self, sig: int = signal.SIGTERM, timeout_s: float = 60.0) -> int:
        assert self.proc is not None
        self.proc.send_signal(sig)
        code = self.proc.wait(timeout=timeout_s)
        self.proc = None
        return code


def running_service(stack: contextlib.ExitStack, config: Path) -> ServiceProcess:
    """A started, connected `tocsin serve`, killed at the end of the test whatever happens."""
    svc = stack.enter_context(ServiceProcess(config))
    svc.start()
    svc.wait_connected()
    return svc


def journal_lines(data: Path) -> list[dict[str, object]]:
    """The journal's complete lines, read by the service's own reader: the service
    may be appending while this reads, and a last line without its newline (not
    yet written out) is left out."""
    return [orjson.loads(line) for line in read_from(data / "journal", None)]


def wait_journal(data: Path, n: int, timeout_s: float = 120.0) -> None:
    """Wait until the journal holds at least ``n`` distinct (site, seq)."""
    deadline = time.monotonic() + timeout_s
    seen = 0
    while time.monotonic() < deadline:
        seen = len({(j["site"], j["seq"]) for j in journal_lines(data)})
        if seen >= n:
            return
        time.sleep(0.2)
    raise TimeoutError(f"journal holds {seen} of {n} batches")


async def publish(
    port: int, lines: Iterable[bytes | tuple[str, bytes]], *, client_id: str = "test-pub"
) -> int:
    """Publish at QoS 1: a batch line goes to its own site's hits topic, a
    ``(topic, payload)`` pair to that topic. Returns the count."""
    n = 0
    async with aiomqtt.Client("127.0.0.1", port, identifier=client_id) as c:
        for item in lines:
            if isinstance(item, tuple):
                topic, payload = item
            else:
                payload = item
                topic = f"tocsin/site/{orjson.loads(item)['site']}/hits"
            await c.publish(topic, payload, qos=1)
            n += 1
    return n


def publish_sync(port: int, lines: Iterable[bytes | tuple[str, bytes]], **kw: str) -> int:
    return asyncio.run(publish(port, lines, **kw))


def scrape(port: int) -> str:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        return str(r.read().decode())


__all__ = ["free_port"]
