"""Live network benchmark: sustained hits/s and candidate latency of ``tocsin serve``.

Acceptance point (quoted from the issue):

    "`bench/live.py` drives Mosquitto with many agents and prints sustained hits/s with
    zero loss and p50/p99 latency from window close to candidate. Targets on this
    machine: at least 100,000 hits/s sustained; p99 within 1 s beyond the lateness
    allowance. Quote its output."

The lateness allowance is ``EngineConfig.lateness_s`` (3 s), so the latency target is
p99 <= 4 s. This is a benchmark, not a test: it measures and prints, and asserts nothing
about speed. Everything runs on loopback, side by side in one run on this machine.

What runs, per load stage (each in its own temporary directory):

* a Mosquitto broker (``tests/mosquitto.py``: persistent sessions, a free loopback port);
* ``tocsin serve`` as a subprocess (this Python, ``-m tocsin.cli.main serve``) with its
  metrics endpoint on a free port and its structured log in a file;
* ``--agent-procs`` worker processes (default 2; this machine has 2 cores, shared with the
  service and the broker as on a real server), each running its share of the ``--sites``
  real :class:`~tocsin.live.agent.Agent` objects: one MQTT connection, one fsynced spool
  and QoS 1 publishing per site, 1 s batches on the GPS grid, fed by a simulated detector
  (``SimSource``, which also emits the injected hits) at ``--rate`` Hz. All agents start
  their live time on the same whole second and end it on another (kept from when the
  engine mis-modelled partly live bins shared by many sites; that is fixed and tested in
  ``tests/test_partial_live.py``);
* a second MQTT subscriber in this process, which times each batch's arrival at the
  broker: the agents' and broker's share of the latency.

The network: ``--sites`` (200) GPS-timed scintillators (clock sigma 10-50 ns, 3 m2, so
~500 Hz of muons each) on a jittered grid ``--spacing-m`` (350 m) apart on an invented high
plateau: a dense ground array, ~5 km across. 200 x 500 Hz = 100,000 hits/s offered.

The engine configuration: the shipped defaults (``--scales`` and ``--front-scales``
take other lists), printed with their cost at this load. Of the coincidence scales only
1 us and 100 us are evaluated at 100,000 hits/s (the others hold more than
``max_expected_neighbours`` chance hits per seed, or repeat a smaller scale), but the
100 s scale's evaluator still keeps 100 s of hits (10 million) in the engine's buffer.
Of the front scales, 100 us is wider than every light time across this ~7 km array, so
it is not evaluated (``FrontSearch.scale_active``; evaluated, it would cost ~150 us per
seed here: ~10 chance hits in every seed's slots, 66 pairs, two mirror solutions each).

Warm-up: the engine judges coincidences only with rate estimates from at least 60 s of
live time before the current 60 s rate epoch. Rather than wait ~2 minutes, the bench
pre-loads 64 s of simulated history ending on the last 60 s epoch boundary, through the
service's own ``Service.on_hits`` in this process, writes the service's checkpoint and
starts ``tocsin serve`` on it (the restart path), as ``tocsin demo`` does. The agents'
spools continue each site's ``seq`` after the history; the time between the history's end
and the agents' start is dead time. The same warm engine, in this process, then gives the
"engine alone" figures: ``--engine-seconds`` of 1 s blocks, and one block with a shower.

Injections: every ``--inject-every`` s (10) an air shower hits the ``--front-sites`` (16)
sites nearest a random core, as a plane front within 10 deg of the zenith (~1 us across)
plus each site's clock error. At 100,000 hits/s an 8-site shower has a false alarm rate of
~1e3 to 1e7 per year (measured while building this bench), far above the service's
default candidate threshold (1 per day); the bench keeps that threshold (loosening it would
let hundreds of chance candidates through) and injects 16 sites. Each shower makes ~10-15
candidates, and every one is a latency sample.

Measured over the ``--seconds`` window (after ``--settle`` s for the agents to connect):
hits/s published (the simulated detectors' hits in the window), hits/s accepted (the
service's ``tocsin_hits_accepted_total``, scraped every second), zero loss (every
``(site, seq)`` the broker acknowledged to an agent is in the service's journal, and so is
every hit), late batches (from the window's start: late data is dead time for the
engine), sequence gaps, the processing lag (``tocsin_processing_lag_seconds``) and its
trend, and the latency from window close to candidate, two ways: (a) exactly, from the
service's log line ``"event": "candidate"`` (``ts``, wall clock, ms) joined by id and
revision with ``details.ready_gps_ns`` in ``candidates.jsonl`` (converted with
``tocsin.gpstime``), for candidates whose window closed in the measured window; (b)
roughly, from the ``tocsin_candidate_latency_seconds`` histogram buckets over the window
(a cross-check). CPU seconds per wall second of the service, the broker and the agents
come from ``/proc/PID/stat``.

A stage is *sustained* when nothing is lost, no batch is late, the service accepted what
was published and its lag does not grow over the window. If the target load is not
sustained, a short ramp (``--ramp``, fractions of the target) finds the highest load that
is. A stage that falls far behind (lag over ``--max-lag`` s) is stopped early.

Run: ``.venv/bin/python bench/live.py [--sites 200] [--rate 500] [--seconds 60]
[--scales default] [--front-scales default] [--profile 30]``. A default run takes about
1.5 minutes when the target is sustained, about 3.5 with the ramp.
"""

from __future__ import annotations

import argparse
import asyncio
import calendar
import contextlib
import io
import math
import os
import platform
import pstats
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import urllib.request
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import paho.mqtt.client as mqtt

from tocsin.engine.block import Block
from tocsin.engine.coincidence import CoincidenceTrigger
from tocsin.engine.core import Engine
from tocsin.engine.front import FrontSearch
from tocsin.engine.sky import local_up_ecef
from tocsin.gpstime import gps_minus_unix_ns, gps_now_ns
from tocsin.live.agent import Agent, AgentSettings
from tocsin.live.logs import setup as setup_logs
from tocsin.live.service import Service
from tocsin.live.sources import HitSink, SimSource
from tocsin.model.config import CoincidenceConfig, EngineConfig
from tocsin.model.registry import Site, SiteRegistry
from tocsin.model.service_config import BrokerConfig, load_service_config
from tocsin.types import C_M_PER_NS, NS_PER_S, I64Array

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
from tests.mosquitto import Mosquitto, free_port  # noqa: E402

PLATEAU = (-24.05, -66.85, 4100.0)
"""Invented high plateau for the array: lat (deg), lon (deg), height (m)."""
KM_PER_DEG = 111.32
"""Length of one degree of latitude (km), good to ~0.5 % for placing invented sites."""
HISTORY_S = 64
"""Pre-loaded history (s): 60 s of live time for the first rate epoch, and a margin."""
EPOCH_S = 60
"""The engine's rate epoch (``tocsin.engine.core.RATE_UPDATE_S``), s."""
MAX_ZENITH_DEG = 10.0
INJECT_TAIL_S = 4.0
"""No injection in the window's last seconds: its candidate must come out while the
agents still publish (the watermark follows arrivals)."""
AGENT_START_S = 4.0
"""The agents' common first live second is at least this far (s) after their launch
(worker start-up: Python, imports, 100 agents and connections each)."""
STOP_AFTER_S = 1.2
"""Agents stop this long (s) after their live time ends, so the last batch is sent."""
DRAIN_S = 15.0
"""After the agents stop, how long (s) the service may take to journal what they sent."""
BURST_S = 2.0
"""Accepted hits/s over the window may fall short of published hits/s by this many seconds'
worth: the scrapes at the window's ends may catch the service in the middle of a second's
burst of batches (every agent closes its batch on the same GPS second)."""
LAG_TREND_S = 0.5
"""Keeping up: the processing lag of the window's last third exceeds that of its first
third by at most this (s); a service that falls behind grows its lag by ~1 s per s."""
TARGET_HITS_PER_S = 100_000.0
LATENESS_S = EngineConfig().lateness_s
"""The lateness allowance (s) of the engine's default configuration."""
LATENCY_MARGIN_S = 1.0
CLK_TCK = os.sysconf("SC_CLK_TCK")
ENGINE_BUDGET_S = 20.0
"""Time allowed (s) for the "engine alone" blocks of one stage (a slow engine: fewer)."""


