"""``tocsin demo``: the whole chain on one machine with no set-up.

An embedded broker; the shipped scenario's 40 invented sites as simulated agents
in this process (the same :class:`~tocsin.live.agent.Agent` as ``tocsin agent``,
with a simulated detector at each site's rate); the service; and, about 20 s
in, a plane front injected into six to eight GPS-timed sites far apart. The service starts with
150 s of simulated history already received (as after a restart from its
journal), so its rate estimates are warm and the front can be judged at once.
Everything (journal, candidates, alerts, spools) goes to a working directory.
Alerts are role ``test`` (the demo never makes an observation alert).

With a recording (:func:`run_recording_demo`) the demo instead plays a recorded
stream through the broker at a chosen multiple of real time (every batch to its
own site's topic, as the agents would send it) and shows the alerts the service
archived; their IVORNs equal those ``tocsin replay`` gives for the same recording.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import socket
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TextIO

import numpy as np
import orjson

from tocsin.alerts.outbox import packet_name
from tocsin.engine.sky import ecef_unit_to_radec, local_up_ecef, radec_to_ecef_unit
from tocsin.gpstime import gps_now_ns, gps_ns_to_utc_iso
from tocsin.io.recording import open_text
from tocsin.live import topics
from tocsin.live.agent import Agent, AgentSettings
from tocsin.live.embedded_broker import embedded_broker
from tocsin.live.service import Service
from tocsin.live.sources import SimSource
from tocsin.model.candidate import Candidate
from tocsin.model.registry import SiteRegistry
from tocsin.model.service_config import BrokerConfig, MetricsConfig, ServiceConfig
from tocsin.sim import SHIPPED_RATES_HZ, build_scenario, iter_batches, shipped_registry, simulate
from tocsin.types import C_M_PER_NS, NS_PER_S

HISTORY_S = 150
FRONT_AFTER_S = 20.0
FRONT_SITES = 8
"""Sites the injected front crosses (fewer if fewer GPS-timed sites see it; at least 6)."""
MIN_FRONT_SITES = 6
MIN_ELEVATION_DEG = 15.0


@dataclass
class Front:
    t0_ns: int
    ra_deg: float
    dec_deg: float
    hits: dict[str, int] = field(default_factory=dict)


def plan_front(
    reg: SiteRegistry,
    t0_ns: int,
    rng: np.random.Generator,
    taking_part: np.ndarray,
) -> Front:
    """A front seen by six GPS-timed sites far apart (long baselines time it best):
    among random directions, the one whose visible GPS sites span the widest,
    then six of those sites chosen to spread out (greedy farthest-point). Only
    sites already taking part (enough live time for a rate estimate) are used."""
    gps = np.array(
        [i for i, s in enumerate(reg) if s.clock_sigma_ns <= 1e4 and bool(taking_part[i])]
    )
    up = np.stack([local_up_ecef(reg.sites[i].lat_deg, reg.sites[i].lon_deg) for i in gps])
    pos = reg.ecef_m[gps]
    dirs = rng.normal(size=(2000, 3))
    dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
    sin_min = np.sin(np.radians(MIN_ELEVATION_DEG))
    best_n, best_span, best_vis = dirs[0], -1.0, np.zeros(0, dtype=np.int64)
    for n in dirs:
        vis = np.flatnonzero(up @ n > sin_min)
        if vis.size < MIN_FRONT_SITES:
            continue
        p = pos[vis]
        span = float(np.max(np.linalg.norm(p[:, None] - p[None], axis=-1)))
        if span > best_span:
            best_n, best_span, best_vis = n, span, vis
    p = pos[best_vis]
    d = np.linalg.norm(p[:, None] - p[None], axis=-1)
    pick = [int(x) for x in np.unravel_index(int(np.argmax(d)), d.shape)]
    while len(pick) < min(FRONT_SITES, best_vis.size):
        pick.append(int(np.argmax(np.min(d[:, pick], axis=1))))
    ra, dec = ecef_unit_to_radec(best_n, t0_ns)
    n = radec_to_ecef_unit(ra, dec, t0_ns)
    hits: dict[str, int] = {}
    for k in pick:
        i = int(gps[best_vis[k]])
        delay = -(reg.ecef_m[i] @ n) / C_M_PER_NS
        hits[reg.ids[i]] = t0_ns + round(delay + rng.normal(0.0, reg.clock_sigma_ns[i]))
    return Front(t0_ns, ra, dec, hits)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


async def run_demo(
    workdir: Path,
    *,
    keep_running: bool = False,
    timeout_s: float = 90.0,
    seed: int | None = None,
    out: TextIO | None = None,
) -> int:
    """Run the demo; returns 0 when the injected front came back as a candidate.
    Prints to ``out`` (default: the current ``sys.stdout``)."""

    def say(text: str) -> None:
        print(text, file=out or sys.stdout, flush=True)

    reg = shipped_registry()
    workdir.mkdir(parents=True, exist_ok=True)
    (workdir / "network.toml").write_text(reg.to_toml())
    port = _free_port()
    broker = BrokerConfig(url=f"mqtt://127.0.0.1:{port}", client_id="tocsin-demo-service")
    cfg = ServiceConfig(
        registry=workdir / "network.toml",
        data_dir=workdir / "data",
        broker=broker,
        metrics=MetricsConfig(port=0),
    )
    rng = np.random.default_rng(int(time.time()) if seed is None else seed)
    async with embedded_broker("127.0.0.1", port) as url:
        say(f"tocsin demo: embedded broker {url}, {len(reg)} invented sites, work dir {workdir}")
        now = gps_now_ns()
        service = Service(cfg)
        seqs = _preload_history(service, reg, now, seed=int(rng.integers(2**31)))
        say(
            f"  {HISTORY_S} s of simulated history loaded: rates are warm "
            f"({service.pipeline.engine.counters.hits:,} hits)"
        )
        rates = service.pipeline.engine.last_rates_hz
        taking_part = rates > 0 if rates is not None else np.ones(len(reg), dtype=bool)
        front = plan_front(reg, now + round(FRONT_AFTER_S * NS_PER_S), rng, taking_part)
        found: list[Candidate] = []

        def on_candidate(c: Candidate) -> None:
            found.append(c)
            say(_describe(c, front))
            _say_alert(say, c, service)

        service.listeners.append(on_candidate)
        stop_service = asyncio.Event()
        agents = []
        for i, site in enumerate(reg):
            spool = workdir / "spool" / site.id
            _seed_spool(spool, site.id, seqs.get(site.id, 0), now)
            settings = AgentSettings(
                site=site.id,
                broker=broker.model_copy(update={"client_id": f"tocsin-demo-{site.id}"}),
                spool_dir=spool,
            )
            extra = [front.hits[site.id]] if site.id in front.hits else []
            src = SimSource(
                SHIPPED_RATES_HZ[site.id], seed=int(rng.integers(2**31)) + i, extra=extra
            )
            agents.append(Agent(settings, src))
        say(
            f"  a plane front will cross {', '.join(front.hits)} at "
            f"{gps_ns_to_utc_iso(front.t0_ns)[11:23]} UTC (RA {front.ra_deg:.2f} deg, "
            f"Dec {front.dec_deg:.2f} deg)"
        )
        code = 1
        async with contextlib.AsyncExitStack() as stack:
            for a in agents:
                await stack.enter_async_context(a)
            svc_task = asyncio.create_task(service.run(stop_service), name="service")
            t_start = time.monotonic()
            try:
                while True:
                    await asyncio.sleep(2.0)
                    elapsed = time.monotonic() - t_start
                    say(_status_line(service, reg, elapsed))
                    hit = _front_found(found, front)
                    if hit and not keep_running:
                        say(
                            f"  the injected front came back after {elapsed:.0f} s; "
                            f"candidates are in {cfg.data_dir / 'candidates.jsonl'}"
                        )
                        code = 0
                        break
                    if not keep_running and elapsed > timeout_s:
                        say(f"  no candidate for the injected front within {timeout_s:.0f} s")
                        break
                    if hit:
                        code = 0
            finally:
                for a in agents:
                    a.stop()
                stop_service.set()
                await svc_task
                service.close()
        return code


def _preload_history(service: Service, reg: SiteRegistry, now: int, *, seed: int) -> dict[str, int]:
    """Feed ``HISTORY_S`` of simulated background (ending now) as received batches;
    returns each site's next seq."""
    sc = build_scenario(
        reg,
        seed=seed,
        start_ns=now - HISTORY_S * NS_PER_S,
        duration_ns=HISTORY_S * NS_PER_S,
        late_fraction=0.0,
    )
    seqs: dict[str, int] = {}
    for b in iter_batches(simulate(sc)):
        obj = b.to_json_obj()
        obj.pop("recv_ns", None)
        service.on_hits(b.site, orjson.dumps(obj))
        seqs[b.site] = max(seqs.get(b.site, 0), b.seq + 1)
    service.journal.sync()
    return seqs


