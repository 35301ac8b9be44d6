"""The site agent: batches v1, sources, the CLI, and delivery through a real Mosquitto.

Broker tests use the ``mosquitto`` fixture (a real broker, stopped and started to
make outages) and a subscriber with a persistent QoS 1 session — fixed client id,
clean session off, subscribed before the agent starts (MQTT 3.1.1 §3.1.2.4) — so
that the broker queues what is published while the subscriber is away.
"""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import logging
import os
import re
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import aiomqtt
import numpy as np
import orjson
import pytest
from astropy.time import Time
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from tests.mosquitto import Mosquitto
from tocsin.cli.main import main
from tocsin.gpstime import gps_now_ns, gps_ns_to_utc_iso
from tocsin.live.agent import Agent, AgentSettings, Cutter, upload_span
from tocsin.live.sources import SourceOptions, UploadSource, open_source, parse_time
from tocsin.live.spool import read_pending
from tocsin.model.batch import HitBatch, parse_batch
from tocsin.model.registry import SiteRegistry
from tocsin.model.service_config import BrokerConfig
from tocsin.types import NS_PER_S

SITE = "alder-fen-1"
ROOT = Path(__file__).resolve().parents[1]
HITS = f"tocsin/site/{SITE}/hits"
STATUS = f"tocsin/site/{SITE}/status"


# -- helpers ------------------------------------------------------------------------
class Collector:
    """A subscriber with a persistent QoS 1 session that reconnects until cancelled."""

    def __init__(self, port: int, ident: str, topic: str = "tocsin/#") -> None:
        self.port, self.ident, self.topic = port, ident, topic
        self.messages: list[tuple[str, bytes]] = []

    def _client(self) -> aiomqtt.Client:
        return aiomqtt.Client("127.0.0.1", self.port, identifier=self.ident, clean_session=False)

    async def register(self) -> None:
        """Create the session and its subscription (the broker queues from now on)."""
        async with self._client() as c:
            await c.subscribe(self.topic, qos=1)

    async def run(self) -> None:
        while True:
            try:
                async with self._client() as c:
                    await c.subscribe(self.topic, qos=1)
                    async for m in c.messages:
                        self.messages.append((str(m.topic), bytes(m.payload)))
            except aiomqtt.MqttError:
                await asyncio.sleep(0.1)

    def batches(self, registry: SiteRegistry) -> list[HitBatch]:
        """Every hits message, validated as a v1 batch of the topic's site, in arrival order."""
        return [
            parse_batch(orjson.loads(p), registry, topic_site=t.split("/")[2])
            for t, p in self.messages
            if t.endswith("/hits")
        ]

    def states(self) -> list[str]:
        return [orjson.loads(p)["state"] for t, p in self.messages if t.endswith("/status")]


async def until(cond: Callable[[], bool], timeout_s: float, what: str) -> None:
    deadline = time.monotonic() + timeout_s
    while not cond():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout_s} s waiting for {what}")
        await asyncio.sleep(0.05)


def first_arrivals(batches: list[HitBatch]) -> list[HitBatch]:
    """De-duplicate by seq, keeping the first arrival of each."""
    seen: set[int] = set()
    out = []
    for b in batches:
        if b.seq not in seen:
            seen.add(b.seq)
            out.append(b)
    return out


def check_stream(batches: list[HitBatch], *, first_seq: int = 0) -> list[HitBatch]:
    """Every seq from ``first_seq`` exactly once after de-duplication, first arrivals in seq
    order, every hit inside its batch's live interval (checked by parse_batch). Returns the
    de-duplicated batches."""
    firsts = first_arrivals(batches)
    seqs = [b.seq for b in firsts]
    assert seqs == list(range(first_seq, first_seq + len(seqs))), seqs
    return firsts


def gaps(batches: list[HitBatch]) -> list[int]:
    """Dead time between consecutive batches (ns); negative would be overlapping live time."""
    return [b.live_start - a.live_end for a, b in itertools.pairwise(batches)]


