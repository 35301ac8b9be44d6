"""VTP 2.0 over real TCP on loopback: the subscriber port (TransportServer) and a subscriber.

Sources: [VTP2] VOEvent Transport Protocol 2.0 REC, sections as cited. Subscribers are
told apart by source address: loopback aliases 127.0.0.2, 127.0.0.3 … (Linux routes all
of 127.0.0.0/8 to the loopback interface). No test asserts on durations; waits have
generous timeouts and the checks are on order and counts.
"""

from __future__ import annotations

import asyncio
import contextlib
import datetime as dt
import logging
from collections import Counter
from collections.abc import Callable
from typing import Any, Self

import pytest

from tests.test_safexml import make_packet
from tocsin.alerts import framing
from tocsin.live.transport import AllowedNetwork, DeliveryOutcome, TransportClient, TransportServer

LOG = "tocsin.live.transport"
ORIGIN = "ivo://tocsin.example/broker"
NOW = dt.datetime(2026, 1, 2, 3, 4, 5, tzinfo=dt.UTC)


def allow(**networks: str) -> list[AllowedNetwork]:
    return [AllowedNetwork.parse(name, cidr) for name, cidr in networks.items()]


def packets(n: int, prefix: str) -> list[tuple[bytes, str]]:
    """``n`` small valid VOEvents (role test) and their IVORNs."""
    return [(make_packet(f"{prefix}-{i}"), f"ivo://tocsin.example/test#{prefix}-{i}")
            for i in range(n)]


async def eventually(cond: Callable[[], bool], timeout: float = 20.0) -> None:
    """Wait until ``cond()`` holds (a test helper; fails after ``timeout`` s)."""
    async with asyncio.timeout(timeout):
        while not cond():
            await asyncio.sleep(0.01)


class Outcomes:
    """The server's ``on_result`` hook, recording every delivery outcome."""

    def __init__(self) -> None:
        self.seen: list[tuple[str, str, DeliveryOutcome]] = []

    def __call__(self, name: str, ivorn: str, outcome: DeliveryOutcome) -> None:
        self.seen.append((name, ivorn, outcome))

    def of(self, name: str) -> list[tuple[str, DeliveryOutcome]]:
        return [(ivorn, outcome) for who, ivorn, outcome in self.seen if who == name]


class Received:
    """A client's ``on_packet`` callback, recording what it was handed."""

    def __init__(self, fail_first: int = 0) -> None:
        self.packets: list[bytes] = []
        self.ivorns: list[str] = []
        self.fail_first = fail_first

    async def __call__(self, raw: bytes, voevent: Any) -> None:
        if self.fail_first > 0:
            self.fail_first -= 1
            raise RuntimeError("archive unavailable (test)")
        self.packets.append(raw)
        self.ivorns.append(voevent.attrib["ivorn"])