def _seed_spool(spool: Path, site: str, next_seq: int, mark: int) -> None:
    """Start the site's agent after the history's sequence numbers."""
    spool.mkdir(parents=True, exist_ok=True)
    state = {"v": 1, "site": site, "next_seq": next_seq, "acked": next_seq - 1, "last_mark": mark}
    (spool / "state.json").write_text(json.dumps(state))


def _status_line(service: Service, reg: SiteRegistry, elapsed: float) -> str:
    c = service.pipeline.counters
    e = service.pipeline.engine
    wm = service.pipeline.orderer.watermark
    lag = (gps_now_ns() - wm) / NS_PER_S if wm else float("nan")
    rates = e.last_rates_hz
    live = int(np.count_nonzero(rates)) if rates is not None else 0
    return (
        f"  t+{elapsed:4.0f} s  sites reporting {live}/{len(reg)}  batches {c.accepted:,}  "
        f"hits {e.counters.hits:,}  watermark lag {lag:.1f} s  late {c.rejected.get('late', 0)}"
    )


def _say_alert(say: Callable[[str], None], c: Candidate, service: Service) -> None:
    """Print the alert that reports candidate ``c`` (a new alert, or an update of the
    family it joined), if the policy sent one."""
    a = service.archive.latest_for_source(c.id)
    if a is None:
        return
    path = service.packet_dir / packet_name(a.ivorn)
    say(
        f"  ALERT ({service.cfg.alerts.role}) {a.kind}/{a.level} {a.status}: {a.ivorn}\n"
        f"        VOEvent packet: {path}"
    )
    if c.ra_deg is not None:  # what `tocsin alerts --show IVORN --sky-plot` draws
        from tocsin.alerts.packet import read_alert
        from tocsin.alerts.skyplot import sky_plot

        png = service.cfg.data_dir / "plots" / (path.stem + ".png")
        png.parent.mkdir(parents=True, exist_ok=True)
        png.write_bytes(sky_plot(read_alert(a.xml)))
        say(f"        sky plot: {png}")