# --------------------------------------------------------------------------- network


def build_registry(n_sites: int, spacing_m: float, rng: np.random.Generator) -> SiteRegistry:
    """A dense array of ``n_sites`` GPS-timed scintillators on a jittered square grid."""
    side = math.ceil(math.sqrt(n_sites))
    gx, gy = np.meshgrid(np.arange(side), np.arange(side))
    x_m = (gx.ravel()[:n_sites] - (side - 1) / 2 + rng.uniform(-0.3, 0.3, n_sites)) * spacing_m
    y_m = (gy.ravel()[:n_sites] - (side - 1) / 2 + rng.uniform(-0.3, 0.3, n_sites)) * spacing_m
    lat0, lon0, h0 = PLATEAU
    lat = lat0 + y_m / 1000.0 / KM_PER_DEG
    lon = lon0 + x_m / 1000.0 / (KM_PER_DEG * math.cos(math.radians(lat0)))
    height = h0 + rng.uniform(-15.0, 15.0, n_sites)
    sigma = rng.uniform(10.0, 50.0, n_sites)
    width = max(3, len(str(n_sites - 1)))
    return SiteRegistry(
        [
            Site(
                id=f"ceniza-{k:0{width}d}",
                lat_deg=float(lat[k]),
                lon_deg=float(lon[k]),
                height_m=float(height[k]),
                clock_sigma_ns=float(sigma[k]),
                area_m2=3.0,
                kind="scintillator",
            )
            for k in range(n_sites)
        ]
    )


def draw_second(
    start_ns: int, rate_hz: float, n_sites: int, rng: np.random.Generator
) -> tuple[I64Array, I64Array]:
    """Independent Poisson hits of every site over ``[start_ns, start_ns + 1 s)``: hits per
    site, and hit times (GPS ns) site by site, sorted within each site."""
    counts = rng.poisson(rate_hz, n_sites).astype(np.int64)
    t = start_ns + rng.integers(0, NS_PER_S, int(counts.sum()), dtype=np.int64)
    owner = np.repeat(np.arange(n_sites), counts)
    return counts, t[np.lexsort((t, owner))]


def write_service_config(path: Path, *, registry: Path, data: Path, broker_port: int,
                         metrics_port: int, coincidence: dict[str, list[float]]) -> None:
    """The service's TOML config; ``coincidence`` overrides ``[engine.coincidence]`` keys."""
    lines = [
        f'registry = "{registry}"',
        f'data_dir = "{data}"',
        "[broker]",
        f'url = "mqtt://127.0.0.1:{broker_port}"',
        'client_id = "tocsin-bench-service"',
        "[metrics]",
        'host = "127.0.0.1"',
        f"port = {metrics_port}",
    ]
    if coincidence:
        lines.append("[engine.coincidence]")
        lines += [f"{k} = {v!r}" for k, v in coincidence.items()]
    path.write_text("\n".join(lines) + "\n")


# --------------------------------------------------------------------------- injections


@dataclass(frozen=True, slots=True)
class Shower:
    """An injected plane front: its first arrival (GPS ns) and each site's hit time."""

    t0_ns: int
    hits: dict[str, int]


def plan_showers(reg: SiteRegistry, w0: int, w1: int, every_s: float, n_front: int,
                 rng: np.random.Generator) -> list[Shower]:
    """Showers every ``every_s`` from ``w0 + every_s / 2`` (plus up to 1 s) until
    ``INJECT_TAIL_S`` before ``w1``: the ``n_front`` sites nearest a random core, a plane
    front from within ``MAX_ZENITH_DEG`` of the zenith (t_i = t0 - n.r_i / c, made relative
    to the first site), plus a normal clock error of each site's sigma."""
    out: list[Shower] = []
    k = 0
    last = w1 - round(INJECT_TAIL_S * NS_PER_S) - NS_PER_S
    while (t := w0 + round((k + 0.5) * every_s * NS_PER_S)) <= last:
        # at a random point of its second, as real showers come: a seed just before a bin
        # boundary whose slot reaches into the next bin waits for that bin (1 s more)
        out.append(make_shower(reg, t + int(rng.integers(NS_PER_S)), n_front, rng))
        k += 1
    return out


def make_shower(reg: SiteRegistry, t0_ns: int, n_front: int, rng: np.random.Generator
                ) -> Shower:
    """One shower at ``t0_ns`` (see :func:`plan_showers`)."""
    up = local_up_ecef(PLATEAU[0], PLATEAU[1])
    east = np.cross([0.0, 0.0, 1.0], up)
    east /= np.linalg.norm(east)
    north = np.cross(up, east)
    core = int(rng.integers(len(reg)))
    pick = np.argsort(np.linalg.norm(reg.ecef_m - reg.ecef_m[core], axis=1))[:n_front]
    zen = math.radians(rng.uniform(0.0, MAX_ZENITH_DEG))
    az = rng.uniform(0.0, 2.0 * math.pi)
    n = math.cos(zen) * up + math.sin(zen) * (math.cos(az) * north + math.sin(az) * east)
    delay = -(reg.ecef_m[pick] @ n) / C_M_PER_NS  # ns; small differences of large numbers
    delay += rng.normal(0.0, reg.clock_sigma_ns[pick])
    off = np.round(delay - delay.min()).astype(np.int64)
    return Shower(t0_ns, {reg.ids[int(i)]: t0_ns + int(o) for i, o in zip(pick, off, strict=True)})


# --------------------------------------------------------------------------- agent workers


class _CountingSink:
    """Passes a source's calls to the agent's batcher, keeping only hits in the source's
    ``[start_ns, end_ns)`` and counting them per GPS second."""

    def __init__(self, inner: HitSink, src: BenchSource) -> None:
        self.inner, self.src = inner, src

    def up(self, at_ns: int) -> None:
        self.inner.up(at_ns)

    def put(self, t: I64Array) -> None:
        t = t[(t >= self.src.start_ns) & (t < self.src.end_ns)]
        if t.size:
            s0, s1 = int(t[0]) // NS_PER_S, int(t[-1]) // NS_PER_S  # a tick is <= 10 s long
            for s in range(s0, s1 + 1):
                lo, hi = np.searchsorted(t, [s * NS_PER_S, (s + 1) * NS_PER_S])
                self.src.per_s[s] += int(hi - lo)
            self.src.delivered += int(t.size)
        self.inner.put(t)

    def mark(self, upto_ns: int) -> None:
        self.inner.mark(min(upto_ns, self.src.end_ns))

    def down(self, at_ns: int) -> None:
        self.inner.down(min(at_ns, self.src.end_ns))


