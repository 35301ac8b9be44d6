"""Deployment files on a real Mosquitto: one site's credentials reach only its own topics.

The broker runs deploy/mosquitto/mosquitto.conf itself: every line is kept except
the listener addresses and file paths, which point into the test's temporary
directory (the TLS listener gets a throwaway CA), so the tested settings cannot
drift from the shipped ones. The ACL is deploy/mosquitto/acl, unchanged; the site
passwords are set by deploy/mosquitto/add-site.sh.

A refused publish is invisible to an MQTT 3.1.1 publisher (its PUBACK carries no
result, MQTT 3.1.1 §3.4), so absence is shown with a control message: a subscriber
that would see the forbidden message sees the rightful writer's message on the same
topic, published after it, and nothing of the forbidden one.
"""

from __future__ import annotations

import asyncio
import os
import re
import secrets
import shutil
import signal
import socket
import ssl
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import aiomqtt
import pytest

from tests.mosquitto import MOSQUITTO, Mosquitto, free_port
from tocsin.live.topics import (
    DEFAULT_ROOT,
    alerts_topic,
    all_hits_filter,
    all_status_filter,
    external_topic,
    hits_topic,
    status_topic,
)
from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry
from tocsin.model.service_config import (
    ENV_PASSWORD,
    ENV_URL,
    BrokerConfig,
    load_service_config,
)

pytestmark = pytest.mark.broker

REPO = Path(__file__).resolve().parents[1]
DEPLOY = REPO / "deploy"
CONF = DEPLOY / "mosquitto" / "mosquitto.conf"
ACL = DEPLOY / "mosquitto" / "acl"
ADD_SITE = DEPLOY / "mosquitto" / "add-site.sh"
UNITS = DEPLOY / "systemd"
EXAMPLE = DEPLOY / "service.example.toml"

ROOT = DEFAULT_ROOT
SITE_A, SITE_B, SITE_NEW = "alder-fen-1", "brack-hill", "cold-spring-3"  # invented sites
SERVICE, OBSERVER, RELAY = "tocsin-service", "tocsin-observer", "tocsin-relay"
WAIT_S = 5.0  # guard on every wait for a message; never a measured duration


# --- the shipped files, parsed ----------------------------------------------------------


def conf_lines(path: Path) -> list[tuple[str, str]]:
    """``(key, value)`` of each setting line of a Mosquitto config (comments skipped)."""
    out = []
    for raw in path.read_text(encoding="utf-8").splitlines():
        line = raw.strip()
        if line and not line.startswith("#"):
            key, _, value = line.partition(" ")
            out.append((key, value.strip()))
    return out


def conf_value(key: str) -> str:
    values = [v for k, v in conf_lines(CONF) if k == key]
    assert len(values) == 1, f"{key!r} appears {len(values)} times in {CONF}"
    return values[0]


def acl_rules() -> dict[str | None, set[tuple[str, str]]]:
    """ACL rules by user (None: ``pattern`` lines, which apply to every user)."""
    rules: dict[str | None, set[tuple[str, str]]] = {None: set()}
    user: str | None = None
    for key, value in conf_lines(ACL):
        if key == "user":
            user = value
            rules[user] = set()
        elif key == "pattern":
            access, topic = value.split()
            rules[None].add((access, topic))
        else:
            assert key == "topic", f"unexpected ACL line {key} {value}"
            access, topic = value.split()
            assert user is not None, f"topic line {value!r} before any user line"
            rules[user].add((access, topic))
    return rules


def unit(name: str) -> dict[str, dict[str, list[str]]]:
    """A systemd unit file: section -> key -> values (a key may repeat)."""
    sections: dict[str, dict[str, list[str]]] = {}
    current: dict[str, list[str]] = {}
    for raw in (UNITS / name).read_text(encoding="utf-8").splitlines():
        line = raw.strip()
        if not line or line.startswith(("#", ";")):
            continue
        if line.startswith("["):
            current = sections.setdefault(line.strip("[]"), {})
            continue
        key, sep, value = line.partition("=")
        assert sep, f"{name}: line {line!r} is not key=value"
        current.setdefault(key.strip(), []).append(value.strip())
    return sections


def mosquitto_duration_s(text: str) -> int:
    """A Mosquitto duration (``7d``; h, d, w, m = month, y) in seconds."""
    m = re.fullmatch(r"(\d+)([hdwmy])", text)
    assert m, f"duration {text!r} is not a number followed by h, d, w, m or y"
    return (
        int(m[1]) * {"h": 3600, "d": 86400, "w": 7 * 86400, "m": 30 * 86400, "y": 365 * 86400}[m[2]]
    )


