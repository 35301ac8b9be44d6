"""VOEvent 2.0 packets for Tocsin alerts: build them, and read back what they say.

Built with voevent-parse, elements it cannot make on Python >= 3.10 (Citations,
How references) are appended with lxml directly (see ``../shared`` notes on
voevent-parse 1.0.3). Every packet is validated against the bundled VOEvent 2.0
schema before it leaves :func:`build_alert` / :func:`build_retraction`.

Parameter names are Tocsin's own. UCDs are words of the IVOA UCD1+ vocabulary
(chosen from memory of that list); a parameter gets none where no word fits.

Times: the event time is written twice — ``ISOTime`` in UTC with nine decimals
(no zone designator: the scale comes from the coordinate system id [VOE2 §3.4.1]),
and the exact GPS nanosecond count as the ``event_gps_ns`` parameter. For a fitted
plane front the time is the front's passage through the Earth's centre (system
``UTC-ICRS-GEO``); otherwise the first hit at its site (``UTC-ICRS-TOPO``).
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass
from typing import Any, Literal

import voeventparse as vp
from lxml import etree

from tocsin.gpstime import gps_ns_to_utc_iso
from tocsin.model.alert_config import AlertConfig
from tocsin.model.candidate import METHOD_VERSION, Candidate
from tocsin.types import GpsNs

AlertKind = Literal["new", "update", "retraction"]
Level = Literal["internal", "public"]

SYSTEM_GEO = "UTC-ICRS-GEO"
SYSTEM_TOPO = "UTC-ICRS-TOPO"
TEST_BANNER = "TEST ALERT - NOT A REAL EVENT. "

METHODS: dict[str, str] = {
    "front": (
        "Plane-front coincidence: hits at three or more distinct sites whose times fit one "
        "plane front moving at the speed of light (weighted least squares, each site's clock "
        "error as its weight). Chance probability from each site's occupancy of its "
        "geometry-aware window (Poisson-binomial over live-time-aware rolling rates), with a "
        "union bound over the site triples that define the front."
    ),
    "sites": (
        "Geometry-aware coincidence: distinct sites firing within windows bounded by the light "
        "travel time between sites plus 3 sigma of their combined clock error, at several "
        "window scales. Chance probability from each site's occupancy (Poisson-binomial over "
        "live-time-aware rolling rates)."
    ),
    "network": (
        "Network-summed rate excess: hits of all live sites in a window against the rolling "
        "expectation from live time; significance by an on/off test that carries the "
        "uncertainty of the background estimate (Li and Ma 1983 eq. 17; exact conditional "
        "binomial tail)."
    ),
    "site": (
        "Single-site rate excess: one site's hits in a window against its rolling "
        "expectation from live time; on/off test carrying the background uncertainty "
        "(Li and Ma 1983 eq. 17; exact conditional binomial tail)."
    ),
}
FAR_TEXT = (
    "False alarm rate = chance probability x rate of independent trials (every window scale "
    "and sliding position searched), per Julian year."
)


@dataclass(frozen=True, slots=True)
class AlertMeta:
    """What a packet is, apart from the candidate it reports."""

    ivorn: str
    kind: AlertKind
    level: Level
    created: dt.datetime
    cites: str | None = None
    """IVORN cited (update: ``supersedes``; retraction: ``retraction``)."""
    note: str = ""
    """Why an update or retraction was issued."""
    skymap_uri: str | None = None


def local_id(cand_id: str, kind: AlertKind, n: int = 0) -> str:
    """The part after ``#``: the family's first candidate id; ``-u<n>`` for the family's
    n-th update; ``-x`` for its retraction."""
    if kind == "new":
        return cand_id
    if kind == "update":
        return f"{cand_id}-u{n}"
    return f"{cand_id}-x"


def event_time(cand: Candidate) -> tuple[GpsNs, float | None, str]:
    """(GPS ns, 1-sigma error in s or None, coordinate system id) of a candidate's event time."""
    t0 = cand.details.get("front_t0_gps_ns")
    if isinstance(t0, int):
        sig = cand.details.get("front_t0_sigma_ns")
        err = float(sig) * 1e-9 if isinstance(sig, (int, float)) else None
        return GpsNs(t0), err, SYSTEM_GEO
    return cand.time_gps_ns, None, SYSTEM_TOPO


