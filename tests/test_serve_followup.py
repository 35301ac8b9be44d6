"""Follow-up through the live service against a real Mosquitto: hostile packets on the
external topic are refused and counted, the service keeps running, a valid outside
alert timed on an injected front is answered with a detection, and a retraction of
the outside event retracts our answer."""

from __future__ import annotations

import contextlib
import json
import signal
import sqlite3
import time
from pathlib import Path

import numpy as np
import orjson
import pytest

from tests.extpackets import (
    AUTHOR_IVORN,
    BILLION_LAUGHS,
    EXTERNAL_ENTITY,
    external_packet,
    huge_packet,
    ivorn,
)
from tests.livenet import publish_sync, running_service
from tests.mosquitto import Mosquitto
from tests.netsim import followup_network
from tocsin.alerts.packet import read_alert
from tocsin.engine.geometry import ellipsoid_up
from tocsin.engine.sky import ecef_unit_to_radec
from tocsin.gpstime import gps_now_ns
from tocsin.model.registry import SiteRegistry
from tocsin.types import C_M_PER_NS, NS_PER_S

pytestmark = [pytest.mark.broker, pytest.mark.slow]

RATE_HZ = 3.0
EXTERNAL = "tocsin/external"


def _batches(reg: SiteRegistry, start: int, seconds: int, front: dict[int, int]) -> list[bytes]:
    """1 s batches of Poisson hits per site, plus one hit per site of ``front``."""
    rng = np.random.default_rng(7)
    out = []
    for k in range(seconds):
        a, b = start + k * NS_PER_S, start + (k + 1) * NS_PER_S
        for j, sid in enumerate(reg.ids):
            t = rng.integers(a, b, rng.poisson(RATE_HZ)).tolist()
            t += [x for jj, x in front.items() if jj == j and a <= x < b]
            out.append(
                orjson.dumps(
                    {"v": 1, "site": sid, "seq": k, "live": [a, b], "t": sorted(int(x) for x in t)}
                )
            )
    return out


def _config(tmp: Path, broker: Mosquitto, reg_path: Path) -> Path:
    cfg = tmp / "tocsin.toml"
    cfg.write_text(
        f'registry = "{reg_path}"\n'
        f'data_dir = "{tmp / "data"}"\n'
        "[broker]\n"
        f'url = "{broker.url}"\n'
        'client_id = "tocsin-test-service"\n'
        "[metrics]\nport = 0\n"
        "[engine.coincidence]\nscales_s = [1e-6, 1e-4, 1e-2]\nfront_scales_s = [1e-6]\n"
        '[alerts]\nrole = "test"\n'
        "[followup]\nenabled = true\n"
        f'authors = ["{AUTHOR_IVORN}"]\n'
        "max_packet_bytes = 1000000\n"
        "offsource_max = 50\n"
        "[followup.windows.gw]\nbefore_s = 10.0\nafter_s = 10.0\n"
    )
    return cfg