async def run_recording_demo(
    workdir: Path,
    recording: Path,
    sites: Path,
    *,
    speed: float = 20.0,
    out: TextIO | None = None,
) -> int:
    """Play ``recording`` through an embedded broker into the service at ``speed`` x real
    time; print the candidates and alerts; return 0 if at least one alert was archived."""
    import aiomqtt

    def say(text: str) -> None:
        print(text, file=out or sys.stdout, flush=True)

    if not speed > 0:
        raise ValueError(f"speed {speed!r} must be positive")
    reg = SiteRegistry.from_toml(sites)
    with open_text(recording, "rb") as fh:
        lines = [ln.strip() for ln in fh if ln.strip()]
    workdir.mkdir(parents=True, exist_ok=True)
    port = _free_port()
    broker = BrokerConfig(url=f"mqtt://127.0.0.1:{port}", client_id="tocsin-demo-service")
    cfg = ServiceConfig(
        registry=sites.resolve(),
        data_dir=workdir / "data",
        broker=broker,
        metrics=MetricsConfig(port=0),
    )
    async with embedded_broker("127.0.0.1", port) as url:
        say(
            f"tocsin demo: embedded broker {url}, playing {recording} ({len(lines):,} batches) "
            f"at {speed:g}x real time, work dir {workdir}"
        )
        service = Service(cfg)

        def on_candidate(c: Candidate) -> None:
            say(
                f"  CANDIDATE {c.trigger}/{c.statistic} {gps_ns_to_utc_iso(c.time_gps_ns)} "
                f"{c.multiplicity} sites, FAR {c.far_per_year:.3g}/yr"
            )
            _say_alert(say, c, service)

        service.listeners.append(on_candidate)
        stop = asyncio.Event()
        svc_task = asyncio.create_task(service.run(stop), name="service")
        try:
            async with aiomqtt.Client("127.0.0.1", port, identifier="tocsin-demo-player") as c:
                t_wall0 = time.monotonic()
                t_data0: int | None = None
                for k, line in enumerate(lines):
                    obj = orjson.loads(line)
                    obj.pop("recv_ns", None)
                    live = obj.get("live") or [[0, 0]]
                    end = live[-1][1] if isinstance(live[0], list) else live[1]
                    if isinstance(end, int):
                        t_data0 = end if t_data0 is None else t_data0
                        due = (end - t_data0) / NS_PER_S / speed
                        wait = due - (time.monotonic() - t_wall0)
                        if wait > 0:
                            await asyncio.sleep(wait)
                    site = str(obj.get("site", "?"))
                    topic = topics.hits_topic(topics.DEFAULT_ROOT, site)
                    await c.publish(topic, orjson.dumps(obj), qos=1)
                    if k % 2000 == 0:
                        say(_status_line(service, reg, time.monotonic() - t_wall0))
            say("  recording sent; waiting for the service to close the last windows")
            # the service's idle tick closes the windows that reach the end of the data
            for _ in range(40):
                await asyncio.sleep(0.5)
                wm = service.pipeline.orderer.watermark
                if wm is not None and wm > gps_now_ns() - 3600 * NS_PER_S:
                    break
            n_alerts = len(service.archive.latest(limit=1_000_000))
        finally:
            stop.set()
            await svc_task
            service.close()
        say(f"  {n_alerts} alert(s) archived in {cfg.data_dir / 'alerts.sqlite'}")
        return 0 if n_alerts > 0 else 1