def systemd_seconds(text: str) -> float:
    """A systemd time span such as ``120s``, ``2min`` or ``90`` (seconds)."""
    m = re.fullmatch(r"(\d+)\s*(s|min|h)?", text)
    assert m, f"time span {text!r} not understood"
    return int(m[1]) * {None: 1, "s": 1, "min": 60, "h": 3600}[m[2]]


# --- static checks: the files agree with each other and with the code ------------------


def test_broker_settings_match_the_service() -> None:
    assert conf_value("allow_anonymous") == "false"
    assert conf_value("password_file") and conf_value("acl_file")
    # per_listener_settings true loses persistent sessions in 2.0.12-2.0.18 (reported bug)
    assert all(k != "per_listener_settings" or v == "false" for k, v in conf_lines(CONF))
    assert conf_value("persistence") == "true" and conf_value("persistence_location")
    # a killed broker loses what arrived since the last save: at most 5 minutes here
    assert 0 < int(conf_value("autosave_interval")) <= 300
    # every batch the service accepts passes the broker, which still bounds a site's message
    service_max = BrokerConfig.model_fields["max_message_bytes"].default
    assert service_max <= int(conf_value("message_size_limit")) <= 2 * service_max
    # the queue holds a day of the shipped 40-site network at one batch per site per
    # second (the simulator's batch length), and the service's session outlives it
    n_sites = len(SiteRegistry.from_toml(REPO / "replay_data" / "network.toml"))
    batches_per_s = n_sites * 1.0
    queue = int(conf_value("max_queued_messages"))
    assert queue >= 24 * 3600 * batches_per_s
    assert mosquitto_duration_s(conf_value("persistent_client_expiration")) >= queue / batches_per_s


def test_listeners_plain_on_loopback_and_tls_with_files() -> None:
    lines = conf_lines(CONF)
    listeners = [i for i, (k, _) in enumerate(lines) if k == "listener"]
    assert [lines[i][1] for i in listeners] == ["1883 127.0.0.1", "8883"]
    tls_block = dict(lines[listeners[1] + 1 :])
    assert {"cafile", "certfile", "keyfile"} <= tls_block.keys()
    plain_block = dict(lines[listeners[0] + 1 : listeners[1]])
    assert not {"cafile", "certfile", "keyfile"} & plain_block.keys()


def test_acl_grants_match_the_topic_layout() -> None:
    rules = acl_rules()
    assert rules[None] == {("write", hits_topic(ROOT, "%u")), ("write", status_topic(ROOT, "%u"))}
    assert rules[SERVICE] >= {
        ("read", all_hits_filter(ROOT)),
        ("read", all_status_filter(ROOT)),
        ("read", external_topic(ROOT)),
        ("write", alerts_topic(ROOT)),
    }
    assert {t for a, t in rules[OBSERVER] if a != "deny"} == {alerts_topic(ROOT)}
    assert {a for a, _ in rules[OBSERVER]} == {"read", "deny"}
    # Tocsin's own users: names add-site.sh refuses, each denied its namesake site topics
    for user in set(rules) - {None}:
        assert user is not None and user.startswith("tocsin-")
        assert ("deny", f"{ROOT}/site/{user}/#") in rules[user]


# --- a broker started from the shipped files ---------------------------------------------


@dataclass
class Deployed:
    broker: Mosquitto
    tls_port: int
    ca: Path
    pwfile: Path
    passwords: dict[str, str]


def make_certs(d: Path) -> dict[str, Path]:
    """A throwaway CA and a broker certificate for 127.0.0.1 (EC P-256, 2 days)."""
    openssl = shutil.which("openssl")
    if openssl is None:
        pytest.fail("openssl is not installed (apt-get install openssl): the TLS test needs it")
    d.mkdir()
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:P-256", "-nodes"]

    def run(*args: str) -> None:
        subprocess.run([openssl, *args], cwd=d, check=True, capture_output=True)

    ca = ["-keyout", "ca.key", "-out", "ca.pem", "-days", "2", "-subj", "/CN=tocsin test CA"]
    run("req", "-x509", *ec, *ca)
    run("req", *ec, "-keyout", "broker.key", "-out", "broker.csr", "-subj", "/CN=localhost")
    (d / "san.ext").write_text("subjectAltName=IP:127.0.0.1,DNS:localhost\n")
    sign = ["-in", "broker.csr", "-CA", "ca.pem", "-CAkey", "ca.key", "-CAcreateserial"]
    run("x509", "-req", *sign, "-out", "broker.pem", "-days", "2", "-extfile", "san.ext")
    return {"cafile": d / "ca.pem", "certfile": d / "broker.pem", "keyfile": d / "broker.key"}


