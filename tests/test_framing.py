"""VTP 2.0 framing and Transport messages, checked against the spec's wire format.

Sources: [VTP2] VOEvent Transport Protocol 2.0 REC (sections as cited);
VOEVENT.md §3 for the samples' namespace and attributes.
"""

from __future__ import annotations

import datetime as dt
import struct

import pytest
from lxml import etree

from tocsin.alerts import framing
from tocsin.alerts.framing import (
    TRANSPORT_NS,
    XSI_NS,
    TransportMessage,
    build_transport,
    encode_frame,
    frame_length,
    parse_timestamp,
    parse_transport,
)
from tocsin.alerts.safexml import PacketRejected

NOW = dt.datetime(2026, 3, 4, 5, 6, 7, 891_234, tzinfo=dt.UTC)
IVORN = "ivo://tocsin.example/test#42"
BROKER = "ivo://tocsin.example/broker"


# ------------------------------------------------------------------ frames


def test_frame_is_a_four_byte_network_order_count_then_the_payload() -> None:
    # [VTP2 §3.2] 4-byte network-order (big-endian) count of the payload bytes
    assert encode_frame(b"abc") == b"\x00\x00\x00\x03abc"
    payload = bytes(range(256)) * 3 + b"xy"  # 770 = 0x0302 bytes
    frame = encode_frame(payload)
    assert frame[:4] == b"\x00\x00\x03\x02"
    assert int.from_bytes(frame[:4], "big") == len(payload)
    assert struct.unpack("!I", frame[:4]) == (len(payload),)  # stdlib network order
    assert frame[4:] == payload


def test_frame_length_refuses_a_count_over_the_cap_and_names_it() -> None:
    assert frame_length(b"\x00\x0f\x42\x40") == 1_000_000  # the default cap itself is fine
    with pytest.raises(PacketRejected) as info:
        frame_length(b"\x80\x00\x00\x00")
    assert info.value.reason == "too_large"
    assert "2147483648" in info.value.detail
    with pytest.raises(PacketRejected, match="1000001"):
        frame_length(b"\x00\x0f\x42\x41")
    with pytest.raises(ValueError, match="got 3"):
        frame_length(b"\x00\x00\x01")


def test_encode_frame_refuses_a_payload_over_the_cap() -> None:
    with pytest.raises(PacketRejected, match="11 bytes"):
        encode_frame(b"x" * 11, max_bytes=10)


# ------------------------------------------------------------- Transport


def _tree(data: bytes) -> etree._Element:
    return etree.fromstring(data)


def test_iamalive_is_written_as_the_samples() -> None:
    data = framing.iamalive(BROKER, NOW)
    assert data.startswith(b"<?xml version='1.0' encoding='UTF-8'?>")
    root = _tree(data)
    # VOEVENT.md §3: the samples' trn prefix and namespace, role, version "1.0", schemaLocation
    assert root.tag == f"{{{TRANSPORT_NS}}}Transport"
    assert root.prefix == "trn"
    assert root.get("role") == "iamalive"
    assert root.get("version") == "1.0"
    assert root.get(f"{{{XSI_NS}}}schemaLocation", "").startswith(
        "http://ivoa.net/xml/Transport/v1.1 "
    )
    # [VTP2 App. A] children unqualified, in order Origin, (Response), TimeStamp, (Meta)
    assert [child.tag for child in root] == ["Origin", "TimeStamp"]
    assert root.findtext("Origin") == BROKER  # [VTP2 §6.1] the broker's IVOID
    assert root.findtext("TimeStamp") == "2026-03-04T05:06:07.891Z"  # UTC, may end in Z


def test_echo_keeps_the_origin_and_adds_a_response() -> None:
    # [VTP2 §6.2] Origin unchanged; the subscriber may add Response
    received = parse_transport(framing.iamalive(BROKER, NOW))
    reply = parse_transport(framing.echo(received, NOW, response="ivo://tocsin.example/sub"))
    assert (reply.role, reply.origin, reply.response) == (
        "iamalive", BROKER, "ivo://tocsin.example/sub"
    )
    assert [c.tag for c in _tree(framing.echo(received, NOW, response="ivo://a.b/c"))] == [
        "Origin", "Response", "TimeStamp"
    ]
    with pytest.raises(ValueError, match="'ack'"):
        framing.echo(parse_transport(framing.ack(IVORN, NOW)), NOW)


def test_ack_and_nak_name_the_voevent_and_nak_carries_the_reason() -> None:
    # [VTP2 §6.3] Origin is the IVOID of the VOEvent just received; Meta/Result for a nak
    ack = parse_transport(framing.ack(IVORN, NOW))
    assert (ack.role, ack.origin, ack.result) == ("ack", IVORN, None)
    nak_bytes = framing.nak(IVORN, NOW, "schema_invalid: two Who")
    nak = parse_transport(nak_bytes)
    assert (nak.role, nak.origin, nak.result) == ("nak", IVORN, "schema_invalid: two Who")
    root = _tree(nak_bytes)
    assert [c.tag for c in root] == ["Origin", "TimeStamp", "Meta"]
    assert root.find("Meta/Result").text == "schema_invalid: two Who"