class BenchSource(SimSource):
    """The agent's simulated detector (with injected hits), live from ``start_ns`` to
    ``end_ns`` (whole GPS seconds), counting the hits it delivers."""

    def __init__(self, rate_hz: float, *, seed: int, extra: list[int], per_s: Counter[int],
                 start_ns: int, end_ns: int) -> None:
        super().__init__(rate_hz, seed=seed, extra=extra)
        self.per_s = per_s
        self.start_ns, self.end_ns = start_ns, end_ns
        self.delivered = 0

    async def run(self, sink: HitSink) -> None:
        await super().run(_CountingSink(sink, self))


async def run_agents(spec: dict[str, Any]) -> dict[str, Any]:
    """One worker's agents, until ``stop_at_gps`` (or SIGTERM); returns their counters.

    Every agent's spool says its live time last ended at ``start_at_gps``, so its first
    batch starts there (not earlier), and its source delivers nothing from ``end_at_gps``
    on: all sites start and end on the same whole second, with no partial bins."""
    broker = BrokerConfig(url=spec["broker_url"])
    per_s: Counter[int] = Counter()
    agents: list[tuple[Agent, BenchSource]] = []
    for a in spec["agents"]:
        spool = Path(spec["spool_root"]) / a["site"]
        spool.mkdir(parents=True, exist_ok=True)
        state = {"v": 1, "site": a["site"], "next_seq": a["next_seq"],
                 "acked": a["next_seq"] - 1, "last_mark": spec["start_at_gps"]}
        (spool / "state.json").write_bytes(orjson.dumps(state))
        src = BenchSource(a["rate_hz"], seed=a["seed"], extra=a["extra"], per_s=per_s,
                          start_ns=spec["start_at_gps"], end_ns=spec["end_at_gps"])
        agents.append((Agent(AgentSettings(site=a["site"], broker=broker, spool_dir=spool), src),
                       src))
    stop = asyncio.Event()
    asyncio.get_running_loop().add_signal_handler(signal.SIGTERM, stop.set)
    async with contextlib.AsyncExitStack() as stack:
        for ag, _ in agents:
            await stack.enter_async_context(ag)
        wait_s = max(0.0, (spec["stop_at_gps"] - gps_now_ns()) / NS_PER_S)
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(stop.wait(), wait_s)
        for ag, _ in agents:
            ag.stop()
    sites = {}
    for ag, src in agents:
        d = ag.stats.as_dict()
        d.update(pending=ag.spool.pending, delivered=src.delivered)
        sites[ag.settings.site] = d
    return {"sites": sites, "per_s": {str(k): v for k, v in per_s.items()}}


def worker_main(spec_path: Path) -> int:
    setup_logs("warning")
    spec = orjson.loads(spec_path.read_bytes())
    result = asyncio.run(run_agents(spec))
    Path(spec["result"]).write_bytes(orjson.dumps(result))
    return 0


# --------------------------------------------------------------------------- measuring


class Observer:
    """A second subscriber to every site's hits (QoS 0, paho's own network thread): when
    each batch reached the broker's subscribers, which splits the latency into the agents'
    and broker's share and the service's."""

    _HEAD = re.compile(rb'"seq":(\d+),"live":\[(\d+),(\d+)\]')

    def __init__(self, port: int) -> None:
        self.arrivals: list[tuple[str, int, int, int]] = []
        """(site, seq, live end GPS ns, arrival GPS ns) of every batch seen."""
        api = mqtt.CallbackAPIVersion.VERSION2  # type: ignore[attr-defined]
        c = mqtt.Client(api, client_id="tocsin-bench-observer")
        c.on_connect = lambda cl, *_: cl.subscribe("tocsin/site/+/hits", qos=0)
        c.on_message = self._on_message
        c.connect("127.0.0.1", port)
        c.loop_start()
        self.client = c

    def _on_message(self, _c: Any, _u: Any, msg: Any) -> None:
        now = gps_now_ns()
        m = self._HEAD.search(msg.payload, 0, 200)
        if m is not None:
            self.arrivals.append((msg.topic.split("/")[-2], int(m[1]), int(m[3]), now))

    def close(self) -> None:
        self.client.loop_stop()
        self.client.disconnect()

    def delays_s(self, w0: int, w1: int) -> list[float]:
        """Batch end -> arrival (s) of batches ending in ``(w0, w1]``."""
        return [(a - e) / NS_PER_S for _, _, e, a in self.arrivals if w0 < e <= w1]


_METRIC = re.compile(r"^([A-Za-z_:][A-Za-z0-9_:]*)(?:\{([^}]*)\})?\s+(\S+)")


@dataclass(slots=True)
class Sample:
    """One scrape of the service's metrics (summed over labels) and every process's CPU s."""

    gps_ns: int
    m: dict[str, float]
    buckets: list[tuple[float, float]]
    cpu: dict[str, float]


def scrape(port: int) -> tuple[dict[str, float], list[tuple[float, float]]] | None:
    """Metrics summed over their labels, and the latency histogram's cumulative buckets."""
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=3) as r:
            text = r.read().decode()
    except OSError:
        return None
    sums: dict[str, float] = {}
    buckets: list[tuple[float, float]] = []
    for line in text.splitlines():
        mt = _METRIC.match(line)
        if mt is None or line.startswith("#"):
            continue
        name, labels, value = mt.group(1), mt.group(2) or "", float(mt.group(3))
        sums[name] = sums.get(name, 0.0) + value
        if name == "tocsin_candidate_latency_seconds_bucket":
            le = re.search(r'le="([^"]+)"', labels)
            if le:
                buckets.append((float(le.group(1)), value))
    return sums, buckets


def cpu_s(pid: int) -> float:
    """User + system CPU seconds of a process (0 once it is gone)."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0
    return (int(fields[11]) + int(fields[12])) / CLK_TCK


def hist_quantile(buckets: list[tuple[float, float]], q: float) -> float:
    """Quantile from cumulative histogram buckets, linear within a bucket (0 below the first)."""
    bs = sorted(buckets)
    total = bs[-1][1] if bs else 0.0
    if total <= 0:
        return math.nan
    target, lo_edge, lo_count = q * total, 0.0, 0.0
    for edge, count in bs:
        if count >= target:
            if math.isinf(edge):
                return lo_edge
            frac = (target - lo_count) / max(count - lo_count, 1e-12)
            return lo_edge + frac * (edge - lo_edge)
        lo_edge, lo_count = edge, count
    return lo_edge


def log_ts_gps_ns(ts: str) -> int:
    """The service log's ``ts`` (UTC, ``...T12:34:56.789Z``) as GPS ns."""
    head, _, frac = ts.rstrip("Z").partition(".")
    unix = calendar.timegm(time.strptime(head, "%Y-%m-%dT%H:%M:%S")) * NS_PER_S
    unix += int(frac.ljust(9, "0")) if frac else 0
    return unix + gps_minus_unix_ns(unix)


def candidate_latencies(data: Path, log: Path, lo_ns: int, hi_ns: int
                        ) -> tuple[list[float], list[dict[str, Any]]]:
    """Seconds from ``ready_gps_ns`` to the candidate's log line, for candidates whose window
    closed in ``[lo_ns, hi_ns)``; and those candidates."""
    written: dict[tuple[str, int], int] = {}
    for line in log.read_bytes().splitlines():
        if b'"candidate"' not in line:
            continue
        with contextlib.suppress(orjson.JSONDecodeError):
            ev = orjson.loads(line)
            if ev.get("event") == "candidate":
                written[(ev["id"], int(ev["revision"]))] = log_ts_gps_ns(ev["ts"])
    lat: list[float] = []
    cands: list[dict[str, Any]] = []
    path = data / "candidates.jsonl"
    for line in path.read_bytes().splitlines() if path.exists() else []:
        c = orjson.loads(line)
        ready = c.get("details", {}).get("ready_gps_ns")
        at = written.get((c["id"], int(c.get("revision", 1))))
        if isinstance(ready, int) and at is not None and lo_ns <= ready < hi_ns:
            lat.append((at - ready) / NS_PER_S)
            cands.append(c)
    return lat, cands