def conf_for_test(*, tls_port: int, pwfile: Path, certs: dict[str, Path]) -> str:
    """The shipped mosquitto.conf with its listeners and paths moved into the test.

    The plain loopback listener is the fixture's own; the TLS listener moves to a free
    loopback port; persistence and log paths are the fixture's temporary ones.
    """
    out = []
    for key, value in conf_lines(CONF):
        if key == "listener":
            if value.split()[0] == "8883":
                out.append(f"listener {tls_port} 127.0.0.1")
        elif key in certs:
            out.append(f"{key} {certs[key]}")
        elif key == "password_file":
            out.append(f"password_file {pwfile}")
        elif key == "acl_file":
            out.append(f"acl_file {ACL}")
        elif key not in ("persistence_location", "log_dest"):
            out.append(f"{key} {value}")
    return "\n".join(out)


def add_site(*args: str, stdin: str = "") -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        ["bash", str(ADD_SITE), *args], input=stdin, capture_output=True, text=True, timeout=30
    )


@pytest.fixture(scope="module")
def deployed(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Deployed]:
    if not Path(MOSQUITTO).exists():
        pytest.fail("mosquitto is not installed (apt-get install mosquitto); .ci/run installs it")
    work = tmp_path_factory.mktemp("deploy")
    certs = make_certs(work / "certs")
    pwfile = work / "tocsin.passwd"
    passwords = {u: secrets.token_urlsafe(18) for u in (SITE_A, SITE_B, SERVICE, OBSERVER, RELAY)}
    for site in (SITE_A, SITE_B):
        r = add_site(site, str(pwfile), stdin=passwords[site] + "\n")
        assert r.returncode == 0, r.stderr
    for user in (SERVICE, OBSERVER, RELAY):  # Tocsin's own users: mosquitto_passwd directly
        pw = passwords[user]
        subprocess.run(
            ["mosquitto_passwd", str(pwfile), user],
            input=f"{pw}\n{pw}\n",
            text=True,
            check=True,
            capture_output=True,
        )
    tls_port = free_port()
    broker = Mosquitto(
        work / "broker", extra=conf_for_test(tls_port=tls_port, pwfile=pwfile, certs=certs)
    )
    broker.start()
    try:
        yield Deployed(broker, tls_port, certs["cafile"], pwfile, passwords)
    finally:
        broker.stop()


def client(
    d: Deployed,
    user: str | None,
    *,
    password: str | None = None,
    tls: bool = False,
    ident: str | None = None,
    clean: bool = True,
) -> aiomqtt.Client:
    """An MQTT 3.1.1 client of the test broker; ``password`` defaults to the user's own."""
    if password is None and user is not None:
        password = d.passwords[user]
    return aiomqtt.Client(
        "127.0.0.1",
        d.tls_port if tls else d.broker.port,
        username=user,
        password=password,
        identifier=ident,
        clean_session=clean,
        tls_params=aiomqtt.TLSParameters(ca_certs=str(d.ca)) if tls else None,
        timeout=WAIT_S,
    )


def payload(m: aiomqtt.Message) -> bytes:
    assert isinstance(m.payload, bytes | bytearray), m.payload
    return bytes(m.payload)


async def collect_until(sub: aiomqtt.Client, *stops: bytes) -> list[tuple[str, bytes]]:
    """Every message ``sub`` receives until each payload in ``stops`` has arrived."""
    got: list[tuple[str, bytes]] = []
    left = set(stops)
    try:
        async with asyncio.timeout(WAIT_S):
            async for m in sub.messages:
                got.append((m.topic.value, payload(m)))
                left.discard(payload(m))
                if not left:
                    return got
    except TimeoutError:
        pass
    raise AssertionError(f"control messages {left} did not arrive; got {got}")


def forged(got: list[tuple[str, bytes]]) -> list[tuple[str, bytes]]:
    return [(t, p) for t, p in got if p.startswith(b"forged")]


def field(b: bytes) -> bytes:
    """A string or binary field: 2-byte length, then the bytes (MQTT 3.1.1 §1.5.3)."""
    return len(b).to_bytes(2, "big") + b


