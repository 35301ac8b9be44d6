"""VOEvent 2.0 packets: schema-valid, and what a receiver parses back is exact.

Sources: [XSD] VOEvent-v2.0.xsd as bundled in voevent-parse; [VOE2] IVOA VOEvent 2.0
REC 2011-07-11 §3.4.1 (coordinate system ids), §3.7.1.1 (cite values);
GPS - UTC = 18 s since 2017-01-01 (IERS Bulletin C 52; from memory, also what astropy gives).
"""

from __future__ import annotations

import datetime as dt

import pytest
import voeventparse as vp
from lxml import etree

from tests.alertkit import T0, config, excess_candidate, front_candidate
from tocsin.alerts.packet import AlertMeta, build_alert, build_retraction, read_alert

NOW = dt.datetime(2026, 12, 2, 5, 0, 0, 123456, tzinfo=dt.UTC)
SCHEMA = etree.XMLSchema(etree.fromstring(vp.definitions.v2_0_schema_str))


def _valid(xml: bytes) -> None:
    """[XSD] validation with lxml directly, independent of voevent-parse's own check."""
    doc = etree.fromstring(xml)
    assert SCHEMA.validate(doc), SCHEMA.error_log


def test_front_alert_round_trip_is_exact() -> None:
    cfg = config(role="test")
    c = front_candidate()
    ivorn = f"ivo://tocsin.example/alerts#{c.id}"
    xml = build_alert(c, AlertMeta(ivorn, "new", "public", NOW), cfg)
    _valid(xml)
    p = read_alert(xml)
    assert p.ivorn == ivorn
    assert p.role == "test"
    assert p.event_gps_ns == T0  # exact to the ns through the parameter
    # GPS epoch 1980-01-06T00:00:00 UTC; GPS - UTC = 18 s in 2026 (IERS Bulletin C)
    by_hand = dt.datetime(1980, 1, 6, tzinfo=dt.UTC) + dt.timedelta(
        microseconds=T0 // 1000 - 18_000_000
    )
    assert p.time_utc == by_hand  # UTC to 1 us (voevent-parse truncates beyond us)
    assert (p.ra_deg, p.dec_deg, p.err_deg) == (c.ra_deg, c.dec_deg, c.err_deg)
    assert p.params["false_alarm_rate"] == repr(c.far_per_year)
    assert p.params["multiplicity"] == "6"
    assert p.params["trigger_kind"] == "coincidence/front"
    major, minor, pa = c.details["err_ellipse_deg"]
    assert p.params["err_ellipse_major"] == repr(major)
    assert p.params["err_ellipse_minor"] == repr(minor)
    assert p.params["err_ellipse_pa"] == repr(pa)
    doc = etree.fromstring(xml)
    iso = doc.findtext(".//ISOTime")
    assert iso == "2026-03-14T00:03:00.000000003"  # sub-microsecond digits kept
    # [VOE2 §3.4.1] the fitted front time is geocentric
    assert doc.find(".//AstroCoords").get("coord_system_id") == "UTC-ICRS-GEO"
    assert float(doc.findtext(".//Time/Error")) == pytest.approx(16.8e-9)
    # safety: a test alert says so in words, and every alert says its FAR and method
    desc = doc.findtext("Description")
    assert desc.startswith("TEST ALERT")
    assert "False alarm rate 0.05 per year" in desc
    assert "1-sigma error ellipse, 0.00011 x 6e-05 deg at position angle 131 deg" in desc
    assert "Plane-front coincidence" in doc.findtext("How/Description")


def test_excess_alert_has_no_position_and_topocentric_time() -> None:
    cfg = config(role="observation")
    c = excess_candidate()
    xml = build_alert(
        c, AlertMeta(f"ivo://tocsin.example/alerts#{c.id}", "new", "internal", NOW), cfg
    )
    _valid(xml)
    p = read_alert(xml)
    assert p.role == "observation"
    assert p.ra_deg is None
    assert p.event_gps_ns == c.time_gps_ns
    assert p.params["observed_hits"] == "260.0" and p.params["expected_hits"] == "180.5"
    doc = etree.fromstring(xml)
    assert doc.find(".//AstroCoords").get("coord_system_id") == "UTC-ICRS-TOPO"
    assert not doc.findtext("Description").startswith("TEST")


def test_update_and_retraction_cite_with_standard_values() -> None:
    cfg = config()
    c = front_candidate(revision=2, far=0.001)
    first = f"ivo://tocsin.example/alerts#{c.id}"
    upd = build_alert(
        c, AlertMeta(first + "-u2", "update", "public", NOW, first, "two more sites"), cfg
    )
    _valid(upd)
    # [VOE2 §3.7.1.1] an update replaces the earlier information: "supersedes"
    assert read_alert(upd).citations == [(first, "supersedes")]
    ret = build_retraction(
        first, c.id, AlertMeta(first + "-x", "retraction", "public", NOW, first, "clock fault"), cfg
    )
    _valid(ret)
    # [VOE2 §3.7.1.1] the discovery is completely withdrawn: "retraction"
    p = read_alert(ret)
    assert p.citations == [(first, "retraction")]
    assert etree.fromstring(ret).findtext("Citations/Description") == "clock fault"


def test_packet_refuses_foreign_stream_and_empty_reason() -> None:
    cfg = config()
    c = front_candidate()
    with pytest.raises(ValueError, match="not in this stream"):
        build_alert(c, AlertMeta("ivo://elsewhere.example/x#1", "new", "public", NOW), cfg)
    with pytest.raises(ValueError, match="needs a reason"):
        build_retraction(
            "ivo://tocsin.example/alerts#a",
            "a",
            AlertMeta("ivo://tocsin.example/alerts#a-x", "retraction", "public", NOW, None, " "),
            cfg,
        )