def build_alert(cand: Candidate, meta: AlertMeta, cfg: AlertConfig) -> bytes:
    """A validated VOEvent 2.0 packet (UTF-8 bytes) for a new alert or an update."""
    if meta.kind == "retraction":
        raise ValueError(f"build_alert cannot make a {meta.kind!r}; use build_retraction")
    v = _skeleton(meta, cfg)
    _what(v, cand, meta)
    _where_when(v, cand)
    stat = cand.statistic
    how = etree.SubElement(v, "How")
    _el(
        how, "Description", f"{METHODS.get(stat, stat)} {FAR_TEXT} Method version {METHOD_VERSION}."
    )
    why = etree.SubElement(v, "Why", importance=_importance(cand.far_per_year))
    _el(why, "Name", f"Tocsin {cand.trigger} candidate ({stat})")
    _el(
        why,
        "Description",
        f"Significance {_sig_text(cand)} (one-sided Gaussian equivalent of p = "
        f"{cand.p_value:.3g}); false alarm rate {cand.far_per_year:.3g} per year.",
    )
    if meta.cites is not None:
        _citations(v, meta.cites, "supersedes", meta.note or "Candidate revised.")
    if meta.skymap_uri is not None:
        etree.SubElement(
            v,
            "Reference",
            uri=meta.skymap_uri,
            meaning="HEALPix probability map (NUNIQ multi-order FITS) of the arrival direction",
            mimetype="application/fits",
        )
    v.Description = _summary(cand, meta, cfg)
    return _finish(v)


def build_retraction(
    original_ivorn: str, candidate_id: str, meta: AlertMeta, cfg: AlertConfig
) -> bytes:
    """A validated packet that withdraws ``original_ivorn`` completely [VOE2 §3.7.1.1]."""
    if meta.kind != "retraction":
        raise ValueError(f"build_retraction needs kind 'retraction', not {meta.kind!r}")
    if not meta.note.strip():
        raise ValueError("a retraction needs a reason (meta.note is empty)")
    v = _skeleton(meta, cfg)
    v.What.append(vp.Param("candidate_id", candidate_id, ucd="meta.id"))
    v.What.append(vp.Param("alert_kind", "retraction", ucd="meta.code"))
    v.What.append(vp.Param("retraction_reason", meta.note[:2000]))
    _citations(v, original_ivorn, "retraction", meta.note[:2000])
    prefix = TEST_BANNER if cfg.role == "test" else ""
    v.Description = f"{prefix}RETRACTION of {original_ivorn}: {meta.note[:2000]}"
    return _finish(v)


# -- reading back --------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class ParsedAlert:
    """What a receiver learns from one of our packets."""

    ivorn: str
    role: str
    params: dict[str, str]
    time_utc: dt.datetime | None
    event_gps_ns: GpsNs | None
    ra_deg: float | None
    dec_deg: float | None
    err_deg: float | None
    citations: list[tuple[str, str]]


def read_alert(xml: bytes) -> ParsedAlert:
    """Parse a packet with voevent-parse (trusted input: our own archive or tests)."""
    v = vp.loads(xml)
    params = {k: str(a.get("value", "")) for k, a in vp.get_toplevel_params(v).items()}
    time_utc = vp.get_event_time_as_utc(v)
    ra = dec = err = None
    try:
        pos = vp.get_event_position(v)
    except (AttributeError, TypeError):
        pos = None
    if pos is not None:
        ra, dec, err = float(pos.ra), float(pos.dec), float(pos.err)
    cites: list[tuple[str, str]] = []
    if v.find("Citations") is not None:
        for e in v.Citations.iterchildren("EventIVORN"):
            cites.append((str(e.text), str(e.attrib.get("cite", ""))))
    gps = params.get("event_gps_ns")
    return ParsedAlert(
        ivorn=str(v.attrib["ivorn"]),
        role=str(v.attrib.get("role", "observation")),
        params=params,
        time_utc=time_utc,
        event_gps_ns=GpsNs(int(gps)) if gps is not None else None,
        ra_deg=ra,
        dec_deg=dec,
        err_deg=err,
        citations=cites,
    )


# -- pieces --------------------------------------------------------------------


def _skeleton(meta: AlertMeta, cfg: AlertConfig) -> Any:
    prefix = cfg.stream_ivorn + "#"
    if not meta.ivorn.startswith(prefix):
        raise ValueError(f"ivorn {meta.ivorn!r} is not in this stream ({prefix}...)")
    v = vp.Voevent(
        stream=f"{cfg.authority}/{cfg.stream}",
        stream_id=meta.ivorn[len(prefix) :],
        role=cfg.role,
    )
    # set_who writes "ivo://" itself and drops sub-second digits of the date
    vp.set_who(v, date=meta.created.astimezone(dt.UTC), author_ivorn=cfg.authority)
    v.Who.Description = f"Written by Tocsin ({METHOD_VERSION})."
    author: dict[str, str] = {"title": cfg.author_title, "shortName": "Tocsin"}
    if cfg.contact_email:
        author["contactEmail"] = cfg.contact_email
    vp.set_author(v, **author)
    return v