def login(
    d: Deployed,
    user: str | None,
    password: str | None = None,
    *,
    tls: bool = False,
    will: tuple[str, bytes] | None = None,
    ident: str = "raw-login",
) -> int:
    """Send an MQTT 3.1.1 CONNECT over a raw socket; return the CONNACK return code.

    The socket is then closed without a DISCONNECT, so the broker publishes the last
    will (QoS 1, retained) of an accepted login (MQTT 3.1.1 §3.1.2.5). ``password``
    defaults to the user's own.
    """
    if password is None and user is not None:
        password = d.passwords[user]
    flags = 0x02  # clean session; the rest per §3.1.2.3
    fields = field(ident.encode())
    if will is not None:
        flags |= 0x04 | 0x08 | 0x20  # will, will QoS 1, will retain
        fields += field(will[0].encode()) + field(will[1])
    if user is not None:
        flags |= 0x80
        fields += field(user.encode())
    if password is not None:
        flags |= 0x40
        fields += field(password.encode())
    body = field(b"MQTT") + bytes([4, flags]) + (60).to_bytes(2, "big") + fields
    assert len(body) < 128  # one-byte remaining length (§2.2.3)
    port = d.tls_port if tls else d.broker.port
    with socket.create_connection(("127.0.0.1", port), timeout=WAIT_S) as raw:
        if tls:
            ctx = ssl.create_default_context(cafile=str(d.ca))
            with ctx.wrap_socket(raw, server_hostname="127.0.0.1") as s:
                return _connack(s, body)
        return _connack(raw, body)


def _connack(s: socket.socket, body: bytes) -> int:
    s.sendall(bytes([0x10, len(body)]) + body)
    connack = b""
    while len(connack) < 4:
        chunk = s.recv(4 - len(connack))
        if not chunk:
            break
        connack += chunk
    assert connack[:2] == bytes([0x20, 2]), f"not a CONNACK: {connack!r}"  # §3.2
    return connack[3]


# --- (1)-(5): what each user may do -------------------------------------------------------


def test_site_publishes_its_hits_and_the_service_receives_them(deployed: Deployed) -> None:
    batch = b'{"v":1,"site":"alder-fen-1","seq":0,"live":[0,1000000000],"t":[]}'

    async def run() -> list[tuple[str, bytes]]:
        async with client(deployed, SERVICE) as svc, client(deployed, SITE_A) as a:
            await svc.subscribe(all_hits_filter(ROOT), qos=1)
            await a.publish(hits_topic(ROOT, SITE_A), batch, qos=1)
            return await collect_until(svc, batch)

    assert asyncio.run(run()) == [(hits_topic(ROOT, SITE_A), batch)]


def test_site_cannot_write_another_sites_topics_alerts_or_external(deployed: Deployed) -> None:
    targets = [
        hits_topic(ROOT, SITE_B),
        status_topic(ROOT, SITE_B),
        alerts_topic(ROOT),
        external_topic(ROOT),
    ]
    controls = [b"control-b-hits", b"control-b-status", b"control-external"]

    async def run() -> tuple[list[tuple[str, bytes]], ...]:
        d = deployed
        async with (
            client(d, SERVICE) as svc,
            client(d, OBSERVER) as obs,
            client(d, SITE_A) as a,
            client(d, SITE_B) as b,
            client(d, RELAY) as relay,
        ):
            for f in (all_hits_filter(ROOT), all_status_filter(ROOT), external_topic(ROOT)):
                await svc.subscribe(f, qos=1)
            await obs.subscribe(alerts_topic(ROOT), qos=1)
            await a.publish(status_topic(ROOT, SITE_A), b"retained-a", qos=1, retain=True)
            for topic in targets:
                for qos in (0, 1):  # each returns normally: 3.1.1 has no refusal in PUBACK
                    await a.publish(topic, b"forged " + topic.encode(), qos=qos, retain=True)
            # A's own QoS 1 message: once it is acknowledged, the broker has handled
            # everything A sent before it
            await a.publish(hits_topic(ROOT, SITE_A), b"fence-a", qos=1)
            await b.publish(hits_topic(ROOT, SITE_B), controls[0], qos=1)
            await b.publish(status_topic(ROOT, SITE_B), controls[1], qos=1)
            await relay.publish(external_topic(ROOT), controls[2], qos=1)
            await svc.publish(alerts_topic(ROOT), b"control-alert", qos=1)
            seen_svc = await collect_until(svc, b"fence-a", *controls)
            seen_obs = await collect_until(obs, b"control-alert")
        # a retained forgery would be handed to every later subscriber of B's status:
        # subscribe to it first, then to A's status, whose retained message ends the wait
        async with client(d, SERVICE) as fresh:
            await fresh.subscribe(status_topic(ROOT, SITE_B), qos=1)
            await fresh.subscribe(status_topic(ROOT, SITE_A), qos=1)
            seen_fresh = await collect_until(fresh, b"retained-a")
        return seen_svc, seen_obs, seen_fresh

    seen_svc, seen_obs, seen_fresh = asyncio.run(run())
    # 8 forged publishes (4 topics x QoS 0 and 1), none delivered, none retained
    assert forged(seen_svc) == [] and forged(seen_obs) == [] and forged(seen_fresh) == []
    assert (alerts_topic(ROOT), b"control-alert") in seen_obs


