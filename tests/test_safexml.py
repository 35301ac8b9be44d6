"""Safe parsing of untrusted XML: each attack refused with its reason, before it costs anything.

Sources: [VOE2] VOEvent 2.0 REC; [VTP2] VOEvent Transport Protocol 2.0 REC; [XSD] the
VOEvent 2.0 schema bundled in voevent-parse (see /work/shared/VOEVENT.md).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import socket
import tracemalloc
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from lxml import etree

from tocsin.alerts import framing
from tocsin.alerts.safexml import (
    REJECT_REASONS,
    VOEVENT_NS,
    PacketRejected,
    XmlLimits,
    check_voevent,
    dedup_key,
    inspect_root,
    parse_voevent,
)
from tocsin.alerts.vpshim import vp

STREAM = "tocsin.example/test"  # fictional authority
HEAD = (
    b"<?xml version='1.0' encoding='UTF-8'?>\n"
    b"<voe:VOEvent xmlns:voe='http://www.ivoa.net/xml/VOEvent/v2.0' "
    b"ivorn='ivo://tocsin.example/test#raw' role='test' version='2.0'>"
)
TAIL = b"</voe:VOEvent>"


def make_voevent(stream_id: str = "1", *, role: str = "test", note: str = "test packet") -> object:
    """A small valid VOEvent 2.0 (voevent-parse object) from a fictional author."""
    v = vp.Voevent(stream=STREAM, stream_id=stream_id, role=role)
    vp.set_who(v, date=dt.datetime(2026, 1, 2, 3, 4, 5, tzinfo=dt.UTC),
               author_ivorn="tocsin.example/team")
    vp.set_author(v, title="Tocsin test author")
    v.What.append(vp.Param("snr", 5.5, ucd="stat.snr"))
    vp.add_how(v, descriptions=note)
    return v


def make_packet(stream_id: str = "1", *, role: str = "test", note: str = "test packet") -> bytes:
    """Serialised :func:`make_voevent` (bytes, UTF-8, with declaration)."""
    out: bytes = vp.dumps(make_voevent(stream_id, role=role, note=note))
    return out


def rejected(data: bytes, **kw: object) -> PacketRejected:
    with pytest.raises(PacketRejected) as info:
        check_voevent(data, **kw)  # type: ignore[arg-type]
    assert info.value.reason in REJECT_REASONS
    return info.value


def peak_bytes(call: Callable[[], object]) -> int:
    """Peak Python memory allocated while ``call`` runs (tracemalloc)."""
    tracemalloc.start()
    try:
        call()
    except PacketRejected:
        pass
    finally:
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
    return peak


# ------------------------------------------------------------------ accepted


def test_valid_packet_is_accepted_with_its_ivorn_role_and_object() -> None:
    packet = make_packet("t-1")
    checked = check_voevent(packet)
    assert checked.ivorn == "ivo://tocsin.example/test#t-1"
    assert checked.role == "test"
    assert checked.raw is packet
    assert checked.voevent.attrib["ivorn"] == checked.ivorn
    assert vp.valid_as_v2_0(parse_voevent(packet))  # [XSD] the same check, by voevent-parse


def test_missing_role_reads_as_observation() -> None:
    # [VOE2 §3.1.2] role is optional with default "observation"
    data = HEAD.replace(b" role='test'", b"") + TAIL
    assert check_voevent(data).role == "observation"


def test_predefined_entities_and_character_references_still_work() -> None:
    # Only a DTD is refused; XML's own five entities and &#…; need none.
    packet = make_packet(note="a &lt; b &amp; c &#8805; d")
    assert check_voevent(packet).voevent.How.Description == "a &lt; b &amp; c &#8805; d"
    raw = HEAD + b"<Description>R&amp;D &#x2265; 1</Description>" + TAIL
    assert check_voevent(raw).voevent.Description == "R&D \u2265 1"


# ------------------------------------------------------------------ attacks


def test_billion_laughs_is_refused_as_doctype_without_expansion() -> None:
    lines = [b'<!ENTITY l0 "lol">']
    lines += [b"<!ENTITY l%d \"%s\">" % (i, b"&l%d;" % (i - 1) * 10) for i in range(1, 10)]
    data = (b"<?xml version='1.0'?>\n<!DOCTYPE voe:VOEvent [" + b"\n".join(lines) + b"]>\n"
            + HEAD.split(b"\n", 1)[1] + b"<Description>&l9;</Description>" + TAIL)
    assert len(data) < 2000  # 10**9 "lol"s (3 GB) if expanded
    err = rejected(data)
    assert err.reason == "doctype"  # [VTP2 §3.3] no DOCTYPE in a VTP message
    assert peak_bytes(lambda: check_voevent(data)) < 200_000  # nothing was expanded


def test_quadratic_blowup_is_refused_as_doctype() -> None:
    data = (b"<?xml version='1.0'?><!DOCTYPE r [<!ENTITY a \"" + b"x" * 50_000 + b"\">]>"
            + HEAD.split(b"\n", 1)[1] + b"<Description>" + b"&a;" * 20_000 + b"</Description>"
            + TAIL)
    assert rejected(data).reason == "doctype"
    assert peak_bytes(lambda: check_voevent(data)) < 1_000_000  # 1 GB if expanded


def test_external_file_entity_is_refused_and_not_read(tmp_path: Path) -> None:
    secret = tmp_path / "secret.txt"
    secret.write_text("tocsin-secret-4711")
    data = (f"<?xml version='1.0'?><!DOCTYPE r [<!ENTITY x SYSTEM \"file://{secret}\">]>"
            .encode() + HEAD.split(b"\n", 1)[1] + b"<Description>&x;</Description>" + TAIL)
    err = rejected(data)
    assert err.reason == "doctype"
    assert "tocsin-secret-4711" not in str(err)


def test_parameter_entity_is_refused(tmp_path: Path) -> None:
    dtd = tmp_path / "evil.dtd"
    dtd.write_text('<!ENTITY x "expanded">')
    data = (f"<!DOCTYPE r [<!ENTITY % p SYSTEM \"file://{dtd}\"> %p;]>".encode()
            + HEAD.split(b"\n", 1)[1] + b"<Description>&x;</Description>" + TAIL)
    assert rejected(data).reason == "doctype"


@pytest.fixture
def listener() -> Iterator[socket.socket]:
    """A loopback TCP listener that nothing should ever connect to."""
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    sock.listen(8)
    sock.setblocking(False)
    try:
        yield sock
    finally:
        sock.close()


def test_external_http_entity_is_refused_without_a_connection(listener: socket.socket) -> None:
    port = listener.getsockname()[1]
    data = (f"<?xml version='1.0'?><!DOCTYPE r [<!ENTITY x SYSTEM \"http://127.0.0.1:{port}/x\">]>"
            .encode() + HEAD.split(b"\n", 1)[1] + b"<Description>&x;</Description>" + TAIL)
    assert rejected(data).reason == "doctype"
    with pytest.raises(BlockingIOError):  # no connection is waiting to be accepted
        listener.accept()


def test_plain_doctype_is_refused_too() -> None:
    # [VTP2 §3.3] a message is a declaration, comments and one element: no DOCTYPE at all
    data = b"<?xml version='1.0'?><!DOCTYPE VOEvent>" + HEAD.split(b"\n", 1)[1] + TAIL
    err = rejected(data)
    assert err.reason == "doctype"
    assert "VOEvent" in err.detail


def test_fifty_megabyte_packet_is_refused_before_parsing() -> None:
    data = HEAD + b"<Description>" + b"x" * 50_000_000 + b"</Description>" + TAIL
    err = rejected(data)
    assert err.reason == "too_large"
    assert str(len(data)) in err.detail and "1000000" in err.detail
    # refused on its length alone: no copy, no parse (a parse would allocate > 50 MB)
    assert peak_bytes(lambda: check_voevent(data)) < 50_000


def test_size_cap_is_configurable() -> None:
    packet = make_packet()
    assert rejected(packet, limits=XmlLimits(max_bytes=len(packet) - 1)).reason == "too_large"
    assert check_voevent(packet, limits=XmlLimits(max_bytes=len(packet))).ivorn


def test_deep_nesting_is_refused_at_the_first_element_too_deep() -> None:
    depth = 100_000
    data = HEAD + b"<What>" + b"<a>" * depth + b"</a>" * depth + b"</What>" + TAIL
    err = rejected(data)
    assert err.reason == "too_deep"
    assert "depth 33" in err.detail and "cap is 32" in err.detail
    assert err.ivorn == "ivo://tocsin.example/test#raw"
    # expat's copy of the input (bounded by the size cap), no tree of 100 000 elements
    assert peak_bytes(lambda: check_voevent(data)) < 2 * len(data)


def test_nesting_up_to_the_cap_passes_the_scan() -> None:
    inner = 30  # root (1) + What (2) + 30 levels = 32
    data = HEAD + b"<What>" + b"<a>" * inner + b"</a>" * inner + b"</What>" + TAIL
    assert inspect_root(data).local_name == "VOEvent"
    assert rejected(data).reason == "schema_invalid"  # <a> is not VOEvent 2.0
    assert rejected(data, limits=XmlLimits(max_depth=31)).reason == "too_deep"


@pytest.mark.parametrize(
    ("data", "shown"),
    [
        (b"<html><body/></html>", "html"),
        (framing.ack("ivo://tocsin.example/test#1", dt.datetime(2026, 1, 1, tzinfo=dt.UTC)),
         "Transport"),
        # [VOE2 §3] the 2.0 namespace exactly; 1.1 packets and un-namespaced roots are not 2.0
        (HEAD.replace(b"VOEvent/v2.0", b"VOEvent/v1.1") + TAIL, "VOEvent/v1.1"),
        (b"<VOEvent ivorn='ivo://tocsin.example/test#1' version='2.0'/>", "VOEvent"),
    ],
)
def test_non_voevent_roots_are_refused(data: bytes, shown: str) -> None:
    err = rejected(data)
    assert err.reason == "not_voevent"
    assert shown in err.detail


@pytest.mark.parametrize(
    "data",
    [
        b"",
        b"hello, this is not XML",
        HEAD + b"<Who>",  # cut short
        HEAD + b"<Description>&undefined;</Description>" + TAIL,
        HEAD + TAIL + b"<voe:VOEvent/>",  # two roots [VTP2 §3.3] exactly one element
        b"<?xml version='1.0' encoding='ISO-8859-1'?>" + HEAD.split(b"\n", 1)[1] + TAIL,
        "<VOEvent/>".encode("utf-16"),  # [VTP2 §3.2] ASCII or UTF-8 only
    ],
)
def test_not_xml_is_refused(data: bytes) -> None:
    assert rejected(data).reason == "not_xml"


# ------------------------------------------------------------------ schema


def test_version_other_than_2_0_is_refused_and_names_the_value() -> None:
    # [VOE2 §3.1.3] version is fixed "2.0"
    data = make_packet("v").replace(b'version="2.0"', b'version="2.1"')
    err = rejected(data)
    assert err.reason == "schema_invalid"
    assert "'2.1'" in err.detail
    assert err.ivorn == "ivo://tocsin.example/test#v"


def _mutated(change: Callable[[object], None]) -> bytes:
    v = make_voevent("m")
    change(v)
    out: bytes = vp.dumps(v)
    return out


@pytest.mark.parametrize(
    "change",
    [
        # [VOE2 §3] at most one Who
        lambda v: etree.SubElement(v, "Who"),
        # [VOE2 §3.3.1] dataType is string, int or float only
        lambda v: etree.SubElement(v.What, "Param", name="x", value="1", dataType="double"),
        # [VOE2 §3.6.6] Inference probability in 0..1
        lambda v: etree.SubElement(etree.SubElement(v, "Why"), "Inference", probability="1.5"),
        # [VOE2 §3.1.1] ivorn is required
        lambda v: v.attrib.pop("ivorn"),
    ],
    ids=["two-Who", "dataType-double", "probability-1.5", "no-ivorn"],
)
def test_schema_invalid_packets_are_refused(change: Callable[[object], None]) -> None:
    data = _mutated(change)
    err = rejected(data)
    assert err.reason == "schema_invalid"
    assert not vp.valid_as_v2_0(vp.loads(data))  # [XSD] voevent-parse agrees


# ------------------------------------------------------------------ §8 key


def _element_sha1(data: bytes) -> str:
    start = data.index(b"<voe:VOEvent")
    end = data.rindex(TAIL) + len(TAIL)
    return hashlib.sha1(data[start:end]).hexdigest()


def test_dedup_key_is_sha1_of_the_voevent_element() -> None:
    # [VTP2 §8] bytes from the opening '<' to the closing '>' of <VOEvent>, compared by SHA-1
    packet = make_packet("k")
    assert dedup_key(packet) == _element_sha1(packet)
    assert check_voevent(packet).dedup_key == dedup_key(packet)


def test_dedup_key_ignores_what_is_outside_the_element() -> None:
    packet = make_packet("k")
    body = packet.split(b"?>", 1)[1].lstrip()
    variants = [
        body,
        b'<?xml version="1.0"?>\n<!-- relayed -->\n' + body + b"\n<!-- end --> \n",
        b"\xef\xbb\xbf" + packet,  # a UTF-8 byte order mark
        packet + b"<?trailer x?>",
    ]
    assert {dedup_key(v) for v in variants} == {dedup_key(packet)}


def test_dedup_key_sees_any_change_inside_the_element_including_whitespace() -> None:
    packet = make_packet("k")
    pretty: bytes = vp.dumps(vp.loads(packet), pretty_print=True)
    assert pretty != packet and dedup_key(pretty) != dedup_key(packet)
    spaced = packet.replace(b"<Who>", b"<Who> ", 1)
    assert dedup_key(spaced) != dedup_key(packet)
    assert dedup_key(spaced) == _element_sha1(spaced)


def test_dedup_key_of_a_self_closing_root_with_a_gt_in_an_attribute() -> None:
    element = (b"<voe:VOEvent xmlns:voe='" + VOEVENT_NS.encode()
               + b"' ivorn='ivo://tocsin.example/s#a>b' version='2.0'/>")
    data = b"<?xml version='1.0'?>" + element + b"<!-- after -->\n"
    assert dedup_key(data) == hashlib.sha1(element).hexdigest()


def test_limits_are_checked() -> None:
    with pytest.raises(ValueError, match="max_bytes 0"):
        XmlLimits(max_bytes=0)
    with pytest.raises(ValueError, match="max_depth 300"):
        XmlLimits(max_depth=300)
    with pytest.raises(TypeError, match="str"):
        check_voevent("<VOEvent/>")  # type: ignore[arg-type]