def _p(
    name: str,
    value: str,
    *,
    dtype: str = "string",
    unit: str | None = None,
    ucd: str | None = None,
    desc: str | None = None,
) -> Any:
    p = vp.Param(name, value, unit=unit, ucd=ucd, dataType=None if dtype == "string" else dtype)
    if desc is not None:
        p.Description = desc
    return p


def _f(x: float) -> str:
    return repr(float(x)) if math.isfinite(x) else ("inf" if x > 0 else "-inf" if x < 0 else "nan")


def _what(v: Any, cand: Candidate, meta: AlertMeta) -> None:
    t_ns, t_err, _ = event_time(cand)
    w = v.What
    w.append(_p("alert_kind", meta.kind, ucd="meta.code", desc="new, update or retraction"))
    w.append(
        _p(
            "alert_level",
            meta.level,
            ucd="meta.code",
            desc="internal (our own sinks) or public (external subscribers)",
        )
    )
    w.append(_p("candidate_id", cand.id, ucd="meta.id"))
    w.append(_p("candidate_revision", str(cand.revision), dtype="int", ucd="meta.version"))
    w.append(_p("trigger_kind", f"{cand.trigger}/{cand.statistic}", ucd="meta.code.class"))
    w.append(
        _p(
            "sites",
            ",".join(cand.sites),
            ucd="meta.id",
            desc="distinct sites in the candidate, comma-separated",
        )
    )
    w.append(
        _p(
            "multiplicity",
            str(int(cand.multiplicity or len(cand.sites))),
            dtype="int",
            ucd="meta.number",
            desc="number of distinct sites",
        )
    )
    if cand.observed is not None:
        w.append(
            _p(
                "observed_hits",
                _f(cand.observed),
                dtype="float",
                unit="ct",
                ucd="meta.number",
                desc="hits counted in the window",
            )
        )
    if cand.expected is not None:
        w.append(
            _p(
                "expected_hits",
                _f(cand.expected),
                dtype="float",
                unit="ct",
                ucd="stat.mean",
                desc="background expectation in the window",
            )
        )
    w.append(
        _p(
            "p_value",
            _f(cand.p_value),
            dtype="float",
            ucd="stat.probability",
            desc="chance probability of one trial",
        )
    )
    w.append(
        _p(
            "false_alarm_rate",
            _f(cand.far_per_year),
            dtype="float",
            unit="yr-1",
            ucd="arith.rate",
            desc=FAR_TEXT,
        )
    )
    sig = cand.significance_sigma
    w.append(
        _p(
            "significance",
            _f(sig),
            dtype="float",
            desc="one-sided Gaussian equivalent of p_value, in standard deviations",
        )
    )
    w.append(
        _p(
            "window",
            _f(cand.window_s),
            dtype="float",
            unit="s",
            ucd="time.interval",
            desc="coincidence or excess window scale",
        )
    )
    w.append(
        _p(
            "event_gps_ns",
            str(int(t_ns)),
            dtype="int",
            unit="ns",
            ucd="time.epoch",
            desc="event time as nanoseconds since the GPS epoch 1980-01-06T00:00:00 UTC",
        )
    )
    if t_err is not None:
        w.append(
            _p(
                "event_time_error",
                _f(t_err),
                dtype="float",
                unit="s",
                ucd="stat.error;time.epoch",
                desc="1-sigma error of the event time",
            )
        )
    w.append(
        _p(
            "first_hit_gps_ns",
            str(int(cand.time_gps_ns)),
            dtype="int",
            unit="ns",
            ucd="time.start",
            desc="earliest hit of the candidate, GPS nanoseconds",
        )
    )
    ell = error_ellipse_of(cand)
    if ell is not None:
        for name, value, ucd, desc in (
            ("err_ellipse_major", ell[0], "pos.errorEllipse", "1-sigma semi-major axis"),
            ("err_ellipse_minor", ell[1], "pos.errorEllipse", "1-sigma semi-minor axis"),
            (
                "err_ellipse_pa",
                ell[2],
                "pos.posAng",
                "position angle of the major axis, north through east (ICRS)",
            ),
        ):
            w.append(_p(name, _f(value), dtype="float", unit="deg", ucd=ucd, desc=desc))
    w.append(_p("method_version", METHOD_VERSION, ucd="meta.version"))


def error_ellipse_of(cand: Candidate) -> tuple[float, float, float] | None:
    """(semi-major, semi-minor, position angle) in degrees of a candidate's fitted
    direction, when it has one (``details['err_ellipse_deg']``), else None."""
    raw = cand.details.get("err_ellipse_deg")
    if cand.ra_deg is None or not isinstance(raw, list | tuple) or len(raw) != 3:
        return None
    a, b, pa = (float(x) for x in raw)
    return (a, b, pa) if all(math.isfinite(x) for x in (a, b, pa)) and 0 < b <= a else None