def test_site_cannot_forge_another_sites_last_will(deployed: Deployed) -> None:
    d = deployed

    async def run() -> list[tuple[str, bytes]]:
        async with client(d, SERVICE) as svc, client(d, SITE_B) as b:
            await svc.subscribe(status_topic(ROOT, SITE_B), qos=1)
            # positive control: B's own will reaches the service
            assert login(d, SITE_B, will=(status_topic(ROOT, SITE_B), b"will-b")) == 0
            await collect_until(svc, b"will-b")
            # A leaves a will on B's status; wait until the broker has handled A's exit
            will = (status_topic(ROOT, SITE_B), b"forged will")
            assert login(d, SITE_A, will=will, ident="will-a") == 0
            wait_for_log(d.broker.log, "will-a")
            await b.publish(status_topic(ROOT, SITE_B), b"control-b-status", qos=1)
            return await collect_until(svc, b"control-b-status")

    assert forged(asyncio.run(run())) == []


def wait_for_log(log: Path, client_id: str) -> None:
    """Wait until the broker's log reports that ``client_id`` is gone."""
    deadline = time.monotonic() + WAIT_S
    pattern = re.compile(rf"Client {re.escape(client_id)} (closed its connection|disconnected)")
    while time.monotonic() < deadline:
        if pattern.search(log.read_text(errors="replace")):
            return
        time.sleep(0.02)
    raise AssertionError(f"the broker log {log} never reported {client_id!r} gone")


def test_anonymous_and_wrong_passwords_are_refused(deployed: Deployed) -> None:
    d = deployed
    codes = {
        "anonymous": login(d, None),
        "anonymous over TLS": login(d, None, tls=True),
        "empty password": login(d, SITE_A, ""),
        "wrong password": login(d, SITE_A, "not-" + d.passwords[SITE_A]),
        "wrong password over TLS": login(d, SITE_A, "not-" + d.passwords[SITE_A], tls=True),
        "another site's password": login(d, SITE_A, d.passwords[SITE_B]),
        "unknown user": login(d, "nobody-site", "x"),
    }
    # CONNACK 4 "bad user name or password" or 5 "not authorized" (MQTT 3.1.1 §3.2.2.3);
    # Mosquitto 2.0.11 answers 5 to each
    assert {case: code in (4, 5) for case, code in codes.items()} == dict.fromkeys(codes, True)
    # and the right password is accepted on both listeners (return code 0)
    assert (login(d, SITE_A), login(d, SITE_A, tls=True)) == (0, 0)


def test_site_cannot_read_any_topic(deployed: Deployed) -> None:
    async def run() -> tuple[int, int]:
        d = deployed
        async with (
            client(d, SITE_A) as a,
            client(d, SITE_B) as b,
            client(d, SERVICE) as svc,
            client(d, RELAY) as relay,
        ):
            filters = [
                "#",
                f"{ROOT}/#",
                all_hits_filter(ROOT),
                all_status_filter(ROOT),
                hits_topic(ROOT, SITE_B),
                status_topic(ROOT, SITE_B),
                hits_topic(ROOT, SITE_A),
                alerts_topic(ROOT),
                external_topic(ROOT),
            ]
            for f in filters:  # granted in the SUBACK by 2.0.11; refused at delivery
                await a.subscribe(f, qos=1)
            await b.publish(hits_topic(ROOT, SITE_B), b"b-hits", qos=1)
            await b.publish(status_topic(ROOT, SITE_B), b"b-status", qos=1, retain=True)
            await svc.publish(alerts_topic(ROOT), b"alert", qos=1)
            await relay.publish(external_topic(ROOT), b"external", qos=1)
            await a.publish(hits_topic(ROOT, SITE_A), b"own-hits", qos=1)
            # the broker sends A anything due to it before the PUBACK of A's next message
            await a.publish(hits_topic(ROOT, SITE_A), b"fence", qos=1)
            return len(filters), len(a.messages)

    n_filters, n_received = asyncio.run(run())
    assert n_filters == 9 and n_received == 0