def settings_for(broker: Mosquitto, spool: Path, **kw: Any) -> AgentSettings:
    base: dict[str, Any] = {
        "site": SITE,
        "broker": BrokerConfig(url=broker.url, client_id="test-agent", keepalive_s=5),
        "spool_dir": spool,
        "batch_s": 0.2,
        "backoff_first_s": 0.2,
        "backoff_max_s": 1.0,
    }
    return AgentSettings(**(base | kw))


def exit_code(argv: list[str]) -> int:
    """``tocsin ...`` in this process; argparse's own errors exit through SystemExit."""
    try:
        return main(argv)
    except SystemExit as exc:
        return int(exc.code or 0)


def segments(spool: Path) -> list[Path]:
    return sorted(spool.glob("seg-*.log"))


def agent_cmd(broker: Mosquitto, spool: Path, *extra: str) -> list[str]:
    return [
        sys.executable,
        "-m",
        "tocsin.cli.main",
        "agent",
        "--site",
        SITE,
        "--broker",
        broker.url,
        "--spool",
        str(spool),
        "--batch-s",
        "0.2",
        "--log-level",
        "warning",
        *extra,
    ]


# -- hit times and sources ---------------------------------------------------------------
def test_parse_time_against_astropy() -> None:
    # contract §1: 2017-01-01T00:00:00 UTC is GPS second 1167264018 (IERS, Bulletin C)
    assert parse_time("2017-01-01T00:00:00Z") == 1167264018 * NS_PER_S
    # the leap second before it is GPS second 1167264017 (same table)
    assert parse_time("2016-12-31T23:59:60.5Z") == 1167264017 * NS_PER_S + 500_000_000
    # any other instant: astropy's own GPS seconds of the whole second, plus the digits
    for text, frac in [
        ("2026-03-14T00:00:01.123456789Z", 123_456_789),
        ("2024-02-29T23:59:59.5", 500_000_000),
        ("1999-12-31T12:00:00.000000001Z", 1),
    ]:
        whole = text.split(".")[0]
        gps_s = round(float(Time(whole, format="isot", scale="utc").gps))  # astropy reference
        assert parse_time(text) == gps_s * NS_PER_S + frac, text
    assert parse_time(" 1400000000123456789 ") == 1400000000123456789
    for bad in [
        "2026-02-30T00:00:00Z",
        "2026-03-14T24:00:00Z",
        "12:00",
        "-5",
        "1e9",
        "2026-03-14T00:00:01.1234567891Z",
        "99999999999999999999",
        "2015-03-14T23:59:60Z",
    ]:
        with pytest.raises(ValueError, match=re.escape(repr(bad))):
            parse_time(bad)


