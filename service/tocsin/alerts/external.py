"""Other facilities' VOEvent packets: check them safely and read what a follow-up needs.

Every packet goes through :func:`tocsin.alerts.safexml.check_voevent` (size cap,
no DOCTYPE, so no entity of any kind, depth cap, root, version, XSD) and then
:func:`read_external` takes out the IVORN, role, author, event time (GPS ns, from
the ``ISOTime`` in the scale named by the coordinate system id [VOE2 §3.4.1]),
sky position, messenger and citations. A packet we cannot use is refused with a
:class:`~tocsin.alerts.safexml.PacketRejected` or an :class:`ExternalRejected`,
each with a short reason (a metrics label) and a detail naming the value.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any, Final

from astropy import units as u
from astropy.coordinates import EarthLocation, SkyCoord
from astropy.time import Time

from tocsin.alerts.safexml import CheckedVOEvent, XmlLimits, check_voevent
from tocsin.errors import TocsinError
from tocsin.gpstime import time_to_gps_ns, utc_to_gps_ns
from tocsin.types import GpsNs

_MESSENGER_WORDS: Final = (
    ("gw", ("gravitational", "/gw", "gw#", "strain")),
    ("neutrino", ("neutrino", "/nu", "nu#")),
    ("gamma", ("gamma", "grb", "x-ray", "xray")),
)


class ExternalRejected(TocsinError):
    """An outside packet that passed the XML checks but cannot be followed up."""

    def __init__(self, reason: str, detail: str, *, ivorn: str | None = None) -> None:
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail
        self.ivorn = ivorn


@dataclass(frozen=True, slots=True)
class ExternalEvent:
    """What a follow-up needs from one outside packet (times GPS ns, angles deg)."""

    ivorn: str
    role: str
    author: str
    """AuthorIVORN, or the packet's own IVORN up to the ``#`` when it names none."""
    dedup_key: str
    time_gps_ns: GpsNs | None
    time_error_s: float | None
    ra_deg: float | None
    dec_deg: float | None
    err_deg: float | None
    messenger: str | None
    citations: tuple[tuple[str, str], ...]
    """(IVORN, cite) pairs: ``followup``, ``supersedes`` or ``retraction``."""
    description: str
    raw: bytes


def parse_external(data: bytes, *, limits: XmlLimits) -> ExternalEvent:
    """Check an untrusted packet and read it; raises ``PacketRejected`` / ``ExternalRejected``."""
    return read_external(check_voevent(data, limits=limits))


def read_external(chk: CheckedVOEvent) -> ExternalEvent:
    """Read the fields of an already checked packet (see the module docstring)."""
    v = chk.voevent
    author = _text(v, "./Who/AuthorIVORN")
    if author and not author.startswith("ivo://"):
        author = "ivo://" + author
    cites = tuple(
        (str(e.text or "").strip(), str(e.get("cite", "")))
        for e in v.xpath("./Citations/EventIVORN")
    )
    ra, dec, err = _position(v)
    t_ns, t_err = _event_time(v, chk.ivorn, ra, dec)
    desc = " ".join(
        _text(v, p) or "" for p in ("./Description", "./How/Description", "./Why/Description")
    )
    return ExternalEvent(
        ivorn=chk.ivorn,
        role=chk.role,
        author=author or chk.ivorn.split("#", 1)[0],
        dedup_key=chk.dedup_key,
        time_gps_ns=t_ns,
        time_error_s=t_err,
        ra_deg=ra,
        dec_deg=dec,
        err_deg=err,
        messenger=_messenger(v, chk.ivorn, desc),
        citations=cites,
        description=desc.strip()[:500],
        raw=chk.raw,
    )


def _text(v: Any, path: str) -> str | None:
    found = v.xpath(path)
    if not found:
        return None
    t = found[0].text
    return None if t is None else str(t).strip()


