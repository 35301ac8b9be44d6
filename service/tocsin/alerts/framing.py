"""VTP 2.0 on the wire: length-prefixed frames and Transport messages.

Pure and synchronous: no sockets, no clock (callers pass the time in).

* A **frame** is a 4-byte network-order (big-endian) unsigned count followed by
  that many payload bytes [VTP2 §3.2]. The spec sets no maximum; we refuse any
  frame above a cap (default 1 MB) as soon as its count is read, before reading
  its payload.
* A **Transport message** is ``iamalive``, ``ack``, ``nak`` (or ``authenticate``,
  which VTP 2.0 defines no use for [VTP2 §9.2]) with ``Origin``, optional
  ``Response``, ``TimeStamp`` and optional ``Meta`` (``Param``\\ s and a
  ``Result``) [VTP2 §6, App. A]. We emit the namespace, prefix and attributes of
  the spec's samples; on receipt the root is matched on its local name only,
  because the samples' namespace is not the schema's (VOEVENT.md §3).

Every error is a :class:`~tocsin.alerts.safexml.PacketRejected` (or a
``ValueError`` for bad arguments of our own) naming the offending value.
"""

from __future__ import annotations

import datetime as dt
import re
import struct
from dataclasses import dataclass
from typing import Any, Final, Literal, cast, get_args

from lxml import etree

from tocsin.alerts import safexml
from tocsin.alerts.safexml import DEFAULT_LIMITS, PacketRejected, XmlLimits

FRAME_HEADER: Final = struct.Struct("!I")
"""[VTP2 §3.2] 4-byte network-order (big-endian) count of the payload bytes."""

MAX_FRAME_LIMIT: Final = 2**32 - 1
"""The largest payload a 32-bit count can announce."""

TransportRole = Literal["iamalive", "ack", "nak", "authenticate"]
"""[VTP2 §6; App. A] the values of ``Transport@role``."""

TRANSPORT_ROLES: Final[tuple[str, ...]] = get_args(TransportRole)

TRANSPORT_NS: Final = "http://telescope-networks.org/schema/Transport/v1.1"
"""Namespace bound to the ``trn`` prefix in the spec's samples (VOEVENT.md §3)."""

XSI_NS: Final = "http://www.w3.org/2001/XMLSchema-instance"

TRANSPORT_SCHEMA_LOCATION: Final = (
    "http://ivoa.net/xml/Transport/v1.1 http://ivoa.net/xml/Transport/v1.1/Transport-v1.1.xsd"
)
"""``xsi:schemaLocation`` we emit. The first token is the samples' (VOEVENT.md §3);
the document URL after it is from memory. Receivers ignore it."""

TRANSPORT_VERSION: Final = "1.0"
"""``Transport@version`` in the spec's samples (VOEVENT.md §3)."""

MAX_RESULT_CHARS: Final = 1000
"""A ``Result`` text we emit is cut to this many characters (our choice)."""

# xs:dateTime without the year sign and year > 9999 forms, which never occur here.
_DATETIME = re.compile(r"(\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2})(\.\d+)?(Z|[+-]\d{2}:\d{2})?")
# Characters XML 1.0 cannot carry (§2.2 Char production).
_NOT_XML_CHAR = re.compile("[^\x09\x0a\x0d\x20-\ud7ff\ue000-\ufffd\U00010000-\U0010ffff]")


# ----------------------------------------------------------------------- frames


def encode_frame(payload: bytes, *, max_bytes: int = DEFAULT_LIMITS.max_bytes) -> bytes:
    """``payload`` preceded by its 4-byte big-endian length [VTP2 §3.2]."""
    if len(payload) > min(max_bytes, MAX_FRAME_LIMIT):
        raise PacketRejected(
            "too_large", f"payload of {len(payload)} bytes; the frame cap is {max_bytes}"
        )
    return FRAME_HEADER.pack(len(payload)) + payload


