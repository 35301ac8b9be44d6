"""Outside VOEvent packets from a fictional facility (``ivo://far-observatory.example``),
and hostile ones, for the follow-up tests."""

from __future__ import annotations

import datetime as dt

from lxml import etree

from tocsin.alerts.vpshim import vp
from tocsin.gpstime import gps_ns_to_utc_iso

AUTHORITY = "far-observatory.example"
AUTHOR_IVORN = f"ivo://{AUTHORITY}"


def external_packet(
    local_id: str,
    t_gps_ns: int | None,
    *,
    stream: str = "gw",
    role: str = "observation",
    ra_dec_err: tuple[float, float, float] | None = None,
    cite: tuple[str, str] | None = None,
    messenger: str | None = "gw",
    author: str = AUTHORITY,
) -> bytes:
    """A valid VOEvent 2.0 packet ``ivo://far-observatory.example/<stream>#<local_id>``."""
    v = vp.Voevent(stream=f"{AUTHORITY}/{stream}", stream_id=local_id, role=role)
    vp.set_who(v, date=dt.datetime(2026, 3, 14, tzinfo=dt.UTC), author_ivorn=author)
    if messenger is not None:
        v.What.append(vp.Param("messenger", messenger))
    if t_gps_ns is not None:
        ww = v.WhereWhen
        odl = etree.SubElement(ww, "ObsDataLocation")
        etree.SubElement(odl, "ObservatoryLocation", id="GEOSURFACE")
        obs = etree.SubElement(odl, "ObservationLocation")
        etree.SubElement(obs, "AstroCoordSystem", id="UTC-ICRS-GEO")
        coords = etree.SubElement(obs, "AstroCoords", coord_system_id="UTC-ICRS-GEO")
        tel = etree.SubElement(coords, "Time", unit="s")
        inst = etree.SubElement(tel, "TimeInstant")
        iso = etree.SubElement(inst, "ISOTime")
        iso._setText(gps_ns_to_utc_iso(t_gps_ns).rstrip("Z"))
        if ra_dec_err is not None:
            pos = etree.SubElement(coords, "Position2D", unit="deg")
            for tag, val in (("Name1", "RA"), ("Name2", "Dec")):
                etree.SubElement(pos, tag)._setText(val)
            v2 = etree.SubElement(pos, "Value2")
            etree.SubElement(v2, "C1")._setText(repr(ra_dec_err[0]))
            etree.SubElement(v2, "C2")._setText(repr(ra_dec_err[1]))
            etree.SubElement(pos, "Error2Radius")._setText(repr(ra_dec_err[2]))
    if cite is not None:
        c = etree.SubElement(v, "Citations")
        etree.SubElement(c, "EventIVORN", cite=cite[1])._setText(cite[0])
        etree.SubElement(c, "Description")._setText("update")
    vp.assert_valid_as_v2_0(v)
    out = vp.dumps(v)
    assert isinstance(out, bytes)
    return out


def ivorn(local_id: str, stream: str = "gw") -> str:
    return f"ivo://{AUTHORITY}/{stream}#{local_id}"


BILLION_LAUGHS = (
    b'<?xml version="1.0"?>\n<!DOCTYPE lolz [\n<!ENTITY lol "lol">\n'
    + b"".join(
        b'<!ENTITY lol%d "%s">\n' % (k, (b"&lol%d;" % (k - 1) if k > 1 else b"&lol;") * 10)
        for k in range(1, 10)
    )
    + b']>\n<voe:VOEvent xmlns:voe="http://www.ivoa.net/xml/VOEvent/v2.0" ivorn="ivo://x.example/a#1"'
    b' role="observation" version="2.0"><Description>&lol9;</Description></voe:VOEvent>\n'
)

EXTERNAL_ENTITY = (
    b'<?xml version="1.0"?>\n<!DOCTYPE r [<!ENTITY x SYSTEM "file:///etc/hostname">]>\n'
    b'<voe:VOEvent xmlns:voe="http://www.ivoa.net/xml/VOEvent/v2.0" ivorn="ivo://x.example/a#2"'
    b' role="observation" version="2.0"><Description>&x;</Description></voe:VOEvent>\n'
)


def huge_packet(n_bytes: int = 50 * 1024 * 1024) -> bytes:
    """A well-formed VOEvent of ``n_bytes`` (a long Description)."""
    head = (
        b'<?xml version="1.0"?>\n<voe:VOEvent xmlns:voe="http://www.ivoa.net/xml/VOEvent/v2.0"'
        b' ivorn="ivo://x.example/a#3" role="observation" version="2.0"><Description>'
    )
    tail = b"</Description></voe:VOEvent>\n"
    return head + b"a" * (n_bytes - len(head) - len(tail)) + tail