@dataclass(slots=True)
class JournalCheck:
    """What the service's journal holds of the agents' batches (seq >= the history's)."""

    batches: int = 0
    hits: int = 0
    missing: int = 0
    extra_hits_expected: int = 0
    hits_in_window: int = 0
    first_live: dict[str, int] = field(default_factory=dict)
    """Start of each site's first batch (GPS ns)."""


def check_journal(data: Path, agents: dict[str, dict[str, Any]], first_seq: int,
                  w0: int, w1: int) -> JournalCheck:
    seen: dict[str, set[int]] = {s: set() for s in agents}
    out = JournalCheck()
    for seg in sorted((data / "journal").glob("journal-*.jsonl")):
        for line in seg.read_bytes().splitlines():
            if not line.strip():
                continue
            j = orjson.loads(line)
            if j["seq"] < first_seq or j["site"] not in seen or j["seq"] in seen[j["site"]]:
                continue
            seen[j["site"]].add(j["seq"])
            first = out.first_live.get(j["site"])
            out.first_live[j["site"]] = j["live"][0] if first is None else min(first, j["live"][0])
            t = j["t"]
            out.batches += 1
            out.hits += len(t)
            if t and j["live"][0] < w1 and j["live"][1] > w0:
                arr = np.asarray(t, dtype=np.int64)
                out.hits_in_window += int(np.count_nonzero((arr >= w0) & (arr < w1)))
    for site, st in agents.items():
        if st["first_seq"] is None:
            continue
        acked = set(range(st["first_seq"], st["last_seq"] + 1))
        if st["pending"]:  # still in the agent's spool: not acknowledged by the broker
            acked = set(sorted(acked)[: len(acked) - st["pending"]])
        out.missing += len(acked - seen[site])
    return out


# --------------------------------------------------------------------------- one stage


@dataclass(slots=True)
class Stage:
    """Everything measured at one offered load."""

    rate_hz: float
    offered: float
    window_s: float = 0.0
    published_hz: float = math.nan
    accepted_hz: float = math.nan
    batches_acked: int = 0
    batches_journaled: int = 0
    lost_batches: int = 0
    hits_published: int = 0
    hits_journaled: int = 0
    late: int = 0
    late_before: int = 0
    gaps: int = 0
    duplicates: int = 0
    rejected: int = 0
    lag: list[float] = field(default_factory=list)
    to_broker: list[float] = field(default_factory=list)
    per_shower: list[float] = field(default_factory=list)
    """Latency (s) of each shower's first candidate, in injection order (nan: none)."""
    latency: list[float] = field(default_factory=list)
    hist: list[tuple[float, float]] = field(default_factory=list)
    showers: int = 0
    found: int = 0
    candidates: int = 0
    cpu: dict[str, float] = field(default_factory=dict)
    engine: EngineAlone | None = None
    preload_s: float = 0.0
    aborted: str = ""
    notes: list[str] = field(default_factory=list)
    profile: str = ""

    @property
    def lag_trend(self) -> float:
        """Mean lag of the window's last third minus that of its first third (s)."""
        k = len(self.lag) // 3
        return float(np.mean(self.lag[-k:]) - np.mean(self.lag[:k])) if k else math.nan

    @property
    def sustained(self) -> bool:
        return (not self.aborted and self.lost_batches == 0 and self.late == 0
                and self.lag_trend <= LAG_TREND_S
                and self.hits_journaled >= self.hits_published
                and self.accepted_hz >= (1.0 - BURST_S / self.window_s) * self.published_hz)



def preload(cfg_path: Path, reg: SiteRegistry, rate_hz: float, end_ns: int,
            rng: np.random.Generator) -> tuple[Engine, float]:
    """``HISTORY_S`` of history ending at ``end_ns`` through ``Service.on_hits``; writes the
    checkpoint. Returns the warm engine (for the engine-alone figure) and the time taken."""
    t0 = time.perf_counter()
    service = Service(load_service_config(cfg_path))
    n = len(reg)
    for k in range(HISTORY_S):
        start = end_ns - (HISTORY_S - k) * NS_PER_S
        counts, t = draw_second(start, rate_hz, n, rng)
        edges = np.concatenate([[0], np.cumsum(counts)])
        for j, sid in enumerate(reg.ids):
            obj = {"v": 1, "site": sid, "seq": k, "live": [start, start + NS_PER_S],
                   "t": t[edges[j] : edges[j + 1]]}
            service.on_hits(sid, orjson.dumps(obj, option=orjson.OPT_SERIALIZE_NUMPY))
    service.save_checkpoint()
    service.close()
    return service.pipeline.engine, time.perf_counter() - t0


@dataclass(frozen=True, slots=True)
class EngineAlone:
    """The warm engine on 1 s blocks in this process (with the service's engine threads)."""

    hits_per_s: float
    """Over the blocks without a shower."""
    block_s: float
    """Median seconds per 1 s block without a shower."""
    first_shower_block_s: float
    """Seconds for the first block holding a shower (astropy loads its Earth-orientation
    tables at the first direction's frame transform)."""
    shower_block_s: float
    """Seconds for the next block, also holding a shower."""
    shower_decisions: int
    """Coincidence decisions that block made (merged into candidates, then fitted)."""
    shower_candidates: int
    n_front: int
    threads: int