def test_own_users_keep_to_their_roles(deployed: Deployed) -> None:
    async def run() -> tuple[list[tuple[str, bytes]], list[tuple[str, bytes]]]:
        d = deployed
        async with (
            client(d, SERVICE) as svc,
            client(d, OBSERVER) as obs,
            client(d, RELAY) as relay,
            client(d, SITE_A) as a,
        ):
            for f in (all_hits_filter(ROOT), all_status_filter(ROOT), external_topic(ROOT)):
                await svc.subscribe(f, qos=1)
            await obs.subscribe(alerts_topic(ROOT), qos=1)
            # the observer and the relay may not pose as sites (their %u pattern topics are
            # denied) nor write alerts; the service may not write a site's batches
            await obs.publish(hits_topic(ROOT, OBSERVER), b"forged obs", qos=1)
            await obs.publish(alerts_topic(ROOT), b"forged obs alert", qos=1)
            await relay.publish(hits_topic(ROOT, RELAY), b"forged relay", qos=1)
            await relay.publish(alerts_topic(ROOT), b"forged relay alert", qos=1)
            await svc.publish(hits_topic(ROOT, SITE_A), b"forged svc", qos=1)
            await svc.publish(hits_topic(ROOT, SERVICE), b"forged svc self", qos=1)
            await a.publish(hits_topic(ROOT, SITE_A), b"control-a", qos=1)
            await relay.publish(external_topic(ROOT), b"control-external", qos=1)
            await svc.publish(alerts_topic(ROOT), b"control-alert", qos=1)
            return (
                await collect_until(svc, b"control-a", b"control-external"),
                await collect_until(obs, b"control-alert"),
            )

    seen_svc, seen_obs = asyncio.run(run())
    assert forged(seen_svc) == [] and forged(seen_obs) == []


def test_message_size_limit(deployed: Deployed) -> None:
    service_max = BrokerConfig.model_fields["max_message_bytes"].default
    limit = int(conf_value("message_size_limit"))

    async def run() -> list[int]:
        async with client(deployed, SERVICE) as svc, client(deployed, SITE_A) as a:
            await svc.subscribe(hits_topic(ROOT, SITE_A), qos=1)
            await a.publish(hits_topic(ROOT, SITE_A), b"a" * service_max, qos=1)
            await a.publish(hits_topic(ROOT, SITE_A), b"b" * limit, qos=1)
            await a.publish(hits_topic(ROOT, SITE_A), b"c" * (limit + 1), qos=1)  # PUBACKed
            await a.publish(hits_topic(ROOT, SITE_A), b"control", qos=1)
            got = await collect_until(svc, b"control")
        return [len(p) for _, p in got]

    # 4,000,000 and 4,194,304 bytes pass; 4,194,305 is dropped
    assert asyncio.run(run()) == [service_max, limit, len(b"control")]


def test_tls_listener_same_rules(deployed: Deployed) -> None:
    async def run() -> list[tuple[str, bytes]]:
        d = deployed
        async with client(d, SERVICE) as svc, client(d, SITE_A, tls=True) as a:
            await svc.subscribe(all_hits_filter(ROOT), qos=1)
            await a.publish(hits_topic(ROOT, SITE_B), b"forged over TLS", qos=1)
            await a.publish(hits_topic(ROOT, SITE_A), b"over TLS", qos=1)
            return await collect_until(svc, b"over TLS")

    assert asyncio.run(run()) == [(hits_topic(ROOT, SITE_A), b"over TLS")]


def test_service_session_keeps_batches_across_a_broker_restart(deployed: Deployed) -> None:
    async def run() -> list[tuple[str, bytes]]:
        d = deployed
        async with client(d, SERVICE, ident="svc-persistent", clean=False) as svc:
            await svc.subscribe(all_hits_filter(ROOT), qos=1)
        async with client(d, SITE_A) as a:
            await a.publish(hits_topic(ROOT, SITE_A), b"queued", qos=1)
        d.broker.restart()
        async with client(d, SERVICE, ident="svc-persistent", clean=False) as svc:
            return await collect_until(svc, b"queued")

    assert asyncio.run(run()) == [(hits_topic(ROOT, SITE_A), b"queued")]


# --- (6) add-site.sh -----------------------------------------------------------------------