def frame_length(header: bytes, *, max_bytes: int = DEFAULT_LIMITS.max_bytes) -> int:
    """The payload length a 4-byte header announces, refused above ``max_bytes``."""
    if len(header) != FRAME_HEADER.size:
        raise ValueError(f"a frame header is {FRAME_HEADER.size} bytes, got {len(header)}")
    (length,) = FRAME_HEADER.unpack(header)
    if length > max_bytes:
        raise PacketRejected("too_large", f"frame announces {length} bytes; the cap is {max_bytes}")
    return int(length)


# ----------------------------------------------------------- Transport messages


@dataclass(frozen=True, slots=True)
class TransportMessage:
    """One Transport message [VTP2 §6].

    ``origin``: for ``iamalive`` the broker's IVOID, for ``ack``/``nak`` the IVORN
    of the VOEvent answered [VTP2 §6.1, §6.3]. ``timestamp``: timezone-aware (UTC
    on the wire). ``meta``: ``(name, value)`` of each ``Meta/Param``; ``result``:
    ``Meta/Result`` text (a human-readable reason with a ``nak``).
    """

    role: TransportRole
    origin: str
    timestamp: dt.datetime
    response: str | None = None
    meta: tuple[tuple[str, str], ...] = ()
    result: str | None = None
    version: str = TRANSPORT_VERSION

    def __post_init__(self) -> None:
        if self.role not in TRANSPORT_ROLES:
            raise ValueError(f"Transport role {self.role!r} is not one of {TRANSPORT_ROLES}")
        if self.timestamp.tzinfo is None or self.timestamp.utcoffset() is None:
            raise ValueError(f"Transport timestamp {self.timestamp!r} must be timezone-aware")


def build_transport(msg: TransportMessage) -> bytes:
    """Serialise ``msg`` as the spec's samples do (``trn:`` prefix, UTF-8, declaration)."""
    root = etree.Element(f"{{{TRANSPORT_NS}}}Transport", nsmap={"trn": TRANSPORT_NS, "xsi": XSI_NS})
    root.set("role", msg.role)
    root.set("version", msg.version)
    root.set(f"{{{XSI_NS}}}schemaLocation", TRANSPORT_SCHEMA_LOCATION)
    _text(root, "Origin", msg.origin)
    if msg.response is not None:
        _text(root, "Response", msg.response)
    _text(root, "TimeStamp", format_timestamp(msg.timestamp))
    if msg.meta or msg.result is not None:
        meta = etree.SubElement(root, "Meta")
        for name, value in msg.meta:
            param = etree.SubElement(meta, "Param")
            param.set("name", _xml_text("Param@name", name))
            param.set("value", _xml_text("Param@value", value))
        if msg.result is not None:
            _text(meta, "Result", msg.result[:MAX_RESULT_CHARS])
    out: bytes = etree.tostring(root, xml_declaration=True, encoding="UTF-8")
    return out


def iamalive(origin: str, now: dt.datetime) -> bytes:
    """A broker's keep-alive; ``origin`` is the broker's IVOID [VTP2 §6.1]."""
    return build_transport(TransportMessage("iamalive", origin, now))


def echo(received: TransportMessage, now: dt.datetime, *, response: str | None = None) -> bytes:
    """A subscriber's reply to ``iamalive``: Origin unchanged, Response added [VTP2 §6.2]."""
    if received.role != "iamalive":
        raise ValueError(f"only an iamalive is echoed, not a {received.role!r}")
    return build_transport(TransportMessage("iamalive", received.origin, now, response=response))


def ack(ivorn: str, now: dt.datetime, *, response: str | None = None) -> bytes:
    """Receipt of the VOEvent ``ivorn``: responsibility taken [VTP2 §6.3]."""
    return build_transport(TransportMessage("ack", ivorn, now, response=response))


def nak(ivorn: str, now: dt.datetime, result: str, *, response: str | None = None) -> bytes:
    """Refusal of the VOEvent ``ivorn`` (permanent), with a readable ``result`` [VTP2 §6.3]."""
    return build_transport(TransportMessage("nak", ivorn, now, response=response, result=result))