def test_build_then_parse_gives_the_message_back() -> None:
    msg = TransportMessage(
        role="nak",
        origin=IVORN,
        timestamp=NOW.replace(microsecond=891_000),
        response="ivo://tocsin.example/sub",
        meta=(("reason-code", "7"), ("note", "a < b & c")),
        result="refused",
    )
    assert parse_transport(build_transport(msg)) == msg


def test_characters_xml_cannot_carry_are_replaced() -> None:
    nak = parse_transport(framing.nak(IVORN, NOW, "bad \x00 byte \x1b"))
    assert nak.result == "bad \ufffd byte \ufffd"


@pytest.mark.parametrize(
    "data",
    [
        # [VTP2 App. A] the schema has no targetNamespace: an un-namespaced root is valid
        b"<Transport role='ack' version='1.0'><Origin>ivo://tocsin.example/test#42</Origin>"
        b"<TimeStamp>2005-04-15T14:34:16</TimeStamp></Transport>",
        # another namespace on the root: matched on the local name (VOEVENT.md §3)
        b"<t:Transport xmlns:t='http://tocsin.example/other' role='ack' version='1.0'>"
        b"<Origin>ivo://tocsin.example/test#42</Origin><TimeStamp>2005-04-15T14:34:16Z"
        b"</TimeStamp></t:Transport>",
    ],
)
def test_transport_is_matched_on_local_name(data: bytes) -> None:
    msg = parse_transport(data)
    assert (msg.role, msg.origin) == ("ack", IVORN)
    assert msg.timestamp == dt.datetime(2005, 4, 15, 14, 34, 16, tzinfo=dt.UTC)


def _transport(body: str, role: str = "ack") -> bytes:
    return f"<Transport role='{role}' version='1.0'>{body}</Transport>".encode()


GOOD = "<Origin>ivo://tocsin.example/test#1</Origin><TimeStamp>2026-01-01T00:00:00Z</TimeStamp>"


@pytest.mark.parametrize(
    ("data", "reason", "named"),
    [
        (_transport(GOOD, role="hello"), "schema_invalid", "'hello'"),
        (_transport("<TimeStamp>2026-01-01T00:00:00</TimeStamp>"), "schema_invalid", "Origin"),
        (_transport("<Origin>ivo://a.b/c</Origin>"), "schema_invalid", "TimeStamp"),
        (_transport(GOOD.replace("2026-01-01T00:00:00Z", "yesterday")), "schema_invalid",
         "'yesterday'"),
        (_transport(GOOD.replace("2026-01-01T00:00:00Z", "2026-01-01")), "schema_invalid",
         "'2026-01-01'"),
        (_transport(GOOD + "<Extra/>"), "schema_invalid", "'Extra'"),
        (_transport(GOOD + "<Origin>ivo://x.y/z</Origin>"), "schema_invalid", "second 'Origin'"),
        (_transport(GOOD + "<Meta><Group/></Meta>"), "schema_invalid", "'Group'"),
        (b"<Transport role='ack'>" + GOOD.encode() + b"</Transport>", "schema_invalid", "version"),
        (b"<VOEvent/>", "not_transport", "'VOEvent'"),
        (b"<!DOCTYPE Transport>" + _transport(GOOD), "doctype", "Transport"),
        (b"ack", "not_xml", "syntax error"),
    ],
)
def test_bad_transport_messages_are_refused_naming_the_value(
    data: bytes, reason: str, named: str
) -> None:
    with pytest.raises(PacketRejected) as info:
        parse_transport(data)
    assert info.value.reason == reason
    assert named in info.value.detail


def test_timestamps_are_xs_datetime_read_as_utc() -> None:
    # [VTP2 §6] TimeStamp is xs:dateTime, should be UTC; no zone is read as UTC
    utc = dt.UTC
    sample = dt.datetime(2005, 4, 15, 14, 34, 16, tzinfo=utc)
    assert parse_timestamp("2005-04-15T14:34:16") == sample
    assert parse_timestamp("2005-04-15T14:34:16Z") == sample
    assert parse_timestamp("2005-04-15T16:34:16.5+02:00") == dt.datetime(
        2005, 4, 15, 14, 34, 16, 500_000, tzinfo=utc
    )
    assert parse_timestamp("2005-04-15T14:34:16.123456789Z").microsecond == 123_456  # truncated
    with pytest.raises(ValueError, match="timezone-aware"):
        framing.format_timestamp(dt.datetime(2026, 1, 1))
    with pytest.raises(ValueError, match="timezone-aware"):
        TransportMessage("ack", IVORN, dt.datetime(2026, 1, 1))
    with pytest.raises(ValueError, match="'hello'"):
        TransportMessage("hello", IVORN, NOW)  # type: ignore[arg-type]
