"""Follow-up intake sources (transport remote, watched directory), the parse time limit,
reading outside packets (time scales via astropy), config errors, restart."""

from __future__ import annotations

import asyncio
import threading
from pathlib import Path
from typing import Any

import pytest
from astropy import units as u
from astropy.coordinates import EarthLocation, SkyCoord
from astropy.time import Time
from lxml import etree
from prometheus_client import CollectorRegistry

from tests.alertkit import config as alert_config
from tests.extpackets import AUTHOR_IVORN, BILLION_LAUGHS, external_packet, ivorn
from tests.test_followup_desk import COINC, T0, _ring
from tocsin.alerts.archive import Archive
from tocsin.alerts.external import ExternalRejected, parse_external
from tocsin.alerts.followup_desk import FollowupDesk
from tocsin.alerts.policy import AlertDesk
from tocsin.alerts.safexml import XmlLimits
from tocsin.errors import ConfigError
from tocsin.live import followup_intake
from tocsin.live.followup_intake import FollowupIntake
from tocsin.live.transport import AllowedNetwork, TransportServer
from tocsin.model.followup_config import FollowupConfig
from tocsin.model.registry import SiteRegistry
from tocsin.model.service_config import load_service_config
from tocsin.types import NS_PER_S


def _intake(tmp: Path, reg: SiteRegistry, **kw: Any) -> FollowupIntake:
    cfg = FollowupConfig.model_validate({"enabled": True, "authors": [AUTHOR_IVORN], **kw})
    acfg = alert_config(role="test")
    archive = Archive(tmp / "alerts.sqlite", stream=acfg.stream_ivorn, role=acfg.role)
    desk = FollowupDesk(
        cfg,
        acfg,
        reg,
        COINC,
        desk=AlertDesk(acfg, archive, packet_dir=tmp / "pk", mqtt=False),
        jsonl=tmp / "followups.jsonl",
    )
    return FollowupIntake(cfg, desk, _ring(reg), tmp, CollectorRegistry())


async def _until(cond: Any, timeout: float = 20.0) -> None:
    async with asyncio.timeout(timeout):
        while not cond():
            await asyncio.sleep(0.02)


@pytest.mark.asyncio
async def test_packets_from_a_transport_remote_reach_the_desk(
    tmp_path: Path, small_registry: SiteRegistry
) -> None:
    outcomes: list[tuple[str, str, str]] = []
    srv = TransportServer(
        origin="ivo://far-observatory.example/broker",
        allow=[AllowedNetwork.parse("tocsin", "127.0.0.1/32")],
        on_result=lambda name, iv, how: outcomes.append((name, iv, str(how))),
    )
    async with srv:
        intake = _intake(
            tmp_path, small_registry, remotes=[{"host": "127.0.0.1", "port": srv.port}]
        )
        stop = asyncio.Event()
        task = asyncio.create_task(intake.run(stop))
        await _until(lambda: srv.connected() == ["tocsin"])
        pkt = external_packet("V1", T0 + 600 * NS_PER_S)
        assert srv.publish(pkt, ivorn("V1")) == 1
        await _until(lambda: ivorn("V1") in intake.desk.tracked)
        await _until(lambda: len(outcomes) == 1)
        assert outcomes[0][1:] == (ivorn("V1"), "ack")
        # the event lies inside the ring: the loop answers it
        await _until(lambda: intake.desk.tracked[ivorn("V1")].state == "answered")
        stop.set()
        await task
    assert intake.counts["accepted"] == 1


@pytest.mark.asyncio
async def test_watched_directory(tmp_path: Path, small_registry: SiteRegistry) -> None:
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    (inbox / "good.xml").write_bytes(external_packet("W1", T0 + 600 * NS_PER_S))
    (inbox / "bad.xml").write_bytes(BILLION_LAUGHS)
    (inbox / "big.xml").write_bytes(b"<" * 2_000_000)
    intake = _intake(tmp_path, small_registry, directory=str(inbox))
    await intake._poll_directory()
    assert sorted(p.name for p in (inbox / "done").iterdir()) == ["good.xml"]
    assert sorted(p.name for p in (inbox / "refused").iterdir()) == ["bad.xml", "big.xml"]
    assert intake.counts == {"accepted": 1, "doctype": 1, "too_large": 1}
    assert ivorn("W1") in intake.desk.tracked


@pytest.mark.asyncio
async def test_parse_time_limit_refuses_and_moves_on(
    tmp_path: Path, small_registry: SiteRegistry, monkeypatch: pytest.MonkeyPatch
) -> None:
    release = threading.Event()
    real = followup_intake.parse_external

    def stuck(data: bytes, *, limits: XmlLimits) -> Any:
        if b"#T1" in data:
            release.wait(30)  # a parse that does not finish in time
        return real(data, limits=limits)

    monkeypatch.setattr(followup_intake, "parse_external", stuck)
    intake = _intake(tmp_path, small_registry, parse_timeout_s=0.2)
    assert await intake.submit(external_packet("T1", T0 + 600 * NS_PER_S), "t") == "timeout"
    release.set()
    assert await intake.submit(external_packet("T2", T0 + 600 * NS_PER_S), "t") == "accepted"
    assert intake.counts == {"timeout": 1, "accepted": 1}


def _with_scale(raw: bytes, system: str) -> bytes:
    return raw.replace(b"UTC-ICRS-GEO", system.encode())


