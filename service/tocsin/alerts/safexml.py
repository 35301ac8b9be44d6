"""Safe parsing of untrusted XML: VOEvent 2.0 packets and VTP Transport messages.

Every byte string that arrives from the network goes through the same gate,
cheapest check first, and is either accepted or refused with a
:class:`PacketRejected` that carries a short machine ``reason``:

1. ``too_large`` — more than ``XmlLimits.max_bytes`` bytes. Checked on the length
   alone, before any parsing (the spec sets no cap; 1 MB is our choice).
2. A streaming pass with the standard library's expat parser, which loads no DTD,
   fetches nothing and stops at the first problem:

   * ``doctype`` — any ``<!DOCTYPE``. A VTP message is an XML declaration, comments
     and one element, with no place for a DTD [VTP2 §3.3]. Without a DTD there are
     no entity declarations, so this one rule removes billion-laughs, quadratic
     blow-up and external (``file://``, ``http://``) entity attacks before any
     entity is read, let alone expanded.
   * ``not_xml`` — empty, not well-formed, an undefined entity, or a declared
     encoding or byte-order mark other than UTF-8 or ASCII (a payload is ASCII or
     UTF-8 [VTP2 §3.2]).
   * ``too_deep`` — an element nested deeper than ``XmlLimits.max_depth``, refused
     at the first such start tag.
   * ``not_voevent`` / ``not_transport`` — the root element is not the expected
     one, refused at the root's start tag (before the rest is read).

3. For a VOEvent: ``version`` must be ``"2.0"`` [VOE2 §3.1.3], then voevent-parse
   parses it and it must validate against the bundled VOEvent 2.0 XSD
   (``schema_invalid`` otherwise). Only a document that passed step 2, and so has
   no DTD, ever reaches lxml; lxml's own defaults (no network, an entity
   amplification limit, a depth limit of 256) stay in place behind it.

:func:`dedup_key` gives the [VTP2 §8] identity of a packet: the SHA-1 of the
bytes from the opening ``<`` of the ``VOEvent`` element to its closing ``>``.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Final, Literal
from xml.parsers import expat

from lxml import etree

from tocsin.alerts.vpshim import vp
from tocsin.errors import TocsinError

VOEVENT_NS: Final = "http://www.ivoa.net/xml/VOEvent/v2.0"
"""Namespace of the VOEvent 2.0 root element [VOE2 §3; XSD targetNamespace]."""

DEFAULT_MAX_BYTES: Final = 1_000_000
"""Default size cap of one packet, bytes (our choice; VTP 2.0 sets none)."""

DEFAULT_MAX_DEPTH: Final = 32
"""Default nesting cap (our choice). The deepest VOEvent 2.0 path,
VOEvent/WhereWhen/ObsDataLocation/ObservationLocation/AstroCoords/Position2D/Value2/C1,
is 8 levels [XSD]; a Transport message is 3."""

REJECT_REASONS: Final = (
    "too_large",
    "doctype",
    "not_xml",
    "too_deep",
    "not_voevent",
    "not_transport",
    "schema_invalid",
)
"""Every ``PacketRejected.reason``; used as a metrics label."""

RejectReason = Literal[
    "too_large", "doctype", "not_xml", "too_deep", "not_voevent", "not_transport", "schema_invalid"
]

_ALLOWED_ENCODINGS: Final = frozenset({"utf-8", "utf8", "us-ascii", "ascii"})

# Used only for Transport messages (small, no objectify). It never loads a DTD,
# never expands an entity and never touches the network; the expat pass has
# already refused any DOCTYPE before this parser sees the bytes.
_TRANSPORT_PARSER: Final[Any] = etree.XMLParser(
    resolve_entities=False,
    load_dtd=False,
    dtd_validation=False,
    no_network=True,
    huge_tree=False,
    remove_comments=True,
    remove_pis=True,
)


class PacketRejected(TocsinError):
    """An XML message from outside was refused.

    ``reason`` is one of :data:`REJECT_REASONS` (a metrics label); ``detail`` says
    what was wrong, naming the offending value; ``ivorn`` is the packet's IVORN
    when it could be read before the packet was refused (so a ``nak`` can name it).
    """

    def __init__(self, reason: RejectReason, detail: str, *, ivorn: str | None = None) -> None:
        super().__init__(f"{reason}: {detail}")
        self.reason: RejectReason = reason
        self.detail = detail
        self.ivorn = ivorn


@dataclass(frozen=True, slots=True)
class XmlLimits:
    """Caps applied to every untrusted document.

    ``max_bytes``: size cap in bytes (at most 2**32 − 1, the largest frame VTP's
    32-bit length can announce [VTP2 §3.2]). ``max_depth``: element nesting cap
    (the root is depth 1; at most 255, below libxml2's own limit of 256).
    """

    max_bytes: int = DEFAULT_MAX_BYTES
    max_depth: int = DEFAULT_MAX_DEPTH

    def __post_init__(self) -> None:
        if not 1 <= self.max_bytes <= 2**32 - 1:
            raise ValueError(f"max_bytes {self.max_bytes!r} must be in 1..{2**32 - 1}")
        if not 2 <= self.max_depth <= 255:
            raise ValueError(f"max_depth {self.max_depth!r} must be in 2..255")


DEFAULT_LIMITS: Final = XmlLimits()


@dataclass(frozen=True, slots=True)
class XmlRoot:
    """What the streaming pass learned about a well-formed document's root.

    ``start``/``end``: byte offsets of the root's opening ``<`` and one past its
    closing ``>`` (``data[start:end]`` is the element, exactly as sent).
    ``attributes``: the root's attributes (a namespaced one is keyed
    ``"namespace-uri local-name"``).
    """

    namespace: str
    local_name: str
    attributes: Mapping[str, str]
    start: int
    end: int


@dataclass(frozen=True, slots=True)
class CheckedVOEvent:
    """A VOEvent that passed every check.

    ``raw``: the bytes as received; ``voevent``: the voevent-parse object;
    ``ivorn``; ``role`` (``"observation"`` when absent, the schema default
    [VOE2 §3.1.2]); ``dedup_key``: see :func:`dedup_key`.
    """

    raw: bytes
    voevent: Any
    ivorn: str
    role: str
    dedup_key: str


_Want = Literal["voevent", "transport", "any"]


def inspect_root(data: bytes, *, limits: XmlLimits = DEFAULT_LIMITS) -> XmlRoot:
    """Run the size check and the streaming pass (steps 1–2) on any document.

    Raises :class:`PacketRejected` (``too_large``, ``doctype``, ``not_xml`` or
    ``too_deep``); the root may be anything.
    """
    return _scan(data, limits, "any")


def dedup_key(data: bytes, *, limits: XmlLimits = DEFAULT_LIMITS) -> str:
    """The [VTP2 §8] de-duplication key of a VOEvent packet: a hex SHA-1.

    Hashed are the bytes from the opening ``<`` of the ``VOEvent`` element to its
    closing ``>``, whitespace included, so the XML declaration, comments and
    whitespace around the element do not count, and any change inside it does.
    Runs the same checks as :func:`check_voevent` up to the root (not the schema).
    """
    root = _scan(data, limits, "voevent")
    return hashlib.sha1(data[root.start : root.end]).hexdigest()


def check_voevent(data: bytes, *, limits: XmlLimits = DEFAULT_LIMITS) -> CheckedVOEvent:
    """Check an untrusted VOEvent 2.0 packet completely (steps 1–3).

    Returns the parsed packet with its IVORN, role and [VTP2 §8] key; raises
    :class:`PacketRejected` otherwise.
    """
    root = _scan(data, limits, "voevent")
    ivorn = root.attributes.get("ivorn")
    version = root.attributes.get("version")
    if version != "2.0":
        raise PacketRejected(
            "schema_invalid",
            f"VOEvent version {version!r}; only '2.0' is accepted [VOE2 §3.1.3]",
            ivorn=ivorn,
        )
    try:
        voevent = vp.loads(data)
    except etree.XMLSyntaxError as exc:  # a parser differential: report, never crash
        raise PacketRejected("not_xml", f"lxml: {exc}", ivorn=ivorn) from exc
    except (ValueError, KeyError) as exc:
        raise PacketRejected("schema_invalid", f"voevent-parse: {exc!r}", ivorn=ivorn) from exc
    try:
        vp.assert_valid_as_v2_0(voevent)
    except etree.Error as exc:  # DocumentInvalid, or XMLSchemaValidateError
        raise PacketRejected(
            "schema_invalid", f"not valid VOEvent 2.0 [XSD]: {exc}", ivorn=ivorn
        ) from exc
    if ivorn is None:  # the XSD requires it; kept as a guard, not a rule of ours
        raise PacketRejected("schema_invalid", "VOEvent has no ivorn attribute [VOE2 §3.1.1]")
    return CheckedVOEvent(
        raw=data,
        voevent=voevent,
        ivorn=ivorn,
        role=root.attributes.get("role") or "observation",
        dedup_key=hashlib.sha1(data[root.start : root.end]).hexdigest(),
    )


def parse_voevent(data: bytes, *, limits: XmlLimits = DEFAULT_LIMITS) -> Any:
    """The voevent-parse object of a fully checked packet (see :func:`check_voevent`)."""
    return check_voevent(data, limits=limits).voevent


def parse_transport(data: bytes, *, limits: XmlLimits = DEFAULT_LIMITS) -> Any:
    """Parse an untrusted VTP ``Transport`` message into an lxml element.

    The root is matched on its local name ``Transport`` in any namespace (the
    samples' namespace and the schema's disagree [VTP2 App. A]; VOEVENT.md §3).
    Its content is checked by :func:`tocsin.alerts.framing.parse_transport`.
    """
    _scan(data, limits, "transport")
    try:
        root = etree.fromstring(data, _TRANSPORT_PARSER)
    except etree.XMLSyntaxError as exc:
        raise PacketRejected("not_xml", f"lxml: {exc}") from exc
    if root.getroottree().docinfo.doctype:  # cannot happen after the scan; kept as a guard
        raise PacketRejected("doctype", "DOCTYPE in a Transport message [VTP2 §3.3]")
    return root


def _scan(data: bytes, limits: XmlLimits, want: _Want) -> XmlRoot:
    """Steps 1 and 2 of the module docstring; the root's name is checked when ``want`` says."""
    if not isinstance(data, bytes):
        raise TypeError(f"XML must be bytes, got {type(data).__name__}")
    size = len(data)
    if size > limits.max_bytes:
        raise PacketRejected("too_large", f"{size} bytes; the cap is {limits.max_bytes}")
    if size == 0:
        raise PacketRejected("not_xml", "empty message")
    if data.startswith((b"\xff\xfe", b"\xfe\xff", b"\x00\x00\xfe\xff")):
        raise PacketRejected(
            "not_xml", f"UTF-16/32 byte order mark {data[:4]!r}; only UTF-8 or ASCII [VTP2 §3.2]"
        )

    # encoding="UTF-8" overrides whatever the document declares, so expat reads
    # the same characters lxml will; the declaration itself is checked below.
    parser = expat.ParserCreate(encoding="UTF-8", namespace_separator=" ")
    parser.SetParamEntityParsing(expat.XML_PARAM_ENTITY_PARSING_NEVER)
    depth = 0
    found: dict[str, Any] = {}

    def on_decl(version: str, encoding: str | None, standalone: int) -> None:
        if encoding is not None and encoding.lower() not in _ALLOWED_ENCODINGS:
            raise PacketRejected(
                "not_xml", f"declared encoding {encoding!r}; only UTF-8 or ASCII [VTP2 §3.2]"
            )

    def on_doctype(name: str, sysid: str | None, pubid: str | None, internal: bool) -> None:
        raise PacketRejected(
            "doctype",
            f"DOCTYPE {name!r} at byte {parser.CurrentByteIndex}; none is allowed [VTP2 §3.3]",
        )

    def on_start(name: str, attrs: dict[str, str]) -> None:
        nonlocal depth
        depth += 1
        if depth > limits.max_depth:
            raise PacketRejected(
                "too_deep",
                f"element {name.rpartition(' ')[2]!r} at depth {depth}; "
                f"the cap is {limits.max_depth}",
                ivorn=found.get("attributes", {}).get("ivorn"),
            )
        if depth == 1:
            namespace, _, local = name.rpartition(" ")
            found.update(namespace=namespace, local=local, attributes=attrs)
            found["start"] = parser.CurrentByteIndex
            _check_root(namespace, local, want)

    def on_end(name: str) -> None:
        nonlocal depth
        if depth == 1:
            found["end_event"] = parser.CurrentByteIndex
        depth -= 1

    parser.XmlDeclHandler = on_decl
    parser.StartDoctypeDeclHandler = on_doctype
    parser.StartElementHandler = on_start
    parser.EndElementHandler = on_end
    try:
        parser.Parse(data, True)
    except expat.ExpatError as exc:
        raise PacketRejected(
            "not_xml", f"{expat.ErrorString(exc.code)} at line {exc.lineno}, column {exc.offset}"
        ) from exc
    start: int = found["start"]
    return XmlRoot(
        namespace=found["namespace"],
        local_name=found["local"],
        attributes=found["attributes"],
        start=start,
        end=_root_end(data, found["end_event"]),
    )


def _check_root(namespace: str, local: str, want: _Want) -> None:
    shown = f"{{{namespace}}}{local}" if namespace else local
    if want == "voevent":
        if local != "VOEvent" or namespace != VOEVENT_NS:
            raise PacketRejected(
                "not_voevent",
                f"root element {shown!r}; expected {{{VOEVENT_NS}}}VOEvent [VOE2 §3]",
            )
    elif want == "transport" and local != "Transport":
        raise PacketRejected(
            "not_transport", f"root element {shown!r}; expected a Transport element [VTP2 §6]"
        )


def _root_end(data: bytes, event_at: int) -> int:
    """One past the root's closing ``>``, from where expat reported the root's end.

    expat reports an end tag at its ``</`` and an empty-element tag's end just
    past its ``/>``. After the root only comments, processing instructions and
    whitespace may follow, never ``</``, so the two cases cannot be confused.
    """
    if data[event_at : event_at + 2] == b"</":
        close = data.find(b">", event_at)  # an end tag holds no other '>'
        if close >= 0:
            return close + 1
    elif event_at >= 2 and data[event_at - 2 : event_at] == b"/>":
        return event_at
    raise PacketRejected("not_xml", f"cannot find the end of the root element at byte {event_at}")