class RawPeer:
    """A hand-driven TCP peer that speaks (or breaks) VTP byte by byte."""

    def __init__(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self.reader = reader
        self.writer = writer

    @classmethod
    async def connect(cls, port: int, source: str = "127.0.0.1") -> Self:
        reader, writer = await asyncio.open_connection("127.0.0.1", port, local_addr=(source, 0))
        return cls(reader, writer)

    async def read_frame(self) -> tuple[bytes, bytes]:
        async with asyncio.timeout(20):
            header = await self.reader.readexactly(4)
            return header, await self.reader.readexactly(int.from_bytes(header, "big"))

    def send(self, payload: bytes) -> None:
        self.writer.write(framing.encode_frame(payload))

    async def closed_by_server(self) -> bool:
        """True once the other side has closed the connection (EOF or reset)."""
        try:
            async with asyncio.timeout(20):
                while await self.reader.read(65536):
                    pass
        except ConnectionError:
            pass
        return True

    async def __aenter__(self) -> Self:
        return self

    async def __aexit__(self, *exc: object) -> None:
        self.writer.close()
        with contextlib.suppress(ConnectionError):
            await self.writer.wait_closed()


def server(**kw: Any) -> TransportServer:
    kw.setdefault("origin", ORIGIN)
    return TransportServer(**kw)


# ------------------------------------------------------------- delivery


@pytest.mark.asyncio
async def test_subscriber_gets_byte_identical_framed_packets_and_outcomes_are_recorded() -> None:
    outcomes = Outcomes()
    sent = packets(3, "p")
    async with (
        server(allow=allow(alpha="127.0.0.1/32"), on_result=outcomes) as srv,
        await RawPeer.connect(srv.port) as peer,
    ):
        await eventually(lambda: srv.connected() == ["alpha"])
        for packet, ivorn in sent:
            assert srv.publish(packet, ivorn) == 1
        for i, (packet, ivorn) in enumerate(sent):  # one in flight at a time [VTP2 §7.3]
            header, payload = await peer.read_frame()
            # [VTP2 §3.2] 4-byte network-order count of the payload bytes
            assert int.from_bytes(header, "big") == len(payload) == len(packet)
            # [VTP2 §3.1] the subscriber gets a bit-for-bit copy of what was published
            assert payload == packet
            peer.send(framing.ack(ivorn, NOW) if i < 2 else framing.nak(ivorn, NOW, "test"))
        await eventually(lambda: len(outcomes.seen) == 3)
    assert outcomes.seen == [
        ("alpha", sent[0][1], "ack"), ("alpha", sent[1][1], "ack"), ("alpha", sent[2][1], "nak"),
    ]
    assert (srv.counters.sent, srv.counters.acked, srv.counters.naked) == (3, 2, 1)


@pytest.mark.asyncio
@pytest.mark.parametrize(
    ("listed", "source"),
    [("127.0.0.1/32", "127.0.0.2"), ("192.0.2.0/24", "127.0.0.1"), ("::1/128", "127.0.0.1")],
)
async def test_address_not_on_the_allow_list_is_refused_and_logged(
    listed: str, source: str, caplog: pytest.LogCaptureFixture
) -> None:
    # [VTP2 §9.1] access control by IP allow-list
    caplog.set_level(logging.INFO, logger=LOG)
    async with (
        server(allow=allow(listed=listed, other="127.0.0.9/32")) as srv,
        await RawPeer.connect(srv.port, source=source) as peer,
    ):
        assert await peer.closed_by_server()
        assert srv.counters.refused == 1
        assert srv.connected() == []
        assert srv.publish(*packets(1, "r")[0]) == 0
        # the listed address on the same server is accepted
        async with await RawPeer.connect(srv.port, source="127.0.0.9"):
            await eventually(lambda: srv.connected() == ["other"])
    assert f"refused connection from {source}" in caplog.text


@pytest.mark.asyncio
async def test_stalled_subscriber_does_not_hold_up_the_others() -> None:
    outcomes, received = Outcomes(), Received()
    sent = packets(20, "s")
    srv = server(allow=allow(fast="127.0.0.2/32", slow="127.0.0.3/32"), reply_timeout_s=60.0,
                 on_result=outcomes)
    async with (
        srv,
        # the slow peer connects and then never reads nor answers
        await RawPeer.connect(srv.port, source="127.0.0.3"),
        TransportClient("127.0.0.1", srv.port, received, local_addr=("127.0.0.2", 0)),
    ):
        await eventually(lambda: srv.connected() == ["fast", "slow"])
        for packet, ivorn in sent:
            assert srv.publish(packet, ivorn) == 2
        await eventually(lambda: len(outcomes.of("fast")) == len(sent))
        assert received.packets == [packet for packet, _ in sent]
        assert outcomes.of("fast") == [(ivorn, "ack") for _, ivorn in sent]
        # meanwhile the slow one is still stuck on its first packet, connected
        assert outcomes.of("slow") == []
        assert srv.connected() == ["fast", "slow"]
        assert srv.counters.sent == len(sent) + 1
    # closing ends every packet still owed to the slow one as "disconnected", in order
    assert outcomes.of("slow") == [(ivorn, "disconnected") for _, ivorn in sent]


@pytest.mark.asyncio
async def test_queue_overflow_cuts_off_only_the_stalled_subscriber(
    caplog: pytest.LogCaptureFixture,
) -> None:
    caplog.set_level(logging.INFO, logger=LOG)
    outcomes, received = Outcomes(), Received()
    sent = packets(10, "o")
    srv = server(allow=allow(fast="127.0.0.2/32", slow="127.0.0.3/32"), queue_size=4,
                 reply_timeout_s=60.0, on_result=outcomes)
    async with (
        srv,
        await RawPeer.connect(srv.port, source="127.0.0.3") as slow,
        TransportClient("127.0.0.1", srv.port, received, local_addr=("127.0.0.2", 0)),
    ):
        await eventually(lambda: srv.connected() == ["fast", "slow"])
        for k, (packet, ivorn) in enumerate(sent):
            srv.publish(packet, ivorn)
            await eventually(lambda k=k: len(outcomes.of("fast")) == k + 1)  # type: ignore[misc]
        assert received.packets == [packet for packet, _ in sent]
        await eventually(lambda: srv.connected() == ["fast"])
        assert await slow.closed_by_server()
    # 1 in flight + 4 queued + the 6th that did not fit; later ones were not queued to it
    assert sorted(outcomes.of("slow")) == sorted((iv, "disconnected") for _, iv in sent[:6])
    assert srv.counters.overflows == 1
    assert srv.counters.disconnects["overflow"] == 1
    assert "subscriber 'slow'" in caplog.text and "overflow" in caplog.text


@pytest.mark.asyncio
async def test_subscriber_that_never_answers_times_out(caplog: pytest.LogCaptureFixture) -> None:
    caplog.set_level(logging.INFO, logger=LOG)
    outcomes, received = Outcomes(), Received()
    sent = packets(3, "t")
    srv = server(allow=allow(fast="127.0.0.2/32", mute="127.0.0.3/32"), reply_timeout_s=0.5,
                 on_result=outcomes)
    async with (
        srv,
        await RawPeer.connect(srv.port, source="127.0.0.3") as mute,
        TransportClient("127.0.0.1", srv.port, received, local_addr=("127.0.0.2", 0)),
    ):
        await eventually(lambda: srv.connected() == ["fast", "mute"])
        for packet, ivorn in sent:
            srv.publish(packet, ivorn)
        _, first = await mute.read_frame()  # it reads the packet but never answers
        assert first == sent[0][0]
        await eventually(lambda: len(outcomes.of("mute")) == 3)
        await eventually(lambda: len(outcomes.of("fast")) == 3)
    assert outcomes.of("mute") == [
        (sent[0][1], "timeout"), (sent[1][1], "disconnected"), (sent[2][1], "disconnected")
    ]
    assert outcomes.of("fast") == [(ivorn, "ack") for _, ivorn in sent]
    assert srv.counters.timed_out == 1
    assert "subscriber 'mute'" in caplog.text and "ack_timeout" in caplog.text


OFFENCES = {
    # a count of 2**31 bytes: refused on the header alone
    "huge-frame": (b"\x80\x00\x00\x00", "frame_too_large", "2147483648"),
    # unframed text: its first four bytes read as a count of 1195725856
    "http-request": (b"GET / HTTP/1.0\r\n\r\n", "frame_too_large", "1195725856"),
    "framed-garbage": (framing.encode_frame(b"hello, not xml"), "bad_message", "not_xml"),
    # [VTP2 §7.3] a subscriber sends only Transport messages
    "framed-voevent": (framing.encode_frame(make_packet("x")), "bad_message", "not_transport"),
    "unsolicited-ack": (
        framing.encode_frame(framing.ack("ivo://tocsin.example/test#zz", NOW)), "protocol",
        "unsolicited",
    ),
}


@pytest.mark.asyncio
@pytest.mark.parametrize("offence", list(OFFENCES))
async def test_misbehaving_subscriber_is_cut_off_and_the_others_are_served(
    offence: str, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.INFO, logger=LOG)
    data, reason, detail = OFFENCES[offence]
    outcomes, received = Outcomes(), Received()
    srv = server(allow=allow(good="127.0.0.2/32", bad="127.0.0.3/32"), on_result=outcomes)
    async with (
        srv,
        await RawPeer.connect(srv.port, source="127.0.0.3") as bad,
        TransportClient("127.0.0.1", srv.port, received, local_addr=("127.0.0.2", 0)),
    ):
        await eventually(lambda: srv.connected() == ["bad", "good"])
        bad.writer.write(data)
        assert await bad.closed_by_server()
        await eventually(lambda: srv.connected() == ["good"])
        packet, ivorn = packets(1, "g")[0]
        assert srv.publish(packet, ivorn) == 1
        await eventually(lambda: outcomes.seen == [("good", ivorn, "ack")])
        assert received.packets == [packet]
    assert srv.counters.disconnects[reason] == 1
    assert "subscriber 'bad'" in caplog.text
    assert reason in caplog.text and detail in caplog.text


# ------------------------------------------------------------- keep-alive


@pytest.mark.asyncio
async def test_iamalive_after_the_idle_period_and_echo_keeps_the_link() -> None:
    async with (
        server(allow=allow(sub="127.0.0.1/32"), idle_s=0.2) as srv,
        await RawPeer.connect(srv.port) as peer,
    ):
        for _ in range(3):
            _, payload = await peer.read_frame()
            msg = framing.parse_transport(payload)
            # [VTP2 §5, §6.1] iamalive from the broker, Origin = its IVOID
            assert (msg.role, msg.origin) == ("iamalive", ORIGIN)
            peer.send(framing.echo(msg, NOW, response="ivo://tocsin.example/sub"))
        await eventually(lambda: srv.counters.iamalive_echoed == 3)
        assert srv.connected() == ["sub"]
        assert srv.counters.disconnects == Counter()


@pytest.mark.asyncio
async def test_subscriber_that_does_not_echo_is_cut_off(caplog: pytest.LogCaptureFixture) -> None:
    caplog.set_level(logging.INFO, logger=LOG)
    async with (
        server(allow=allow(sub="127.0.0.1/32"), idle_s=0.2, reply_timeout_s=0.3) as srv,
        await RawPeer.connect(srv.port) as peer,
    ):
        _, payload = await peer.read_frame()
        assert framing.parse_transport(payload).role == "iamalive"
        assert await peer.closed_by_server()  # [VTP2 §5] no echo: the peer may be dropped
    assert srv.counters.disconnects["no_echo"] == 1
    assert "no_echo" in caplog.text


@pytest.mark.asyncio
async def test_client_echoes_iamalive_and_stays_connected() -> None:
    async with (
        server(allow=allow(sub="127.0.0.1/32"), idle_s=0.1) as srv,
        TransportClient("127.0.0.1", srv.port, Received()) as client,
    ):
        await eventually(lambda: srv.counters.iamalive_echoed >= 3)
        assert client.counters.iamalive_echoed >= 3
        assert client.counters.connects == 1
        assert srv.counters.disconnects == Counter()


# ------------------------------------------------------------- the client


@pytest.mark.asyncio
async def test_client_naks_refused_packets_and_acks_valid_ones(
    caplog: pytest.LogCaptureFixture,
) -> None:
    caplog.set_level(logging.INFO, logger=LOG)
    outcomes, received = Outcomes(), Received()
    good, good_ivorn = packets(1, "good")[0]
    invalid = make_packet("inv").replace(b'version="2.0"', b'version="2.1"')  # [VOE2 §3.1.3]
    doctype = b"<!DOCTYPE VOEvent>" + make_packet("dt").split(b"?>", 1)[1]  # [VTP2 §3.3]
    async with (
        server(allow=allow(sub="127.0.0.1/32"), on_result=outcomes) as srv,
        TransportClient("127.0.0.1", srv.port, received) as client,
    ):
        await eventually(lambda: srv.connected() == ["sub"])
        srv.publish(invalid, "ivo://tocsin.example/test#inv")
        srv.publish(doctype, "ivo://tocsin.example/test#dt")
        srv.publish(good, good_ivorn)
        await eventually(lambda: len(outcomes.seen) == 3)
    assert outcomes.seen == [
        ("sub", "ivo://tocsin.example/test#inv", "nak"),
        ("sub", "ivo://tocsin.example/test#dt", "nak"),
        ("sub", good_ivorn, "ack"),
    ]
    assert received.packets == [good] and received.ivorns == [good_ivorn]
    assert client.counters.rejected == Counter({"schema_invalid": 1, "doctype": 1})
    assert (client.counters.naks_sent, client.counters.acks_sent) == (2, 1)
    # the nak's Result reaches the server's log with the reason
    assert "schema_invalid" in caplog.text and "'2.1'" in caplog.text


@pytest.mark.asyncio
async def test_client_passes_on_each_packet_once() -> None:
    # [VTP2 §8] same = byte-identical <VOEvent> element; duplicates are acked, not naked [§6.3]
    outcomes, received = Outcomes(), Received()
    packet, ivorn = packets(1, "dup")[0]
    relayed = b'<?xml version="1.0"?>\n<!-- relayed -->\n' + packet.split(b"?>", 1)[1].lstrip()
    changed = packet.replace(b"<Who>", b"<Who> ", 1)  # one byte of whitespace inside
    async with (
        server(allow=allow(sub="127.0.0.1/32"), on_result=outcomes) as srv,
        TransportClient("127.0.0.1", srv.port, received) as client,
    ):
        await eventually(lambda: srv.connected() == ["sub"])
        for data in (packet, packet, relayed, changed):
            srv.publish(data, ivorn)
        await eventually(lambda: len(outcomes.seen) == 4)
    assert [outcome for _, _, outcome in outcomes.seen] == ["ack"] * 4
    assert received.packets == [packet, changed]
    assert client.counters.duplicates == 2


@pytest.mark.asyncio
async def test_client_naks_when_its_callback_fails_and_takes_a_resend() -> None:
    outcomes, received = Outcomes(), Received(fail_first=1)
    packet, ivorn = packets(1, "cb")[0]
    async with (
        server(allow=allow(sub="127.0.0.1/32"), on_result=outcomes) as srv,
        TransportClient("127.0.0.1", srv.port, received) as client,
    ):
        await eventually(lambda: srv.connected() == ["sub"])
        srv.publish(packet, ivorn)
        await eventually(lambda: len(outcomes.seen) == 1)
        assert srv.send_to("sub", packet, ivorn)  # not remembered as seen: handled now
        await eventually(lambda: len(outcomes.seen) == 2)
    assert [outcome for _, _, outcome in outcomes.seen] == ["nak", "ack"]
    assert received.packets == [packet]
    assert client.counters.callback_errors == 1
    assert not srv.send_to("sub", packet, ivorn)  # nobody connected any more


@pytest.mark.asyncio
async def test_client_reconnects_after_the_server_restarts() -> None:
    received = Received()
    first = server(allow=allow(sub="127.0.0.1/32"))
    await first.start()
    port = first.port
    client = TransportClient("127.0.0.1", port, received, backoff_min_s=0.05, backoff_max_s=0.2)
    async with client:
        await eventually(lambda: first.connected() == ["sub"])
        await first.close()
        await eventually(lambda: not client.connected)
        await asyncio.sleep(0.3)  # a few refused attempts while nothing listens
        async with server(allow=allow(sub="127.0.0.1/32"), port=port) as second:
            await eventually(lambda: second.connected() == ["sub"])
            packet, ivorn = packets(1, "again")[0]
            assert second.publish(packet, ivorn) == 1
            await eventually(lambda: received.packets == [packet])
    assert client.counters.connects == 2
    assert client.counters.connect_failures >= 1
    assert client.counters.disconnects["closed"] == 1


@pytest.mark.asyncio
async def test_client_drops_a_silent_connection_and_reconnects() -> None:
    async with server(allow=allow(sub="127.0.0.1/32"), idle_s=90.0) as srv:
        client = TransportClient("127.0.0.1", srv.port, Received(), silence_timeout_s=0.3,
                                 backoff_min_s=0.05, backoff_max_s=0.1)
        async with client:
            await eventually(lambda: client.counters.connects >= 2)
            assert client.counters.disconnects["silent"] >= 1


@pytest.mark.asyncio
async def test_client_drops_a_broker_announcing_a_huge_frame() -> None:
    connections = 0

    async def rogue(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        nonlocal connections
        connections += 1
        writer.write(b"\x80\x00\x00\x00")  # 2**31 bytes announced, never sent
        await reader.read()  # until the client hangs up
        writer.close()

    rogue_server = await asyncio.start_server(rogue, "127.0.0.1", 0)
    port = rogue_server.sockets[0].getsockname()[1]
    try:
        client = TransportClient("127.0.0.1", port, Received(), backoff_min_s=0.05,
                                 backoff_max_s=0.1)
        async with client:
            await eventually(lambda: connections >= 2)
            assert client.counters.disconnects["frame_too_large"] >= 1
            assert client.counters.rejected["too_large"] >= 1
    finally:
        rogue_server.close()
        await rogue_server.wait_closed()


@pytest.mark.asyncio
async def test_settings_are_checked() -> None:
    with pytest.raises(ValueError, match="idle_s 120"):
        server(allow=allow(a="127.0.0.1/32"), idle_s=120)  # [VTP2 §5] at most 90 s
    with pytest.raises(ValueError, match="empty"):
        server(allow=[])
    with pytest.raises(ValueError, match="unique"):
        TransportServer(origin=ORIGIN, allow=[AllowedNetwork.parse("a", "127.0.0.1/32"),
                                              AllowedNetwork.parse("a", "127.0.0.2/32")])
    with pytest.raises(ValueError, match=r"'127\.0\.0\.1/8'"):
        AllowedNetwork.parse("loose", "127.0.0.1/8")  # host bits set
    with pytest.raises(ValueError, match="backoff"):
        TransportClient("127.0.0.1", 1, Received(), backoff_min_s=5, backoff_max_s=1)