def test_file_source_reports_bad_lines_by_number(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    f = tmp_path / "hits.txt"
    f.write_text(
        "# a comment\n"  # 1
        "1400000000500000000\n"  # 2
        "\n"  # 3
        "not a time\n"  # 4
        "2024-05-17T16:53:03.000000001Z  # note\n"  # 5
        "1400000000100000000\n"  # 6
        "2024-13-01T00:00:00Z\n"  # 7
    )
    with caplog.at_level(logging.WARNING, logger="tocsin.agent"):
        src = open_source(f"file:{f}")
    assert isinstance(src, UploadSource)
    assert src.stats.lines == 7 and src.stats.bad_lines == 2
    assert [n for n, _ in src.stats.bad] == [4, 7]
    assert "'not a time'" in src.stats.bad[0][1]
    logged = [r.fields["line"] for r in caplog.records if r.getMessage() == "bad_line"]  # type: ignore[attr-defined]
    assert logged == [4, 7]
    iso = parse_time("2024-05-17T16:53:03.000000001Z")
    assert src.hits.tolist() == sorted([1400000000500000000, iso, 1400000000100000000])
    empty = tmp_path / "empty.txt"
    empty.write_text("# nothing\nbogus\n")
    with pytest.raises(ValueError, match="holds no valid hit time"):
        open_source(f"file:{empty}")


@settings(max_examples=200, deadline=None)
@given(data=st.data())
def test_cutter_batches_are_contiguous_and_complete(data: st.DataObject) -> None:
    b = data.draw(st.integers(1, 1000), label="batch_ns")
    max_hits = data.draw(st.integers(1, 12), label="max_hits")
    t0 = data.draw(st.integers(0, 10**6), label="t0")
    hits = np.sort(
        np.array(data.draw(st.lists(st.integers(t0, t0 + 20 * b), max_size=150)), dtype=np.int64)
    )
    marks = sorted(data.draw(st.lists(st.integers(t0, t0 + 25 * b), max_size=8)))
    cut_at = data.draw(st.integers(t0, t0 + 25 * b), label="cut")
    c = Cutter(b, max_hits)
    assert c.open_at(t0) == t0
    out = []
    delivered = t0
    for m in marks:  # as a real-time source: every hit before a mark is put before it
        chunk = hits[(hits >= delivered) & (hits < m)]
        assert c.put(chunk[::-1]) == 0  # any order
        closed = c.advance(m)
        assert all(x.end <= m for x in closed)
        out += closed
        delivered = max(delivered, m)
    c.put(hits[hits >= delivered])
    assert c.start is not None
    end = max(cut_at, c.start)  # live time ends at the cut (or where batches already reached)
    closed, dropped = c.cut(cut_at)
    out += closed
    assert (out[-1].end if out else t0) == end
    assert not c.is_open and c.last_end == end
    if out:
        assert out[0].start == t0
        assert all(x.end == y.start for x, y in itertools.pairwise(out))  # contiguous
    for k, x in enumerate(out):
        assert x.start < x.end
        assert bool(np.all(np.diff(x.t) >= 0)) and bool(np.all((x.t >= x.start) & (x.t < x.end)))
        assert x.t.size <= max_hits or bool(np.all(x.t == x.start))
        nxt = out[k + 1] if k + 1 < len(out) else None
        size_split = nxt is not None and nxt.t.size > 0 and int(nxt.t[0]) == x.end
        assert x.end % b == 0 or size_split or nxt is None or x.t.size >= max_hits
    got = np.concatenate([x.t for x in out]) if out else np.empty(0, dtype=np.int64)
    assert got.tolist() == hits[hits < end].tolist()  # no hit lost, none invented
    assert dropped == int((hits >= end).sum())
    # hits older than the open batch are refused and counted
    c.open_at(0)
    assert c.start == end and c.put(np.array([end - 1, end], dtype=np.int64)) == 1


def test_upload_span_covers_first_and_last_hit() -> None:
    b = NS_PER_S
    t = np.array([1400000000300000000, 1400000003000000000], dtype=np.int64)
    # floor(first) .. ceil(last + 1 ns): a hit on a boundary opens the next batch
    assert upload_span(t, b) == (1400000000 * b, 1400000004 * b)


@pytest.mark.parametrize(
    ("argv", "named"),
    [
        (["--batch-s", "0"], "--batch-s 0.0"),
        (["--batch-s", "abc"], "'abc'"),
        (["--max-batch-hits", "0"], "--max-batch-hits 0"),
        (["--spool-max-mb", "-1"], "--spool-max-mb -1.0"),
        (["--keepalive-s", "1"], "--keepalive-s 1"),
        (["--site", "Bad_Site"], "'Bad_Site'"),
        (["--source", "bogus:1"], "'bogus:1'"),
        (["--source", "sim:fast"], "'fast'"),
        (["--source", "sim:-3"], "-3.0"),
        (["--source", "file:/nonexistent/hits.txt"], "'/nonexistent/hits.txt'"),
        (["--broker", "http://example.invalid"], "http://example.invalid"),
        (["--password-env", "TOCSIN_TEST_NO_SUCH_VAR"], "'TOCSIN_TEST_NO_SUCH_VAR'"),
        (["--ca-file", "/nonexistent/ca.pem"], "'/nonexistent/ca.pem'"),
        (["--duration", "0"], "--duration 0.0"),
    ],
)
def test_cli_bad_values_exit_2(
    argv: list[str],
    named: str,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setattr("tocsin.live.logs.setup", lambda level="info": None)
    base = {"--site": SITE, "--broker": "mqtt://127.0.0.1:1", "--spool": str(tmp_path / "s")}
    for k, v in base.items():
        if k not in argv:
            argv = [k, v, *argv]
    assert exit_code(["agent", *argv]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert named in err[-1]
    assert not (tmp_path / "s").exists()  # refused before anything was started


def test_cli_refuses_an_upload_spanning_years(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr("tocsin.live.logs.setup", lambda level="info": None)
    f = tmp_path / "hits.txt"
    f.write_text("1400000000000000000\n1500000000000000000\n")  # 3.2 years apart
    argv = [
        "agent",
        "--site",
        SITE,
        "--broker",
        "mqtt://127.0.0.1:1",
        "--spool",
        str(tmp_path / "s"),
        "--source",
        f"file:{f}",
    ]
    assert exit_code(argv) == 2
    assert "spans 100000001 batches" in capsys.readouterr().err


# -- through a real broker -------------------------------------------------------------------
@pytest.mark.broker
def test_upload_publishes_the_file_exactly(
    mosquitto: Mosquitto, small_registry: SiteRegistry, tmp_path: Path
) -> None:
    rng = np.random.default_rng(7)
    t0 = 1400000000 * NS_PER_S + 123_456_789
    hits = np.sort(t0 + rng.integers(0, 6_800_000_000, size=1500)).astype(np.int64)
    quiet = (hits >= 1400000003 * NS_PER_S) & (hits < 1400000004 * NS_PER_S)
    hits[quiet] -= NS_PER_S  # no hit in second 3: that batch is a heartbeat
    hits[10] = hits[11]  # a repeated time is two hits
    hits[-1] = 1400000007 * NS_PER_S  # the last hit exactly on a batch boundary
    hits.sort()
    lines = ["# fictional site alder-fen-1"]
    lines += [
        gps_ns_to_utc_iso(int(v)) if k % 100 == 0 else str(int(v)) for k, v in enumerate(hits)
    ]
    lines.insert(700, "garbage line")
    f = tmp_path / "hits.txt"
    f.write_text("\n".join(lines[::-1]) + "\n")  # in any order
    spool = tmp_path / "spool"

    async def scenario() -> tuple[Collector, Agent]:
        col = Collector(mosquitto.port, "test-upload-sub")
        await col.register()
        task = asyncio.create_task(col.run())
        agent = Agent(
            settings_for(mosquitto, spool, batch_s=1.0, max_batch_hits=150),
            open_source(f"file:{f}"),
        )
        async with agent:
            await asyncio.wait_for(agent.wait(), 30)
        n = agent.stats.batches_spooled
        await until(lambda: len(col.batches(small_registry)) >= n, 10, f"{n} batches")
        await until(lambda: "offline" in col.states(), 5, "offline status")
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
        return col, agent

    col, agent = asyncio.run(scenario())
    assert agent.source.stats.bad_lines == 1 and agent.source.stats.bad[0][0] == 1500 + 2 - 700
    batches = check_stream(col.batches(small_registry))
    assert len(batches) == agent.stats.batches_spooled == agent.stats.published
    assert gaps(batches) == [0] * (len(batches) - 1)  # live time contiguous
    assert batches[0].live_start == 1400000000 * NS_PER_S  # floor(first hit) to the 1 s grid
    assert batches[-1].live_end == 1400000008 * NS_PER_S  # past the last hit, on the grid
    got = np.concatenate([b.t for b in batches])
    assert got.tolist() == hits.tolist()  # every hit exactly once
    assert max(b.n_hits for b in batches) <= 150 < len(hits) / 7  # size splits happened
    (beat,) = [b for b in batches if b.n_hits == 0]  # an empty batch still reports live time
    assert (beat.live_start, beat.live_end) == (1400000003 * NS_PER_S, 1400000004 * NS_PER_S)
    assert col.states()[-1] == "offline"  # retained, published on the clean exit
    assert segments(spool) == [] and read_pending(spool) == []


@pytest.mark.broker
def test_sim_agent_publishes_contiguous_poisson_batches(
    mosquitto: Mosquitto, small_registry: SiteRegistry, tmp_path: Path
) -> None:
    rate = 300.0

    async def scenario() -> tuple[Collector, Agent, list[str]]:
        col = Collector(mosquitto.port, "test-sim-sub")
        await col.register()
        task = asyncio.create_task(col.run())
        agent = Agent(settings_for(mosquitto, tmp_path / "spool"), open_source(f"sim:{rate}"))
        async with agent:
            await until(lambda: len(col.batches(small_registry)) >= 8, 15, "8 batches")
            during = col.states()
        n = agent.stats.batches_spooled
        await until(lambda: len(col.batches(small_registry)) >= n, 10, f"{n} batches")
        await until(lambda: col.states()[-1:] == ["offline"], 5, "offline status")
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
        return col, agent, during

    col, agent, during = asyncio.run(scenario())
    assert during[0] in ("online", "spooling") and "online" in during
    batches = check_stream(col.batches(small_registry))
    assert len(batches) == agent.stats.batches_spooled
    assert gaps(batches) == [0] * (len(batches) - 1)
    assert all(b.live_end % (NS_PER_S // 5) == 0 for b in batches[:-1])  # on the 0.2 s grid
    n_hits = sum(b.n_hits for b in batches)
    assert n_hits == agent.stats.hits_in and agent.stats.hits_dropped == 0
    # the simulated detector is a Poisson process: the count over the live time is consistent
    # with rate x live time (scipy.stats.poisson central interval, 1 - 1e-6)
    live_s = (batches[-1].live_end - batches[0].live_start) / NS_PER_S
    lo, hi = stats.poisson.interval(1 - 1e-6, rate * live_s)
    assert lo <= n_hits <= hi


@pytest.mark.broker
def test_broker_outage_loses_no_batch(
    mosquitto: Mosquitto, small_registry: SiteRegistry, tmp_path: Path
) -> None:
    spool = tmp_path / "spool"

    async def scenario() -> tuple[Collector, Agent]:
        col = Collector(mosquitto.port, "test-outage-sub")
        await col.register()
        task = asyncio.create_task(col.run())
        agent = Agent(settings_for(mosquitto, spool), open_source("sim:100"))
        async with agent:
            await until(lambda: len(col.batches(small_registry)) >= 3, 15, "first batches")
            await asyncio.to_thread(mosquitto.stop)
            spooled_before = agent.stats.batches_spooled
            await until(lambda: agent.spool.pending >= 8, 15, "batches piling up in the spool")
            assert agent.stats.batches_spooled > spooled_before and not agent.connected
            await asyncio.to_thread(mosquitto.start)
            await until(lambda: agent.stats.connects >= 2, 15, "the agent to reconnect")
            await until(lambda: agent.spool.pending == 0, 15, "the spool to drain")
            await asyncio.sleep(0.5)  # a few more batches after the outage
        n = agent.stats.batches_spooled
        await until(
            lambda: len(first_arrivals(col.batches(small_registry))) >= n,
            15,
            f"all {n} batches at the subscriber",
        )
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
        return col, agent

    col, agent = asyncio.run(scenario())
    batches = check_stream(col.batches(small_registry))  # none missing, in order
    assert len(batches) == agent.stats.batches_spooled
    assert gaps(batches) == [0] * (len(batches) - 1)  # the outage cost no live time
    assert agent.stats.batches_refused == 0
    assert segments(spool) == [] and read_pending(spool) == []


@pytest.mark.broker
def test_full_spool_becomes_dead_time(
    mosquitto: Mosquitto,
    small_registry: SiteRegistry,
    tmp_path: Path,
    caplog: pytest.LogCaptureFixture,
) -> None:
    async def scenario() -> tuple[Collector, Agent]:
        col = Collector(mosquitto.port, "test-full-sub")
        await col.register()
        await asyncio.to_thread(mosquitto.stop)
        agent = Agent(
            settings_for(mosquitto, tmp_path / "spool", batch_s=0.05, spool_max_bytes=8192),
            open_source("sim:100"),
        )
        async with agent:
            await until(lambda: agent.stats.batches_refused >= 10, 20, "the spool to overflow")
            await asyncio.to_thread(mosquitto.start)
            task = asyncio.create_task(col.run())
            await until(
                lambda: agent.spool.pending == 0 and agent.stats.published > 20,
                15,
                "the spool to drain",
            )
            after = agent.stats.batches_spooled
            await until(
                lambda: agent.stats.batches_spooled >= after + 3, 15, "batches accepted again"
            )
        n = agent.stats.batches_spooled
        await until(
            lambda: len(first_arrivals(col.batches(small_registry))) >= n, 15, f"all {n} batches"
        )
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
        return col, agent

    with caplog.at_level(logging.INFO, logger="tocsin.agent"):
        col, agent = asyncio.run(scenario())
    batches = check_stream(col.batches(small_registry))  # seq has no jump: refused took none
    g = gaps(batches)
    assert min(g) == 0 and sum(x > 0 for x in g) == 1  # one explicit gap, no overlap
    assert sum(g) == agent.stats.refused_ns  # the dead time is exactly what was refused
    events = [r.getMessage() for r in caplog.records]
    assert events.count("spool_full") == 1  # one warning per episode ...
    (ep,) = [r for r in caplog.records if r.getMessage() == "spool_full_episode"]
    assert ep.fields["refused_batches"] == agent.stats.batches_refused  # type: ignore[attr-defined]


@pytest.mark.broker
def test_sigkilled_agent_restarts_with_its_spool(
    mosquitto: Mosquitto, small_registry: SiteRegistry, tmp_path: Path
) -> None:
    spool = tmp_path / "spool"
    mosquitto.stop()
    first = subprocess.Popen(agent_cmd(mosquitto, spool, "--source", "sim:50"), cwd=ROOT)
    try:
        deadline = time.monotonic() + 30
        while len(read_pending(spool) if spool.exists() else []) < 6:
            assert time.monotonic() < deadline and first.poll() is None
            time.sleep(0.1)
    finally:
        first.send_signal(signal.SIGKILL)
        first.wait()
    left = read_pending(spool)
    assert [r.seq for r in left] == list(range(len(left)))

    async def scenario() -> Collector:
        await asyncio.to_thread(mosquitto.start)
        col = Collector(mosquitto.port, "test-kill-sub")
        await col.register()
        task = asyncio.create_task(col.run())
        second = await asyncio.create_subprocess_exec(
            *agent_cmd(mosquitto, spool, "--source", "sim:50"), cwd=ROOT
        )
        try:
            await until(
                lambda: len(first_arrivals(col.batches(small_registry))) > len(left) + 4,
                30,
                "the spooled batches and new ones",
            )
        finally:
            second.send_signal(signal.SIGTERM)  # a clean stop: exit 0, status offline
            code = await asyncio.wait_for(second.wait(), 30)
        assert code == 0
        await until(lambda: "offline" in col.states(), 10, "offline status")
        await asyncio.sleep(0.3)
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
        return col

    col = asyncio.run(scenario())
    got = col.batches(small_registry)
    batches = check_stream(got)
    by_seq = {r.seq: r.payload for r in left}
    for t, p in col.messages:  # the spooled batches, byte for byte; every repeat identical
        if t.endswith("/hits"):
            seq = orjson.loads(p)["seq"]
            assert by_seq.setdefault(seq, p) == p
    assert len(batches) > len(left)  # the restarted agent added batches after them ...
    old, new = batches[: len(left)], batches[len(left) :]
    assert gaps(old) == [0] * (len(old) - 1)
    assert new[0].live_start > old[-1].live_end  # ... after an explicit gap (it was dead)
    assert gaps(new) == [0] * (len(new) - 1)
    assert segments(spool) == []


@pytest.mark.broker
def test_last_will_says_offline_when_the_agent_is_killed(
    mosquitto: Mosquitto, tmp_path: Path
) -> None:
    keepalive_s = 5

    async def scenario() -> tuple[list[str], float]:
        col = Collector(mosquitto.port, "test-will-sub", STATUS)
        task = asyncio.create_task(col.run())
        proc = await asyncio.create_subprocess_exec(
            *agent_cmd(
                mosquitto,
                tmp_path / "spool",
                "--source",
                "sim:10",
                "--keepalive-s",
                str(keepalive_s),
            ),
            cwd=ROOT,
        )
        try:
            await until(lambda: "online" in col.states(), 30, "online status")
        finally:
            proc.send_signal(signal.SIGKILL)
            await proc.wait()
        killed = time.monotonic()
        # MQTT 3.1.1 §3.1.2.10: the broker treats 1.5 x keepalive without traffic as a lost
        # client and publishes its will
        await until(lambda: col.states()[-1] == "offline", keepalive_s * 1.5, "the last will")
        waited = time.monotonic() - killed
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
        return col.states(), waited

    states, _ = asyncio.run(scenario())
    assert states[-1] == "offline"

    async def retained() -> bytes:
        async with aiomqtt.Client("127.0.0.1", mosquitto.port) as c:
            await c.subscribe(STATUS, qos=1)
            async with asyncio.timeout(5):
                async for m in c.messages:
                    return bytes(m.payload)
        raise AssertionError("no retained status")

    obj = orjson.loads(asyncio.run(retained()))
    assert obj["state"] == "offline" and obj["site"] == SITE and obj["v"] == 1  # retained


@pytest.mark.broker
def test_fifo_source_in_real_time(
    mosquitto: Mosquitto, small_registry: SiteRegistry, tmp_path: Path
) -> None:
    fifo = tmp_path / "hits.fifo"
    os.mkfifo(fifo)
    sent: list[int] = []

    def writer(n_lines: int, then_silent_s: float, extra: list[str]) -> None:
        with open(fifo, "w") as fh:  # blocks until the agent has the FIFO open
            for line in extra:
                fh.write(line + "\n")
            for _ in range(n_lines):
                t = gps_now_ns() - 50_000_000  # each hit reported 50 ms late
                sent.append(t)
                fh.write(f"{t}\n")
                fh.flush()
                time.sleep(0.02)
            time.sleep(then_silent_s)

    async def scenario() -> tuple[Collector, Agent]:
        col = Collector(mosquitto.port, "test-fifo-sub")
        await col.register()
        task = asyncio.create_task(col.run())
        src = open_source(f"file:{fifo}", SourceOptions(stall_s=0.6))
        agent = Agent(settings_for(mosquitto, tmp_path / "spool"), src)
        async with agent:
            old = gps_now_ns() - 5 * NS_PER_S  # far older than the open batch: dropped
            await asyncio.to_thread(writer, 30, 0.0, ["# hello", "not-a-time"])
            await asyncio.sleep(0.5)  # no writer: not live
            await asyncio.to_thread(writer, 30, 1.2, [str(old)])  # silent > stall: not live
            await asyncio.to_thread(writer, 10, 0.0, [])
            await asyncio.sleep(0.3)
        n = agent.stats.batches_spooled
        await until(
            lambda: len(first_arrivals(col.batches(small_registry))) >= n, 10, f"all {n} batches"
        )
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
        return col, agent

    col, agent = asyncio.run(scenario())
    batches = check_stream(col.batches(small_registry))
    got = np.concatenate([b.t for b in batches])
    assert got.tolist() == sorted(sent)  # every on-time hit, in the batch of its time
    assert agent.stats.hits_dropped == 1 and agent.source.stats.bad_lines == 1
    assert agent.source.stats.bad[0][0] == 2  # line numbers count from the first writer's start
    g = gaps(batches)
    assert min(g) >= 0 and sum(x > 0 for x in g) == 2  # writer gone; writer silent too long
    # the stall ends live time 0.6 s (the limit) after the last line arrived — the hit was
    # written 50 ms after its time — and before the silent writer went away 1.2 s later
    stall_end = [a.live_end for a, x in zip(batches, g, strict=False) if x > 0][1]
    last_before = max(t for t in sent if t < stall_end)
    assert 650_000_000 <= stall_end - last_before < 1_250_000_000