class _Scene:
    """The follow-up network, 145 s of 1 s batches ending a few seconds ago, and a
    5-site front from the zenith of fen-a 60.25 s into them (the outside event)."""

    def __init__(self, tmp: Path) -> None:
        self.reg = followup_network()
        self.reg_path = tmp / "sites.toml"
        self.reg_path.write_text(self.reg.to_toml())
        start = (gps_now_ns() // NS_PER_S - 150) * NS_PER_S
        self.t_ev = start + 60 * NS_PER_S + 250_000_000
        n = ellipsoid_up(self.reg.ecef_m[0])
        front = {j: self.t_ev - round(float(self.reg.ecef_m[j] @ n) / C_M_PER_NS) for j in range(5)}
        self.ra, self.dec = ecef_unit_to_radec(n, self.t_ev)
        self.data = tmp / "data"
        self.lines = _batches(self.reg, start, 145, front)


def _wait(pred: object, timeout_s: float, what: str) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        with contextlib.suppress(FileNotFoundError, json.JSONDecodeError, KeyError):
            if pred():  # type: ignore[operator]
                return
        time.sleep(0.2)
    raise TimeoutError(what)


def _lines(path: Path) -> list[dict[str, object]]:
    return [json.loads(x) for x in path.read_text().splitlines() if x.strip()]


def test_hostile_packets_refused_then_outside_alert_answered_and_retracted(
    mosquitto: Mosquitto, tmp_path: Path, stack: contextlib.ExitStack
) -> None:
    sc = _Scene(tmp_path)
    t_ev, ra, dec, data = sc.t_ev, sc.ra, sc.dec, sc.data
    svc = running_service(stack, _config(tmp_path, mosquitto, sc.reg_path))
    publish_sync(mosquitto.port, sc.lines)
    # hostile packets first, through the live intake path
    publish_sync(
        mosquitto.port,
        [(EXTERNAL, BILLION_LAUGHS), (EXTERNAL, EXTERNAL_ENTITY), (EXTERNAL, huge_packet())],
    )
    status = data / "followup_status.json"
    _wait(lambda: sum(json.loads(status.read_text())["packets"].values()) >= 3, 60, "3 refusals")
    assert json.loads(status.read_text())["packets"] == {"doctype": 2, "too_large": 1}
    assert svc.proc is not None and svc.proc.poll() is None  # still running
    # then a valid outside alert timed on the injected front
    ok = external_packet("fe-0314-1", t_ev, ra_dec_err=(ra, dec, 5.0))
    publish_sync(mosquitto.port, [(EXTERNAL, ok)])
    fu = data / "followups.jsonl"
    _wait(lambda: len(_lines(fu)) >= 1, 120, "a follow-up answer")
    [ans] = _lines(fu)
    assert ans["external_ivorn"] == ivorn("fe-0314-1")
    assert ans["outcome"] == "detection", ans
    best = ans["best"]
    assert isinstance(best, dict) and best["statistic"] in ("directed", "front")
    assert abs(int(best["time_gps_ns"]) - t_ev) < 30_000_000
    assert json.loads(status.read_text())["packets"] == {
        "doctype": 2,
        "too_large": 1,
        "accepted": 1,
    }
    rejected = _lines(data / "external_rejected.jsonl")
    # (too_large is refused before queueing, so it may be logged first)
    assert sorted(r["reason"] for r in rejected) == ["doctype", "doctype", "too_large"]
    # delivered like our own alerts: the packet directory holds it, citing the event
    ours = str(ans["followup_ivorn"])
    local = ours.split("#", 1)[1]
    _wait(lambda: any((data / "alerts").rglob(f"*{local}*.xml")), 30, "packet file")
    pkt = read_alert(next((data / "alerts").rglob(f"*{local}*.xml")).read_bytes())
    assert (ivorn("fe-0314-1"), "followup") in pkt.citations
    # the outside facility withdraws its event: our answer is retracted
    retr = external_packet("fe-0314-1-x", None, cite=(ivorn("fe-0314-1"), "retraction"))
    publish_sync(mosquitto.port, [(EXTERNAL, retr)])
    _wait(lambda: _lines(fu)[-1]["outcome"] == "retracted", 60, "our retraction")
    con = sqlite3.connect(f"file:{data / 'alerts.sqlite'}?mode=ro", uri=True, timeout=10)
    try:
        rows = con.execute("SELECT kind, cites FROM alerts ORDER BY seq").fetchall()
    finally:
        con.close()
    assert ("retraction", ours) in rows
    assert svc.stop() == 0


@pytest.mark.parametrize("sig", [signal.SIGKILL, signal.SIGTERM])
def test_outside_alert_waiting_for_its_window_survives_a_restart(
    mosquitto: Mosquitto, tmp_path: Path, stack: contextlib.ExitStack, sig: int
) -> None:
    """An outside alert arrives while its search window still lacks data; the service
    is killed (no checkpoint) or stopped (checkpoint written), restarted, and the rest
    of the data arrives: the alert is answered from the journal of outside packets,
    once, and with the data of before the restart (the ring buffer is refilled from
    the hit journal up to where the checkpoint's pipeline resumes)."""
    sc = _Scene(tmp_path)
    t_ev, ra, dec, data, lines = sc.t_ev, sc.ra, sc.dec, sc.data, sc.lines
    cfg = _config(tmp_path, mosquitto, sc.reg_path)
    first = 65 * len(sc.reg)  # data up to start + 65 s: the window ends at start + 70.25 s
    svc = running_service(stack, cfg)
    publish_sync(mosquitto.port, lines[:first])
    packet = external_packet("fe-0314-2", t_ev, ra_dec_err=(ra, dec, 5.0))
    publish_sync(mosquitto.port, [(EXTERNAL, packet)])
    status = data / "followup_status.json"
    _wait(lambda: json.loads(status.read_text())["packets"].get("accepted") == 1, 60, "taken")
    fu = data / "followups.jsonl"
    assert not fu.exists() or _lines(fu) == []  # still waiting for its window
    assert svc.stop(sig) == (-signal.SIGKILL if sig == signal.SIGKILL else 0)
    assert (data / "checkpoint.pickle").exists() == (sig == signal.SIGTERM)
    svc2 = running_service(stack, cfg)
    publish_sync(mosquitto.port, lines[first:])
    _wait(lambda: len(_lines(fu)) >= 1, 120, "the answer after the restart")
    time.sleep(3.0)  # room for a wrong second answer to show up
    [ans] = _lines(fu)
    assert ans["external_ivorn"] == ivorn("fe-0314-2")
    assert ans["outcome"] == "detection", ans
    assert svc2.stop() == 0