def _event_time(
    v: Any, ivorn: str, ra_deg: float | None, dec_deg: float | None
) -> tuple[GpsNs | None, float | None]:
    """Event time at the Earth's centre (GPS ns) and its error (s), from the first
    ``AstroCoords``. The scale is the first part of the coordinate system id; a
    barycentric time (``TDB-*-BARY``) is moved to the geocentre along the packet's
    own direction (up to ~500 s), and refused without one. A topocentric time is
    taken as geocentric (at most ~21 ms off, far inside any follow-up window)."""
    coords = v.xpath("./WhereWhen/ObsDataLocation/ObservationLocation/AstroCoords")
    if not coords:
        return None, None
    c = coords[0]
    system = str(c.get("coord_system_id", ""))
    iso = _text(c, "./Time/TimeInstant/ISOTime")
    if iso is None:
        return None, None
    scale = system.split("-", 1)[0].upper()
    s = iso[:-1] if iso.endswith("Z") else iso
    try:
        if scale == "UTC":
            t_ns = utc_to_gps_ns(s)
        elif scale == "TT":
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                t_ns = time_to_gps_ns(Time(s, format="isot", scale="tt"))
        elif scale == "TDB":  # the schema lists TDB only as TDB-ICRS-BARY / TDB-FK5-BARY
            if ra_deg is None or dec_deg is None:
                raise ExternalRejected(
                    "bad_time",
                    f"barycentric time ({system!r}) without a sky position cannot be "
                    "brought to the Earth",
                    ivorn=ivorn,
                )
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                t_geo = barycentric_to_geocentric(
                    Time(s, format="isot", scale="tdb"), ra_deg, dec_deg
                )
            t_ns = time_to_gps_ns(t_geo)
        elif scale == "GPS":
            # GPS = TAI - 19 s (VOEVENT.md §5, checked there with astropy)
            t_ns = time_to_gps_ns(Time(s, format="isot", scale="tai") + 19 * u.s)
        else:
            raise ExternalRejected(
                "bad_time", f"time scale of coord_system_id {system!r} unknown", ivorn=ivorn
            )
    except ValueError as exc:
        raise ExternalRejected("bad_time", f"ISOTime {iso[:60]!r}: {exc}", ivorn=ivorn) from exc
    err_txt = _text(c, "./Time/Error")
    err = None
    if err_txt is not None and str(c.Time.get("unit", "s")) == "s":
        try:
            err = float(err_txt)
        except ValueError:
            err = None
    return t_ns, err


GEOCENTRE = EarthLocation.from_geocentric(0.0, 0.0, 0.0, unit=u.m)


def barycentric_to_geocentric(t_bary: Time, ra_deg: float, dec_deg: float) -> Time:
    """Arrival time at the Earth's centre of a plane wave from ICRS (``ra_deg``,
    ``dec_deg``) that reaches the solar-system barycentre at ``t_bary`` (TDB).

    Inverts astropy's ``Time.light_travel_time(kind="barycentric")`` (geocentre to
    barycentre, |ltt| <= ~500 s) by fixed-point iteration: the delay changes by
    ~1e-4 s per s, so three steps leave well under a nanosecond."""
    src = SkyCoord(ra_deg * u.deg, dec_deg * u.deg, frame="icrs")
    t = Time(t_bary, location=GEOCENTRE)
    for _ in range(3):
        t = t_bary - t.light_travel_time(src, kind="barycentric")
        t = Time(t, location=GEOCENTRE)
    return t


def _position(v: Any) -> tuple[float | None, float | None, float | None]:
    pos = v.xpath("./WhereWhen/ObsDataLocation/ObservationLocation/AstroCoords/Position2D")
    if not pos or str(pos[0].get("unit", "deg")) != "deg":
        return None, None, None
    p = pos[0]
    try:
        ra = float(_text(p, "./Value2/C1") or "nan")
        dec = float(_text(p, "./Value2/C2") or "nan")
        err = float(_text(p, "./Error2Radius") or "nan")
    except ValueError:
        return None, None, None
    if not (0.0 <= ra <= 360.0 and -90.0 <= dec <= 90.0):
        return None, None, None
    return ra % 360.0, dec, err if err == err else None


def _messenger(v: Any, ivorn: str, desc: str) -> str | None:
    for p in v.xpath("./What/Param"):
        if str(p.get("name", "")).lower() == "messenger":
            val = str(p.get("value", "")).lower()
            for name, words in _MESSENGER_WORDS:
                if val == name or any(w in val for w in words):
                    return name
    text = (ivorn + " " + desc).lower()
    for name, words in _MESSENGER_WORDS:
        if any(w in text for w in words):
            return name
    return None