def _is_front(c: Candidate, front: Front) -> bool:
    """A candidate is the injected front when it holds at least ``MIN_FRONT_SITES`` of
    its sites' injected hits (a site may miss it: dead time, a batch late, no rate yet)."""
    injected = {(s, t) for s, t in front.hits.items()}
    got = set(zip(c.sites, c.hit_times_ns, strict=False))
    return len(injected & got) >= MIN_FRONT_SITES


def _front_found(found: list[Candidate], front: Front) -> bool:
    return any(_is_front(c, front) for c in found)


def _describe(c: Candidate, front: Front) -> str:
    where = ""
    if c.ra_deg is not None and c.dec_deg is not None and c.err_deg is not None:
        where = f", RA {c.ra_deg:.3f} Dec {c.dec_deg:.3f} +- {c.err_deg:.4f} deg"
    mark = ""
    if _is_front(c, front):
        missed = sorted(set(front.hits) - set(c.sites))
        mark = "  <- the injected front" + (f" (without {', '.join(missed)})" if missed else "")
    return (
        f"  CANDIDATE {c.trigger}/{c.statistic} {gps_ns_to_utc_iso(c.time_gps_ns)} "
        f"{c.multiplicity} sites, FAR {c.far_per_year:.3g}/yr, "
        f"{c.significance_sigma:.1f} sigma{where}{mark}"
    )