@pytest.mark.parametrize(
    "bad",
    [
        "",
        "Alder-fen",
        "-lead",
        "a" * 64,
        "a/b",
        "a+b",
        "a#",
        "a:b",
        "a b",
        "abc\n",
        "fen_1",
        "tocsin-service",
        "tocsin-x",
    ],
)
def test_add_site_refuses_bad_ids(tmp_path: Path, bad: str) -> None:
    pwfile = tmp_path / "pw"
    assert add_site("good-site", str(pwfile), stdin="pw1\n").returncode == 0
    before = pwfile.read_bytes()
    r = add_site(bad, str(pwfile), stdin="pw2\n")
    assert r.returncode == 2, r.stderr
    assert f"'{bad}'" in r.stderr  # the message names the refused id
    assert pwfile.read_bytes() == before


def test_add_site_adds_refuses_duplicates_and_replaces(tmp_path: Path) -> None:
    pwfile = tmp_path / "pw"
    longest = "a" * 63  # [a-z0-9][a-z0-9-]{0,62}: 63 characters at most
    for site in ("0", longest, "hollow-creek-2"):
        r = add_site(site, str(pwfile), stdin="some password\n")
        assert (r.returncode, r.stdout) == (0, ""), r.stderr
    users = [line.split(":")[0] for line in pwfile.read_text().splitlines()]
    assert users == ["0", longest, "hollow-creek-2"]
    assert "some password" not in pwfile.read_text()  # stored hashed
    assert os.stat(pwfile).st_mode & 0o007 == 0  # no access for others
    assert add_site("hollow-creek-2", str(pwfile), stdin="other\n").returncode == 2
    assert add_site("--replace", "kestrel-ridge", str(pwfile), stdin="x\n").returncode == 2
    assert add_site("kestrel-ridge", str(pwfile), stdin="").returncode == 2  # empty password
    r = add_site("--generate", "kestrel-ridge", str(pwfile))
    assert r.returncode == 0 and re.fullmatch(r"[A-Za-z0-9_-]{32}\n", r.stdout), r.stdout


def test_add_site_credentials_log_in_and_rotate(deployed: Deployed) -> None:
    d = deployed
    r = add_site("--generate", SITE_NEW, str(d.pwfile))
    assert r.returncode == 0, r.stderr
    first = r.stdout.strip()
    reload_broker(d)

    async def rotate() -> tuple[int, int, bool]:
        await wait_login(d, SITE_NEW, first)
        async with client(d, SITE_NEW, password=first) as old_session:
            r2 = add_site("--replace", "--generate", SITE_NEW, str(d.pwfile))
            assert r2.returncode == 0, r2.stderr
            second = r2.stdout.strip()
            reload_broker(d)
            await wait_login(d, SITE_NEW, second)
            # the broker drops a session whose password no longer holds
            try:
                async with asyncio.timeout(WAIT_S):
                    async for _ in old_session.messages:
                        pass
                dropped = False
            except aiomqtt.MqttError:
                dropped = True
        return login(d, SITE_NEW, first), login(d, SITE_NEW, second), dropped

    old_code, new_code, dropped = asyncio.run(rotate())
    assert old_code in (4, 5) and new_code == 0 and dropped


def reload_broker(d: Deployed) -> None:
    """SIGHUP: Mosquitto rereads its password and ACL files."""
    assert d.broker.proc is not None
    d.broker.proc.send_signal(signal.SIGHUP)


async def wait_login(d: Deployed, user: str, password: str) -> None:
    deadline = time.monotonic() + WAIT_S
    while login(d, user, password) != 0:
        assert time.monotonic() < deadline, f"{user} could not log in after the reload"
        await asyncio.sleep(0.05)


# --- (7) systemd units and the example service config ---------------------------------------