@pytest.mark.parametrize("scale", ["UTC", "TT", "GPS"])
def test_event_time_in_every_scale(scale: str) -> None:
    iso = "2026-03-14T00:10:00.123456"
    raw = external_packet("Z1", T0)
    root = etree.fromstring(raw)
    root.find(".//ISOTime").text = iso
    raw = _with_scale(
        etree.tostring(root, xml_declaration=True, encoding="UTF-8"), f"{scale}-ICRS-GEO"
    )
    ev = parse_external(raw, limits=XmlLimits())
    # reference: astropy.time; GPS = TAI - 19 s (VOEVENT.md §5)
    ref = {
        "UTC": Time(iso, scale="utc"),
        "TT": Time(iso, scale="tt"),
        "GPS": Time(iso, scale="tai") + 19 * u.s,
    }[scale]
    since_epoch_s = (ref.tai - Time(0.0, format="gps").tai).to_value(u.s)
    assert ev.time_gps_ns is not None
    assert abs(ev.time_gps_ns - since_epoch_s * NS_PER_S) < 1000  # float64 s: ~0.24 us steps
    assert ev.messenger == "gw"


def _bary_packet(iso: str, ra_dec_err: tuple[float, float, float] | None) -> bytes:
    raw = external_packet("B1", T0, ra_dec_err=ra_dec_err)
    root = etree.fromstring(raw)
    root.find(".//ISOTime").text = iso
    return _with_scale(
        etree.tostring(root, xml_declaration=True, encoding="UTF-8"), "TDB-ICRS-BARY"
    )


def test_barycentric_time_is_moved_to_the_geocentre() -> None:
    """A ``TDB-ICRS-BARY`` time is the arrival at the solar-system barycentre; the
    follow-up needs the arrival at the Earth, up to ~500 s away. Reference: astropy's
    ``Time.light_travel_time(kind="barycentric")`` for the geocentre, applied forwards
    to a known geocentric time; the parser must invert it."""
    t_geo = Time("2026-03-14T00:10:00.123456789", scale="utc", precision=9)
    geocentre = EarthLocation.from_geocentric(0.0, 0.0, 0.0, unit=u.m)
    # a direction near the Earth's orbital position, so the delay is large
    best = max(
        ((ra, dec) for ra in range(0, 360, 30) for dec in (-60, -20, 0, 20, 60)),
        key=lambda rd: abs(
            Time(t_geo, location=geocentre)
            .light_travel_time(SkyCoord(rd[0] * u.deg, rd[1] * u.deg), kind="barycentric")
            .to_value(u.s)
        ),
    )
    ltt = Time(t_geo, location=geocentre).light_travel_time(
        SkyCoord(best[0] * u.deg, best[1] * u.deg), kind="barycentric"
    )
    assert abs(ltt.to_value(u.s)) > 400.0  # ~1 AU / c = 499 s: ignoring it would show
    t_bary = (t_geo.tdb + ltt).tdb
    t_bary.precision = 9
    ev = parse_external(_bary_packet(t_bary.isot, (best[0], best[1], 1.0)), limits=XmlLimits())
    want_s = (t_geo.tai - Time(0.0, format="gps").tai).to_value(u.s)
    assert ev.time_gps_ns is not None
    assert abs(ev.time_gps_ns - want_s * NS_PER_S) < 1000  # float64 s: ~0.24 us steps
    # without a direction a barycentric time cannot be placed: refused, naming why
    with pytest.raises(ExternalRejected, match=r"bad_time.*barycentric"):
        parse_external(_bary_packet(t_bary.isot, None), limits=XmlLimits())


def test_packet_without_time_is_refused(tmp_path: Path, small_registry: SiteRegistry) -> None:
    intake = _intake(tmp_path, small_registry)
    with pytest.raises(ExternalRejected, match="no_time"):
        intake.desk.offer(parse_external(external_packet("X1", None), limits=XmlLimits()))


def test_config_errors_name_the_key(tmp_path: Path, small_registry: SiteRegistry) -> None:
    reg = tmp_path / "sites.toml"
    reg.write_text(small_registry.to_toml())
    for body, words in (
        ('roles = ["sighting"]', "followup.roles"),
        ('authors = ["far-observatory.example"]', "ivo://"),
        ("[followup.windows.radio]\nbefore_s = 1.0\nafter_s = 1.0", "messengers"),
        ("buffer_hours = 0", "followup.buffer_hours"),
        ('[[followup.remotes]]\nhost = "a b"\nport = 1', "remote host"),
    ):
        cfg = tmp_path / "c.toml"
        cfg.write_text(f'registry = "{reg}"\n[followup]\n{body}\n')
        with pytest.raises(ConfigError, match=words.replace(".", r"\.")):
            load_service_config(cfg)


def test_answers_of_an_earlier_run_are_remembered(
    tmp_path: Path, small_registry: SiteRegistry
) -> None:
    first = _intake(tmp_path, small_registry)
    desk = first.desk
    desk.offer(parse_external(external_packet("P1", T0 + 600 * NS_PER_S), limits=XmlLimits()))
    ring = first.ring
    lo, hi = desk.span_needed(ivorn("P1"), ring.t_start or 0)
    ours = desk.answer(ivorn("P1"), desk.search(ivorn("P1"), ring.block(lo, hi)))
    assert ours is not None
    # a restart: a new desk on the same archive
    again = FollowupDesk(
        desk.cfg, desk.alert_cfg, small_registry, COINC, desk=desk.desk, jsonl=desk.jsonl
    )
    with pytest.raises(ExternalRejected, match="already answered"):
        again.offer(parse_external(external_packet("P1", T0 + 600 * NS_PER_S), limits=XmlLimits()))
    retr = external_packet("P1-x", None, cite=(ivorn("P1"), "retraction"))
    assert again.offer(parse_external(retr, limits=XmlLimits())) == "retracted"
    assert desk.archive is not None
    assert [r.kind for r in desk.archive.latest()] == ["retraction", "followup"]