def engine_alone(engine: Engine, reg: SiteRegistry, start_ns: int, seconds: int,
                 rate_hz: float, n_front: int, rng: np.random.Generator) -> EngineAlone:
    """``Engine.process`` on 1 s blocks (as the service releases them) continuing the warm
    engine's data after its history; then two blocks with a shower in each. Stops after the
    block that takes it past ``ENGINE_BUDGET_S`` (then without the shower blocks)."""
    n = len(reg)
    blocks: list[Block] = []
    for k in range(seconds + 2):
        s0 = start_ns + k * NS_PER_S
        counts, t = draw_second(s0, rate_hz, n, rng)
        site = np.repeat(np.arange(n, dtype=np.int32), counts)
        if k >= seconds:
            sh = make_shower(reg, s0 + NS_PER_S // 2, n_front, rng)
            t = np.concatenate([t, np.array(list(sh.hits.values()), dtype=np.int64)])
            site = np.concatenate([site, np.array([reg.index(x) for x in sh.hits], np.int32)])
        order = np.argsort(t, kind="stable")
        blocks.append(Block(s0, s0 + NS_PER_S, t[order], site[order],
                            np.arange(n, dtype=np.int32), np.full(n, s0, dtype=np.int64),
                            np.full(n, s0 + NS_PER_S, dtype=np.int64)))
    took: list[float] = []
    for b in blocks[:-2]:
        t0 = time.perf_counter()
        engine.process(b)
        took.append(time.perf_counter() - t0)
        if sum(took) > ENGINE_BUDGET_S:
            break
    hz = sum(b.n_hits for b in blocks[: len(took)]) / sum(took)
    if sum(took) > ENGINE_BUDGET_S:
        return EngineAlone(hz, float(np.median(took)), math.nan, math.nan, 0, 0, n_front,
                           engine.threads)
    t0 = time.perf_counter()
    engine.process(blocks[-2])
    first_s = time.perf_counter() - t0
    before = sum(v for k, v in engine.counters.decisions.items() if k.startswith("coinc"))
    t0 = time.perf_counter()
    cands = engine.process(blocks[-1])
    shower_s = time.perf_counter() - t0
    after = sum(v for k, v in engine.counters.decisions.items() if k.startswith("coinc"))
    return EngineAlone(hz, float(np.median(took)), first_s, shower_s, after - before,
                       len(cands), n_front, engine.threads)


def front_cost_s(reg: SiteRegistry, coinc: CoincidenceConfig, rate_hz: float, n_seeds: int,
                 rng: np.random.Generator) -> float:
    """CPU-bound seconds per seed of ``FrontSearch.evaluate`` at this load (one core)."""
    n = len(reg)
    counts, t = draw_second(1_450_000_080 * NS_PER_S, rate_hz, n, rng)
    site = np.repeat(np.arange(n, dtype=np.int32), counts)
    order = np.argsort(t, kind="stable")
    t, site = t[order], site[order]
    fs = FrontSearch(reg, coinc)
    i0 = max(0, t.size // 2 - n_seeds // 2)
    i1 = min(t.size, i0 + n_seeds)
    t1 = time.perf_counter()
    fs.evaluate(t, site, i0, i1, np.full(n, rate_hz * 1e-9), p_max=1e-30)
    return (time.perf_counter() - t1) / max(i1 - i0, 1)


def sites_cost_s(reg: SiteRegistry, coinc: CoincidenceConfig, rate_hz: float,
                 buffer_s: int, rng: np.random.Generator) -> float:
    """Seconds ``CoincidenceTrigger.evaluate`` takes at the smallest scale for one second
    of seeds, when the hit buffer it is given also holds ``buffer_s`` earlier seconds."""
    n = len(reg)
    t0 = 1_450_000_080 * NS_PER_S
    total = int(rng.poisson(rate_hz * n * (buffer_s + 1)))
    t = np.sort(rng.integers(t0, t0 + (buffer_s + 1) * NS_PER_S, total, dtype=np.int64))
    site = rng.integers(0, n, total).astype(np.int32)
    trig = CoincidenceTrigger(reg, coinc)
    tab = trig.tables(np.full(n, rate_hz), np.ones(n), np.ones(n, dtype=bool))
    lo = int(np.searchsorted(t, t0 + buffer_s * NS_PER_S))
    hi = int(np.searchsorted(t, t0 + (buffer_s + 1) * NS_PER_S - trig.geom.ahead_ns[0]))
    t1 = time.perf_counter()
    trig.evaluate(t, site, lo, hi, tab, 0, p_max=1e-30)
    return time.perf_counter() - t1


def configuration_report(reg: SiteRegistry, bench: CoincidenceConfig, rate_hz: float,
                         rng: np.random.Generator) -> str:
    """Why the bench's coincidence scales: what is active at this load, and what the
    engine's default scales cost, measured side by side (one core, this process)."""
    n = len(reg)
    load = f"{rate_hz * n:,.0f} hits/s"
    out = []
    for name, cc in (("engine default", CoincidenceConfig()), ("bench", bench)):
        tab = CoincidenceTrigger(reg, cc).tables(np.full(n, rate_hz), np.ones(n),
                                                 np.ones(n, dtype=bool))
        on = [w for w, st in zip(cc.scales_s, tab.scales, strict=True) if st.active.any()]
        out.append(f"  {name + ' scales':<22} {cc.scales_s}: active at {load} {on} "
                   f"('sites' trials {tab.trial_rate_hz:,.0f}/s); front scales "
                   f"{cc.front_scales_s}")
    longest = math.ceil(max(CoincidenceConfig().scales_s))
    c_long = sites_cost_s(reg, bench, rate_hz, longest, rng)
    c_short = sites_cost_s(reg, bench, rate_hz, 0, rng)
    out.append(f"  'sites' statistic, one 1 s block of seeds at {min(bench.scales_s):g} s: "
               f"{c_short:.2f} s with a 1 s hit buffer, {c_long:.2f} s with {longest + 1} s (the "
               f"default {longest} s scale keeps its slots' hits in the engine's buffer even when "
               "inactive)")
    fs = FrontSearch(reg, bench)
    act = [w for w, on in zip(bench.front_scales_s, fs.scale_active, strict=True) if on.any()]
    out.append(f"  front scales evaluated on this array {act} (longest light time from a site "
               f"{fs.reach_ns.min() / 1e3:.1f}-{fs.reach_ns.max() / 1e3:.1f} us)")
    n_seeds = 1000
    f_bench = front_cost_s(reg, bench, rate_hz, n_seeds, rng)
    f_def = front_cost_s(reg, CoincidenceConfig(), rate_hz, n_seeds, rng)
    out.append(f"  'front' statistic, {n_seeds} seeds: front scales {bench.front_scales_s} "
               f"{f_bench * 1e6:,.1f} us/seed (<= {1 / f_bench:,.0f} hits/s on one core); "
               f"default {CoincidenceConfig().front_scales_s} {f_def * 1e6:,.1f} us/seed "
               f"(<= {1 / f_def:,.0f} hits/s)")
    return "engine cost at this load, side by side (this process, one core):\n" + "\n".join(out)


def run_stage(a: argparse.Namespace, reg: SiteRegistry, reg_path: Path, rate_hz: float,
              seconds: int, work: Path, *, profile: bool, keep_arrivals: bool) -> Stage:
    n = len(reg)
    st = Stage(rate_hz=rate_hz, offered=rate_hz * n)
    rng = np.random.default_rng([a.seed, round(rate_hz * 1000)])
    work.mkdir(parents=True)
    data = work / "data"
    broker = Mosquitto(work / "broker")
    metrics_port = free_port()
    cfg_path = work / "tocsin.toml"
    write_service_config(cfg_path, registry=reg_path, data=data, broker_port=broker.port,
                         metrics_port=metrics_port, coincidence=a.coincidence)
    procs: list[subprocess.Popen[bytes]] = []
    observer: Observer | None = None
    w0 = w1 = 0
    service: subprocess.Popen[bytes] | None = None
    log = work / "serve.log"
    try:
        broker.start()
        observer = Observer(broker.port)
        history_end = gps_now_ns() // (EPOCH_S * NS_PER_S) * (EPOCH_S * NS_PER_S)
        engine, st.preload_s = preload(cfg_path, reg, rate_hz, history_end, rng)
        coinc = CoincidenceConfig.model_validate(a.coincidence)
        per_block_s = front_cost_s(reg, coinc, rate_hz, 200, rng) * rate_hz * n
        if per_block_s < ENGINE_BUDGET_S / 4:
            st.engine = engine_alone(engine, reg, history_end, a.engine_seconds, rate_hz,
                                     a.front_sites, rng)
        else:
            st.notes.append(f"engine alone skipped: its front statistic alone would take "
                            f"~{per_block_s:.0f} s per 1 s block at this load")
        del engine
        prof_out = work / "serve.prof"
        cmd = [sys.executable, "-m", "tocsin.cli.main", "serve", "--config", str(cfg_path)]
        if profile:
            cmd[1:1] = ["-m", "cProfile", "-o", str(prof_out)]
        with open(log, "wb") as fh:
            service = subprocess.Popen(cmd, stdout=fh, stderr=fh)
        deadline = time.monotonic() + 60.0
        while b'"connected"' not in (log.read_bytes() if log.exists() else b""):
            if service.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError(f"tocsin serve did not start: {log.read_text()[-2000:]}")
            time.sleep(0.1)
        restored = [orjson.loads(x) for x in log.read_bytes().splitlines() if b'"restored"' in x]
        if not restored or not restored[0].get("checkpoint"):
            st.notes.append("WARNING: the service did not load the pre-loaded checkpoint")

        # ---- agents: live from start_at, measured over [w0, w1), live until end_at ------
        start_at = -(-(gps_now_ns() + round(AGENT_START_S * NS_PER_S)) // NS_PER_S) * NS_PER_S
        w0 = start_at + round(a.settle) * NS_PER_S
        w1 = w0 + seconds * NS_PER_S
        end_at = w1 + NS_PER_S
        showers = plan_showers(reg, w0, w1, a.inject_every, a.front_sites, rng)
        extra: dict[str, list[int]] = {}
        for sh in showers:
            for sid, th in sh.hits.items():
                extra.setdefault(sid, []).append(th)
        stop_at = end_at + round(STOP_AFTER_S * NS_PER_S)
        results: list[Path] = []
        for w in range(a.agent_procs):
            mine = reg.ids[w :: a.agent_procs]
            spec = {
                "broker_url": broker.url, "spool_root": str(work / "spool"),
                "start_at_gps": start_at, "end_at_gps": end_at, "stop_at_gps": stop_at,
                "result": str(work / f"agents-{w}.json"),
                "agents": [{"site": s, "rate_hz": rate_hz, "seed": int(rng.integers(2**31)),
                            "next_seq": HISTORY_S, "extra": extra.get(s, [])} for s in mine],
            }
            spec_path = work / f"agents-{w}.spec.json"
            spec_path.write_bytes(orjson.dumps(spec))
            results.append(Path(spec["result"]))
            with open(work / f"agents-{w}.log", "wb") as fh:
                procs.append(subprocess.Popen(
                    [sys.executable, __file__, "--agent-worker", str(spec_path)],
                    stdout=fh, stderr=fh))

        # ---- monitor: one scrape a second, at x.5 s GPS (batches end on whole seconds) --
        samples: list[Sample] = []
        pids = {"service": service.pid, "broker": broker.proc.pid if broker.proc else 0}
        end_by = stop_at + round(DRAIN_S * NS_PER_S)
        while gps_now_ns() < end_by:
            now = gps_now_ns()
            time.sleep(((now // NS_PER_S + 1) * NS_PER_S + NS_PER_S // 2 - now) / NS_PER_S % 1.0)
            got = scrape(metrics_port)
            cpu = {k: cpu_s(p) for k, p in pids.items()}
            cpu["agents"] = sum(cpu_s(p.pid) for p in procs)
            if got is not None:
                samples.append(Sample(gps_now_ns(), got[0], got[1], cpu))
            now = gps_now_ns()
            last = samples[-1] if samples else None
            lag = last.m.get("tocsin_processing_lag_seconds", 0.0) if last else 0.0
            stale = (len(samples) >= 6 and now > w0 and now < stop_at
                     and samples[-1].m.get("tocsin_journal_lines_total")
                     == samples[-6].m.get("tocsin_journal_lines_total"))
            if service.poll() is not None:
                st.aborted = f"tocsin serve exited with code {service.returncode}"
            elif now > w0 and (lag > a.max_lag or stale):
                st.aborted = (f"processing lag {lag:.0f} s > {a.max_lag:g} s" if lag > a.max_lag
                              else "the service stopped journaling for 5 s")
            if st.aborted:
                for p in procs:
                    p.send_signal(signal.SIGTERM)
                break
            if now >= stop_at and all(p.poll() is not None for p in procs):
                expect = sum(_acked_batches(r) for r in results) + HISTORY_S * n
                if last and last.m.get("tocsin_journal_lines_total", 0) >= expect:
                    break
        for p in procs:
            try:
                p.wait(timeout=40)
            except subprocess.TimeoutExpired:
                p.kill()
                st.notes.append(f"agent worker {p.pid} did not stop in 40 s: killed")
        st.window_s = (w1 - w0) / NS_PER_S
        _summarise(st, samples, w0, w1, results)
    finally:
        if service is not None and service.poll() is None:
            service.send_signal(signal.SIGTERM)
            try:
                service.wait(timeout=30)
            except subprocess.TimeoutExpired:
                service.kill()
                service.wait()
                st.notes.append("tocsin serve did not stop in 30 s after SIGTERM: killed")
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.wait()
        if observer is not None:
            observer.close()
            st.to_broker = observer.delays_s(w0, w1)
            if keep_arrivals:
                (work / "arrivals.json").write_bytes(orjson.dumps(observer.arrivals))
        broker.stop()
    if not results or not all(r.exists() for r in results):
        st.notes.append("agent results missing: loss check incomplete")
        return st
    agents: dict[str, dict[str, Any]] = {}
    per_s: Counter[int] = Counter()
    for r in results:
        res = orjson.loads(r.read_bytes())
        agents.update(res["sites"])
        per_s.update({int(k): v for k, v in res["per_s"].items()})
    st.hits_published = sum(v for s, v in per_s.items() if w0 <= s * NS_PER_S < w1)
    st.published_hz = st.hits_published / st.window_s
    st.batches_acked = sum(_acked(v) for v in agents.values())
    jc = check_journal(data, agents, HISTORY_S, w0, w1)
    st.batches_journaled, st.lost_batches = jc.batches, jc.missing
    st.hits_journaled = jc.hits_in_window
    acked_hits = sum(v["delivered"] for v in agents.values() if not v["pending"])
    if any(v["pending"] for v in agents.values()):
        st.notes.append(f"{sum(v['pending'] for v in agents.values())} batches were still in "
                        "agents' spools at the end (not acknowledged by the broker)")
    elif jc.hits != acked_hits:
        st.notes.append(f"hits: detectors made {acked_hits:,}, journal holds {jc.hits:,}")
    dropped = sum(v["hits_dropped"] for v in agents.values())
    if dropped:
        st.notes.append(f"agents dropped {dropped} hits (arrived after their batch closed)")
    late_start = sum(1 for t in jc.first_live.values() if t != start_at)
    if late_start:
        st.notes.append(f"{late_start} agents' live time began after the common start second "
                        "(their first bin is partial)")
    last_ready = w1 - round((INJECT_TAIL_S - 1.0) * NS_PER_S)
    lat, cands = candidate_latencies(data, log, w0, last_ready + 1)
    st.latency, st.candidates, st.showers = lat, len(cands), len(showers)
    keys = [{(s, t) for s, t in sh.hits.items()} for sh in showers]
    found: set[int] = set()
    path = data / "candidates.jsonl"
    for line in path.read_bytes().splitlines() if path.exists() else []:
        c = orjson.loads(line)
        pairs = set(zip(c["sites"], c.get("hit_times_ns", []), strict=False))
        found.update(k for k, sh in enumerate(keys) if len(pairs & sh) >= 3)
    st.found = len(found)
    for hit_set in keys:  # each shower's first candidate
        own = [x for x, c in zip(lat, cands, strict=True) if len(
            set(zip(c["sites"], c.get("hit_times_ns", []), strict=False)) & hit_set) >= 3]
        st.per_shower.append(min(own, default=math.nan))
    if profile and (work / "serve.prof").exists():
        buf = io.StringIO()
        stp = pstats.Stats(str(work / "serve.prof"), stream=buf)
        stp.sort_stats("tottime").print_stats(a.profile)
        stp.sort_stats("cumulative").print_stats(a.profile)
        st.profile = buf.getvalue()
    return st


def _acked(v: dict[str, Any]) -> int:
    if v["first_seq"] is None:
        return 0
    return int(v["last_seq"] - v["first_seq"] + 1 - v["pending"])


def _acked_batches(result: Path) -> int:
    if not result.exists():
        return 0
    return sum(_acked(v) for v in orjson.loads(result.read_bytes())["sites"].values())


def _summarise(st: Stage, samples: list[Sample], w0: int, w1: int, results: list[Path]) -> None:
    """Rates, lag and CPU over the window from the metric samples."""
    inside = [s for s in samples if w0 <= s.gps_ns <= w1]
    if len(inside) >= 2:
        s0, s1 = inside[0], inside[-1]
        dt = (s1.gps_ns - s0.gps_ns) / NS_PER_S
        st.accepted_hz = (s1.m.get("tocsin_hits_accepted_total", 0.0)
                          - s0.m.get("tocsin_hits_accepted_total", 0.0)) / dt
        st.cpu = {k: (s1.cpu[k] - s0.cpu[k]) / dt for k in s1.cpu}
        st.lag = [s.m.get("tocsin_processing_lag_seconds", math.nan) for s in inside[1:]]
    if inside:
        # counts from the window's start to the end (the agents' last batches included)
        a, f = inside[0], samples[-1]

        def diff(name: str) -> int:
            return round(f.m.get(name, 0.0) - a.m.get(name, 0.0))

        st.late = diff("tocsin_batches_late_total")
        st.late_before = round(a.m.get("tocsin_batches_late_total", 0.0))
        st.gaps = diff("tocsin_sequence_gaps_total")
        st.duplicates = diff("tocsin_batches_duplicate_total")
        st.rejected = diff("tocsin_batches_rejected_total")
        # latency histogram over the window (+1 s): candidates written while agents publish
        end = [s for s in samples if s.gps_ns <= w1 + NS_PER_S][-1]
        before = dict(a.buckets)
        st.hist = [(le, c - before.get(le, 0.0)) for le, c in end.buckets]


# --------------------------------------------------------------------------- report


def q(xs: list[float], p: float) -> float:
    return float(np.percentile(xs, p)) if xs else math.nan


def verdict(ok: bool) -> str:
    return "PASS" if ok else "MISS"


def stage_table(stages: list[Stage]) -> str:
    head = (f"{'offered hits/s':>14} {'published':>10} {'accepted':>10} {'lost':>5} "
            f"{'late':>5} {'lag p50/max s':>13} {'latency p50/p99/max s':>21} {'n':>4} "
            f"{'service CPU':>11} {'engine alone':>13}  verdict")
    out = [head, "-" * len(head)]
    for s in stages:
        lat = (f"{q(s.latency, 50):.2f}/{q(s.latency, 99):.2f}/{max(s.latency):.2f}"
               if s.latency else "-")
        lag = f"{q(s.lag, 50):.1f}/{max(s.lag):.1f}" if s.lag else "-"
        eng = f"{s.engine.hits_per_s:,.0f}" if s.engine else "-"
        cpu = f"{s.cpu.get('service', math.nan):.2f} core"
        out.append(
            f"{s.offered:>14,.0f} {s.published_hz:>10,.0f} {s.accepted_hz:>10,.0f} "
            f"{s.lost_batches:>5} {s.late:>5} {lag:>13} {lat:>21} {len(s.latency):>4} "
            f"{cpu:>11} {eng:>13}  {'sustained' if s.sustained else 'NOT sustained'}"
        )
    return "\n".join(out)


def stage_detail(s: Stage) -> str:
    hq = [hist_quantile(s.hist, x) for x in (0.5, 0.9, 0.99)]
    lines = [
        f"  window {s.window_s:.0f} s; history pre-load {s.preload_s:.1f} s (untimed)",
        f"  hits/s published by the detectors {s.published_hz:,.0f}; accepted by the service "
        f"{s.accepted_hz:,.0f} (tocsin_hits_accepted_total); hits in the window published "
        f"{s.hits_published:,}, journaled {s.hits_journaled:,}",
        f"  batches acknowledged by the broker {s.batches_acked:,}, journaled "
        f"{s.batches_journaled:,}, lost {s.lost_batches}; from the window's start: late "
        f"{s.late}, seq gaps {s.gaps}, duplicates {s.duplicates}, rejected {s.rejected}"
        + (f" (late before the window, agents starting: {s.late_before})"
           if s.late_before else ""),
        f"  processing lag (wall - watermark) p50 {q(s.lag, 50):.2f} s, max "
        f"{max(s.lag, default=math.nan):.2f} s, trend over the window {s.lag_trend:+.2f} s "
        f"(lateness allowance {LATENESS_S:g} s, 1 s bins)",
        f"  batch end -> seen at the broker by a second subscriber: p50 "
        f"{q(s.to_broker, 50):.3f} s, p99 {q(s.to_broker, 99):.3f} s, max "
        f"{max(s.to_broker, default=math.nan):.3f} s ({len(s.to_broker):,} batches)",
        f"  window close -> candidate (log): n {len(s.latency)}, p50 {q(s.latency, 50):.3f}, "
        f"p90 {q(s.latency, 90):.3f}, p99 {q(s.latency, 99):.3f}, max "
        f"{max(s.latency, default=math.nan):.3f} s; service histogram over the window: "
        f"p50 {hq[0]:.2f}, p90 {hq[1]:.2f}, p99 {hq[2]:.2f} s (bucket edges "
        f"{', '.join(f'{e:g}' for e, _ in sorted(s.hist) if 2.0 <= e <= 5.0)} s)",
        f"  injected showers {s.showers}, found as candidates {s.found}; candidates in the "
        f"window {s.candidates}; each shower's first candidate after "
        f"{', '.join(f'{x:.2f}' for x in s.per_shower)} s",
        "  CPU per wall second: " + ", ".join(f"{k} {v:.2f}" for k, v in s.cpu.items())
        + (f"\n  engine alone (this process, {s.engine.threads} engine thread(s) as in the "
           f"service, 1 s blocks as the service releases them): "
           f"{s.engine.hits_per_s:,.0f} hits/s = {s.engine.hits_per_s / s.offered:.2f}x "
           f"this load, {s.engine.block_s:.2f} s per block; a block with one "
           f"{s.engine.n_front}-site shower {s.engine.shower_block_s:.2f} s "
           f"({s.engine.shower_decisions} coincidence decisions "
           f"-> {s.engine.shower_candidates} candidates, each with a direction fit; the first "
           f"such block "
           f"{s.engine.first_shower_block_s:.2f} s)" if s.engine else ""),
    ]
    if s.aborted:
        lines.append(f"  STOPPED EARLY: {s.aborted}")
    lines += [f"  note: {x}" for x in s.notes]
    return "\n".join(lines)


# --------------------------------------------------------------------------- main


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=(__doc__ or "").split("\n", 1)[0])
    p.add_argument("--sites", type=int, default=200, help="number of sites/agents (200)")
    p.add_argument("--rate", type=float, default=500.0, help="hits/s per site (500)")
    p.add_argument("--seconds", type=int, default=60, help="measured window, s (60)")
    p.add_argument("--settle", type=float, default=8.0, help="agents' start-up, s (8)")
    p.add_argument("--agent-procs", type=int, default=2, help="agent worker processes (2)")
    p.add_argument("--spacing-m", type=float, default=350.0, help="grid spacing, m (350)")
    p.add_argument("--scales", default="default",
                   help="engine coincidence scales, s, comma-separated, or 'default' (the "
                        "engine's)")
    p.add_argument("--front-scales", default="default",
                   help="engine front scales, s, comma-separated, or 'default' (the engine's)")
    p.add_argument("--front-sites", type=int, default=16, help="sites per injected shower")
    p.add_argument("--inject-every", type=float, default=10.0, help="s between showers (10)")
    p.add_argument("--ramp", default="0.5,0.25",
                   help="fractions of the target load tried, highest first, if it is not "
                        "sustained ('' = none)")
    p.add_argument("--ramp-seconds", type=int, default=30, help="window of ramp stages, s")
    p.add_argument("--max-lag", type=float, default=20.0, help="stop a stage beyond this lag")
    p.add_argument("--engine-seconds", type=int, default=5, help="data for 'engine alone', s")
    p.add_argument("--seed", type=int, default=20260314, help="random seed")
    p.add_argument("--keep", type=Path, default=None, help="keep work files in this directory")
    p.add_argument("--profile", type=int, default=0, metavar="N",
                   help="run the target stage's service under cProfile; print the top N")
    p.add_argument("--agent-worker", type=Path, default=None, help=argparse.SUPPRESS)
    a = p.parse_args(argv)
    for name in ("sites", "seconds", "agent_procs", "ramp_seconds", "engine_seconds",
                 "front_sites"):
        if getattr(a, name) <= 0:
            p.error(f"--{name.replace('_', '-')} {getattr(a, name)} must be positive")
    for name in ("rate", "spacing_m", "inject_every", "max_lag"):
        if not getattr(a, name) > 0:
            p.error(f"--{name.replace('_', '-')} {getattr(a, name)!r} must be positive")
    if not 3 <= a.front_sites <= a.sites:
        p.error(f"--front-sites {a.front_sites} must be in [3, --sites {a.sites}]")
    a.coincidence = {}
    for opt, key in (("scales", "scales_s"), ("front_scales", "front_scales_s")):
        text = getattr(a, opt)
        if text == "default":
            continue
        try:
            a.coincidence[key] = [float(x) for x in text.split(",")]
            CoincidenceConfig.model_validate(a.coincidence)
        except ValueError as exc:
            p.error(f"--{opt.replace('_', '-')} {text!r}: {str(exc).splitlines()[0]}")
    try:
        a.ramp_f = sorted({float(x) for x in a.ramp.split(",") if x.strip()}, reverse=True)
    except ValueError:
        p.error(f"--ramp {a.ramp!r} is not a comma-separated list of fractions")
    if any(not 0 < f < 1 for f in a.ramp_f):
        p.error(f"--ramp {a.ramp!r}: fractions must be in (0, 1)")
    return a


def main(argv: list[str] | None = None) -> int:
    a = parse_args(argv)
    if a.agent_worker is not None:
        return worker_main(a.agent_worker)
    t_start = time.monotonic()
    rng = np.random.default_rng(a.seed)
    reg = build_registry(a.sites, a.spacing_m, rng)
    d = np.linalg.norm(reg.ecef_m[:, None] - reg.ecef_m[None], axis=-1)
    target = a.sites * a.rate
    print("Tocsin live network benchmark (a benchmark, not a test)")
    print(f"python {platform.python_version()}, numpy {np.__version__}, {os.cpu_count()} CPUs, "
          f"{platform.processor() or platform.machine()}; broker {_mosquitto_version()}")
    print(f"network: {a.sites} fictional GPS-timed sites (clock sigma "
          f"{reg.clock_sigma_ns.min():.0f}-{reg.clock_sigma_ns.max():.0f} ns), dense array on a "
          f"{a.spacing_m:g} m grid, {d.max() / 1000:.1f} km across "
          f"({d.max() / C_M_PER_NS / 1000:.1f} us light time); {a.rate:g} Hz each = "
          f"{target:,.0f} hits/s offered")
    print(f"publishers: {a.sites} real tocsin Agents (spool, QoS 1, 1 s batches) with simulated "
          f"detectors, in {a.agent_procs} worker processes; service: `tocsin serve` subprocess; "
          f"broker: Mosquitto; all on 127.0.0.1")
    print(f"engine config: {a.coincidence or 'defaults'} (other keys default); lateness "
          f"{LATENESS_S:g} s; candidate threshold {EngineConfig().candidate_far_per_year:g}/yr "
          "(default)")
    print(f"injections: a {a.front_sites}-site shower (plane front, zenith <= "
          f"{MAX_ZENITH_DEG:g} deg) every {a.inject_every:g} s")
    print()
    print(configuration_report(reg, CoincidenceConfig.model_validate(a.coincidence), a.rate, rng))
    print()

    base = Path(tempfile.mkdtemp(prefix="tocsin-bench-live-")) if a.keep is None else a.keep
    base.mkdir(parents=True, exist_ok=True)
    reg_path = base / "network.toml"
    reg_path.write_text(reg.to_toml())
    stages: list[Stage] = []
    plan = [(a.rate, a.seconds)]
    try:
        k = 0
        while k < len(plan):
            rate, secs = plan[k]
            print(f"stage {k + 1}: {rate * a.sites:,.0f} hits/s offered ({a.sites} x {rate:g} Hz), "
                  f"{secs} s window ...", flush=True)
            st = run_stage(a, reg, reg_path, rate, secs, base / f"stage-{k + 1}",
                           profile=bool(a.profile) and k == 0, keep_arrivals=a.keep is not None)
            stages.append(st)
            print(stage_detail(st), flush=True)
            if k == 0 and not st.sustained:
                plan += [(a.rate * f, a.ramp_seconds) for f in a.ramp_f]
            elif k > 0 and st.sustained:
                break
            k += 1
    finally:
        if a.keep is None:
            shutil.rmtree(base, ignore_errors=True)
    print()
    print(stage_table(stages))
    print()
    first = stages[0]
    best = max((s.offered for s in stages if s.sustained), default=0.0)
    tried = ", ".join(f"{s.offered:,.0f}" for s in stages)
    print(f"targets (issue): >= {TARGET_HITS_PER_S:,.0f} hits/s sustained with zero loss; "
          f"p99 window close -> candidate <= lateness {LATENESS_S:g} s + {LATENCY_MARGIN_S:g} s")
    rate_ok = first.sustained and first.offered >= TARGET_HITS_PER_S and (
        first.published_hz >= 0.99 * first.offered)
    print(f"  highest sustained load {best:,.0f} hits/s of those tried ({tried}); at the target "
          f"{first.published_hz:,.0f} published, {first.accepted_hz:,.0f} accepted, "
          f"{first.lost_batches} batches lost, {first.late} late   {verdict(rate_ok)}")
    p99 = q(first.latency, 99)
    lat_ok = first.sustained and math.isfinite(p99) and p99 <= LATENESS_S + LATENCY_MARGIN_S
    print(f"  p99 latency at the target load {p99:.3f} s over {len(first.latency)} candidates "
          f"of {first.found} showers{'' if first.sustained else ' (load not sustained)'}   "
          f"{verdict(lat_ok)}")
    if not first.sustained and best > 0:
        s_best = next(s for s in stages if s.offered == best)
        print(f"  (at {best:,.0f} hits/s: p99 {q(s_best.latency, 99):.3f} s over "
              f"{len(s_best.latency)} candidates)")
    print(f"total run time {time.monotonic() - t_start:.0f} s")
    if first.profile:
        print()
        print(f"cProfile of `tocsin serve` in stage 1 (top {a.profile} by own time, then by "
              "cumulative time; profiling slows the service, so its figures above are low):")
        print(first.profile)
    return 0


def _mosquitto_version() -> str:
    from tests.mosquitto import MOSQUITTO

    try:
        out = subprocess.run([MOSQUITTO, "-h"], capture_output=True, text=True, timeout=5)
    except OSError:
        return "mosquitto (version unknown)"
    first = (out.stdout or out.stderr).splitlines()
    return first[0] if first else "mosquitto"


if __name__ == "__main__":
    sys.exit(main())