def test_systemd_units() -> None:
    svc = unit("tocsin.service")["Service"]
    assert svc["ExecStart"] == [
        "/opt/tocsin/venv/bin/tocsin serve --config /etc/tocsin/tocsin.toml"
    ]
    agent = unit("tocsin-agent@.service")["Service"]
    # the site id is the instance, the site and the broker user name (the ACL's %u)
    agent_cmd = agent["ExecStart"][0].split()
    assert agent_cmd[:6] == [
        "/opt/tocsin/venv/bin/tocsin",
        "agent",
        "--site",
        "%i",
        "--username",
        "%i",
    ]
    assert agent_cmd[6:8] == ["--spool", "/var/lib/tocsin-agent/%i"]
    assert agent["EnvironmentFile"] == ["/etc/tocsin/agent-%i.env"]
    assert agent["ReadWritePaths"] == ["/var/lib/tocsin-agent/%i"]
    for s in (svc, agent):
        assert s["User"][0] not in ("root", "0")
        assert s["Restart"] == ["on-failure"] and s["KillSignal"] == ["SIGTERM"]
        assert s["NoNewPrivileges"] == ["yes"] and s["ProtectSystem"] == ["strict"]
        assert s["PrivateTmp"] == ["yes"] and s["EnvironmentFile"]
    assert systemd_seconds(svc["TimeoutStopSec"][0]) >= 60  # time to write the checkpoint
    # the install is read-only (ProtectSystem=strict): the compiled kernels' cache
    # goes to the service's own cache directory (/var/cache/<CacheDirectory>)
    assert svc["Environment"] == [f"NUMBA_CACHE_DIR=/var/cache/{svc['CacheDirectory'][0]}"]
    # the environment files carry the variables the commands read
    for text in ((UNITS / "tocsin-agent@.service").read_text(), (DEPLOY / "README.md").read_text()):
        assert ENV_URL in text and ENV_PASSWORD in text


def test_systemd_units_verify(tmp_path: Path) -> None:
    analyze = shutil.which("systemd-analyze")
    if analyze is None:
        pytest.skip("systemd-analyze is not installed; test_systemd_units checks the keys")
    # the units name the installed program; verify them against this checkout's
    tocsin = Path(sys.executable).with_name("tocsin")
    assert tocsin.exists(), f"{tocsin} missing: pip install -e ."
    for name in ("tocsin.service", "tocsin-agent@.service"):
        text = (UNITS / name).read_text().replace("/opt/tocsin/venv/bin/tocsin", str(tocsin))
        (tmp_path / name).write_text(text)
    for name in ("tocsin.service", "tocsin-agent@alder-fen-1.service"):
        r = subprocess.run(
            [analyze, "verify", str(tmp_path / name)], capture_output=True, text=True, timeout=60
        )
        assert r.returncode == 0 and "tocsin" not in r.stdout + r.stderr, r.stdout + r.stderr


def test_example_service_config_loads(tmp_path: Path) -> None:
    text = EXAMPLE.read_text(encoding="utf-8")
    # the absolute paths of a real installation, moved under tmp_path
    moved = text.replace('"/etc/tocsin/', f'"{tmp_path}/etc/tocsin/')
    moved = moved.replace('"/var/lib/tocsin/', f'"{tmp_path}/var/lib/tocsin/')
    (tmp_path / "etc/tocsin/tls").mkdir(parents=True)
    shutil.copy(REPO / "replay_data" / "network.toml", tmp_path / "etc/tocsin/sites.toml")
    (tmp_path / "etc/tocsin/tls/ca.pem").write_text("placeholder: only its existence is checked\n")
    path = tmp_path / "etc/tocsin/tocsin.toml"
    path.write_text(moved)

    cfg = load_service_config(path, env={})
    b = cfg.broker
    assert b is not None and b.tls and b.port == 8883 and b.password is None
    assert b.username == b.client_id == SERVICE and SERVICE in acl_rules()
    assert b.topic_root == ROOT
    assert b.max_message_bytes <= int(conf_value("message_size_limit"))
    assert cfg.engine == EngineConfig()
    assert cfg.metrics.host == "127.0.0.1" and cfg.metrics.port > 0
    assert cfg.data_dir == tmp_path / "var/lib/tocsin/data"
    secret = load_service_config(path, env={"TOCSIN_BROKER_PASSWORD": "s3cret"})
    assert secret.broker is not None and secret.broker.password == "s3cret"
    # the unit runs the config from where the guide installs it, and may write its data_dir
    svc = unit("tocsin.service")["Service"]
    assert svc["ExecStart"][0].endswith("--config /etc/tocsin/tocsin.toml")
    assert any(
        "/var/lib/tocsin/data".startswith(p.rstrip("/") + "/") for p in svc["ReadWritePaths"]
    )
    assert "/etc/tocsin/tocsin.toml" in (DEPLOY / "README.md").read_text()


def test_readme_names_existing_files() -> None:
    readme = (DEPLOY / "README.md").read_text(encoding="utf-8")
    named = set(re.findall(r"\bdeploy/[\w./@-]*\w", readme))
    assert named, "the guide names no deploy/ files"
    missing = sorted(p for p in named if not (REPO / p).exists())
    assert missing == []
