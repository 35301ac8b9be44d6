"""An agent cut off from the broker for 30 s: its spool drains in order afterwards,
nothing is lost, and the service counts the outage as that site's dead time."""

from __future__ import annotations

import contextlib
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.livenet import SITES, journal_lines, running_service, write_config
from tests.mosquitto import Mosquitto
from tests.tcpproxy import CuttableProxy
from tocsin.gpstime import gps_now_ns
from tocsin.io.recording import decode_line
from tocsin.model.batch import HitBatch
from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry
from tocsin.pipeline import Pipeline

pytestmark = [pytest.mark.broker, pytest.mark.slow]

SITE = "kestrel-ridge"
OUTAGE_S = 30.0
NS = 10**9


def test_agent_outage_spool_drains_in_order(
    mosquitto: Mosquitto, tmp_path: Path, stack: contextlib.ExitStack
) -> None:
    cfg = write_config(tmp_path, mosquitto)
    data = tmp_path / "data"
    svc = running_service(stack, cfg)
    proxy = CuttableProxy(mosquitto.port)
    spool = tmp_path / "spool"
    log = open(tmp_path / "agent.log", "wb")  # noqa: SIM115 - closed below
    agent = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "tocsin.cli.main",
            "agent",
            "--site",
            SITE,
            "--broker",
            f"mqtt://127.0.0.1:{proxy.port}",
            "--source",
            "sim:20",
            "--seed",
            "3",
            "--spool",
            str(spool),
            "--batch-s",
            "1",
        ],
        stdout=log,
        stderr=log,
    )
    try:
        time.sleep(10)
        t_cut = time.time()
        proxy.cut()
        time.sleep(OUTAGE_S)
        proxy.restore()
        t_back = time.time()
        g_back = gps_now_ns()
        # wait until the spool has drained: the journal catches up with real time
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline:
            lines = [j for j in journal_lines(data) if j["site"] == SITE]
            if lines and max(int(j["live"][1]) for j in lines) > g_back + 5 * NS:
                break
            time.sleep(0.5)
        time.sleep(3)
        agent.send_signal(signal.SIGTERM)
        assert agent.wait(timeout=30) == 0
    finally:
        if agent.poll() is None:
            agent.kill()
        log.close()
        proxy.close()
    time.sleep(2)
    assert svc.stop(signal.SIGTERM) == 0
    journal = [j for j in journal_lines(data) if j["site"] == SITE]
    seqs = [int(j["seq"]) for j in journal]
    # every batch arrived once, and in order: the spool drained oldest first
    assert seqs == list(range(len(seqs))), seqs[:50]
    assert len(seqs) > 40
    # replay the journal: what the engine took as live, and what came too late
    reg = SiteRegistry.from_toml(SITES)
    pipe = Pipeline(reg, EngineConfig())
    late_live = 0
    total_live = sum(int(j["live"][1]) - int(j["live"][0]) for j in journal)
    for line in sorted((data / "journal").glob("*.jsonl")):
        for raw in line.read_bytes().splitlines():
            item = decode_line(raw, reg)
            pipe.offer(item)
            if pipe.last_status == "late" and isinstance(item, HitBatch):
                late_live += item.live_end - item.live_start
    pipe.finish()
    accepted_live = pipe.engine.counters.live_site_ns
    # The outage is dead time for the engine: the batches spooled from the cut until
    # the agent was connected again (its back-off after the network returned) came
    # late. Expected: (reconnect - cut) minus the lateness allowance, within a batch
    # and the clock skew of the two processes (2 s).
    reconnect = _reconnect_after(tmp_path / "agent.log", t_back)
    expected_dead = reconnect - t_cut - EngineConfig().lateness_s
    assert late_live / NS >= OUTAGE_S - EngineConfig().lateness_s - 1.0, late_live / NS
    assert abs(late_live / NS - expected_dead) <= 2.0, (late_live / NS, expected_dead)
    # and nothing is counted twice or lost: accepted + late = all live time sent
    assert accepted_live + late_live == total_live
    assert t_back - t_cut >= OUTAGE_S


def _reconnect_after(log: Path, t: float) -> float:
    """Unix time of the agent's first "connected" event after ``t`` (from its JSON log)."""
    import datetime as dt
    import json

    for line in log.read_text().splitlines():
        if not line.startswith("{"):
            continue
        obj = json.loads(line)
        if obj.get("event") != "connected":
            continue
        ts = dt.datetime.strptime(obj["ts"], "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=dt.UTC)
        if ts.timestamp() >= t - 0.5:
            return ts.timestamp()
    raise AssertionError(f"no reconnect in {log}")