def parse_transport(payload: bytes, *, limits: XmlLimits = DEFAULT_LIMITS) -> TransportMessage:
    """Check and read an untrusted Transport message (safe parse, then its content)."""
    root = safexml.parse_transport(payload, limits=limits)
    role = root.get("role")
    if role not in TRANSPORT_ROLES:
        raise PacketRejected(
            "schema_invalid", f"Transport role {role!r} is not one of {TRANSPORT_ROLES} [VTP2 §6]"
        )
    version = root.get("version")
    if not version:
        raise PacketRejected("schema_invalid", "Transport has no version attribute [VTP2 App. A]")
    found: dict[str, Any] = {}
    for child in root:
        name = etree.QName(child).localname
        if name not in ("Origin", "Response", "TimeStamp", "Meta"):
            raise PacketRejected(
                "schema_invalid", f"unexpected element {name!r} in Transport [VTP2 App. A]"
            )
        if name in found:
            raise PacketRejected("schema_invalid", f"second {name!r} in Transport [VTP2 App. A]")
        found[name] = child
    for required in ("Origin", "TimeStamp"):
        if required not in found:
            raise PacketRejected(
                "schema_invalid", f"Transport {role!r} has no {required} [VTP2 App. A]"
            )
    meta, result = _read_meta(found.get("Meta"))
    response = found.get("Response")
    return TransportMessage(
        role=cast(TransportRole, role),
        origin=(found["Origin"].text or "").strip(),
        timestamp=parse_timestamp((found["TimeStamp"].text or "").strip()),
        response=None if response is None else (response.text or "").strip(),
        meta=meta,
        result=result,
        version=version,
    )


def format_timestamp(when: dt.datetime) -> str:
    """``when`` in UTC as ``YYYY-MM-DDThh:mm:ss.sssZ`` (an xs:dateTime) [VTP2 §6]."""
    if when.tzinfo is None or when.utcoffset() is None:
        raise ValueError(f"timestamp {when!r} must be timezone-aware")
    return when.astimezone(dt.UTC).strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"


def parse_timestamp(text: str) -> dt.datetime:
    """An xs:dateTime as an aware UTC datetime; no zone means UTC [VTP2 §6.1].

    Fractions beyond microseconds are truncated.
    """
    m = _DATETIME.fullmatch(text)
    if m is None:
        raise PacketRejected("schema_invalid", f"TimeStamp {text!r} is not an xs:dateTime")
    base, frac, zone = m.groups()
    iso = base + (frac[:7] if frac else "") + ("+00:00" if zone in (None, "Z") else zone)
    try:
        return dt.datetime.fromisoformat(iso).astimezone(dt.UTC)
    except ValueError as exc:
        raise PacketRejected("schema_invalid", f"TimeStamp {text!r}: {exc}") from exc


def _read_meta(meta: Any) -> tuple[tuple[tuple[str, str], ...], str | None]:
    if meta is None:
        return (), None
    params: list[tuple[str, str]] = []
    result: str | None = None
    for child in meta:
        name = etree.QName(child).localname
        if name == "Param":
            params.append((child.get("name", ""), child.get("value", "")))
        elif name == "Result" and result is None:
            result = (child.text or "").strip()
        else:
            raise PacketRejected(
                "schema_invalid", f"unexpected element {name!r} in Transport Meta [VTP2 App. A]"
            )
    return tuple(params), result


def _text(parent: Any, tag: str, text: str) -> None:
    etree.SubElement(parent, tag).text = _xml_text(tag, text)


def _xml_text(field: str, text: str) -> str:
    """``text`` with the characters XML 1.0 cannot carry replaced by U+FFFD."""
    if not isinstance(text, str):
        raise ValueError(f"{field} must be a str, got {type(text).__name__}: {text!r}")
    return _NOT_XML_CHAR.sub("\ufffd", text)