def _where_when(v: Any, cand: Candidate) -> None:
    t_ns, t_err, system = event_time(cand)
    pos = None
    if cand.ra_deg is not None and cand.dec_deg is not None and cand.err_deg is not None:
        pos = (cand.ra_deg, cand.dec_deg, cand.err_deg)
    add_where_when(v, t_ns, system, t_err_s=t_err, position=pos)


def add_where_when(
    v: Any,
    t_ns: GpsNs,
    system: str,
    *,
    t_err_s: float | None = None,
    position: tuple[float, float, float] | None = None,
) -> None:
    """WhereWhen: the time (UTC, nine decimals, error in s) and an optional
    (RA deg, Dec deg, 1-sigma error radius deg) in coordinate system ``system``."""
    odl = etree.SubElement(v.WhereWhen, "ObsDataLocation")
    etree.SubElement(odl, "ObservatoryLocation", id="GEOSURFACE")
    obs = etree.SubElement(odl, "ObservationLocation")
    etree.SubElement(obs, "AstroCoordSystem", id=system)
    coords = etree.SubElement(obs, "AstroCoords", coord_system_id=system)
    time_el = etree.SubElement(coords, "Time", unit="s")
    inst = etree.SubElement(time_el, "TimeInstant")
    _el(inst, "ISOTime", gps_ns_to_utc_iso(t_ns).rstrip("Z"))
    if t_err_s is not None:
        _el(time_el, "Error", _f(t_err_s))
    if position is not None:
        ra, dec, err = position
        pos = etree.SubElement(coords, "Position2D", unit="deg")
        _el(pos, "Name1", "RA")
        _el(pos, "Name2", "Dec")
        val = etree.SubElement(pos, "Value2")
        _el(val, "C1", _f(ra))
        _el(val, "C2", _f(dec))
        _el(pos, "Error2Radius", _f(err))


def _citations(v: Any, ivorn: str, cite: str, why: str) -> None:
    c = etree.SubElement(v, "Citations")
    _el(c, "EventIVORN", ivorn, cite=cite)
    _el(c, "Description", why)


def _el(parent: Any, tag: str, text: str | None = None, **attrib: str) -> Any:
    """Append a child; objectify elements need ``_setText`` instead of ``.text =``."""
    e = etree.SubElement(parent, tag, **attrib)
    if text is not None:
        e._setText(text)
    return e


def _importance(far_per_year: float) -> str:
    """0..1, rising by 0.1 per decade of FAR below 1000/yr (our own scale)."""
    if not far_per_year > 0:
        return "1.0"
    x = (3.0 - math.log10(far_per_year)) / 10.0
    return f"{min(max(x, 0.0), 1.0):.2f}"


def _sig_text(cand: Candidate) -> str:
    s = cand.significance_sigma
    return f"{s:.2f} sigma" if math.isfinite(s) else f"{s} sigma"


def _summary(cand: Candidate, meta: AlertMeta, cfg: AlertConfig) -> str:
    prefix = TEST_BANNER if cfg.role == "test" else ""
    what = {
        "front": f"{len(cand.sites)} sites consistent with one plane front",
        "sites": f"{len(cand.sites)} distinct sites within a {cand.window_s:g} s window",
        "network": f"network-wide rate excess over {cand.window_s:g} s",
        "site": f"rate excess at {','.join(cand.sites)} over {cand.window_s:g} s",
    }.get(cand.statistic, cand.statistic)
    direction = ""
    if cand.ra_deg is not None and cand.dec_deg is not None and cand.err_deg is not None:
        direction = (
            f" Fitted arrival direction RA {cand.ra_deg:.4f} deg, Dec {cand.dec_deg:.4f} deg "
            f"(ICRS), 1-sigma error radius {cand.err_deg:.2g} deg"
        )
        ell = error_ellipse_of(cand)
        direction += (
            "."
            if ell is None
            else (
                f" (the radius of the circle of the same area as the 1-sigma error ellipse, "
                f"{ell[0]:.2g} x {ell[1]:.2g} deg at position angle {ell[2]:.0f} deg: use the "
                "ellipse, or the map, which follows it)."
            )
        )
    upd = f" Update superseding {meta.cites}: {meta.note}" if meta.kind == "update" else ""
    return (
        f"{prefix}Tocsin {cand.trigger} candidate: {what} at {gps_ns_to_utc_iso(cand.time_gps_ns)}."
        f" False alarm rate {cand.far_per_year:.3g} per year after trials"
        f" (p = {cand.p_value:.3g}, {_sig_text(cand)}), alert level {meta.level}.{direction}"
        f" Method: {METHODS.get(cand.statistic, cand.statistic)} {FAR_TEXT}{upd}"
    )


def _finish(v: Any) -> bytes:
    vp.assert_valid_as_v2_0(v)
    out = vp.dumps(v)
    assert isinstance(out, bytes)
    return out
