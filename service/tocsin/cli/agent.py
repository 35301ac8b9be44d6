"""``tocsin agent``: publish one site's hits over MQTT, with a disk spool."""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import os
import signal
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from tocsin.cli.main import COMMANDS
from tocsin.live import logs
from tocsin.live.agent import (
    MAX_UPLOAD_BATCHES,
    Agent,
    AgentSettings,
    default_client_id,
    upload_batches,
)
from tocsin.live.sources import (
    DEFAULT_GRACE_S,
    DEFAULT_STALL_S,
    HitSource,
    SourceOptions,
    UploadSource,
    open_source,
)
from tocsin.live.topics import DEFAULT_ROOT, valid_site_id
from tocsin.model.service_config import ENV_PASSWORD, ENV_URL, ENV_USER, BrokerConfig


def add_parser(sub: Any) -> None:
    p = sub.add_parser(
        "agent",
        help=COMMANDS["agent"][1],
        description=(
            "Read one site's hit times, cut them into hit batches (v1) of --batch-s seconds of "
            "GPS time, keep every batch in a disk spool until the broker has acknowledged it "
            "(QoS 1), and publish a retained status (online/spooling/offline, with a last will). "
            "A regular file is uploaded and the agent exits when the broker has it all; a FIFO, "
            "standard input or the simulator run until SIGTERM/SIGINT (or --duration). "
            f"Environment: {ENV_URL}, {ENV_USER}, {ENV_PASSWORD} supply the broker URL, user "
            "name and password when the options do not."
        ),
    )
    a = p.add_argument
    a("--site", required=True, help="this site's id in the registry, e.g. hollow-creek-2")
    a("--broker", metavar="URL", help=f"mqtt://host:port or mqtts://host:port (or ${ENV_URL})")
    a("--username", help=f"broker user name (default ${ENV_USER}, else none)")
    a("--password-env", metavar="VAR",
      help=f"name of the environment variable holding the password (default {ENV_PASSWORD})")
    a("--client-id", help="fixed MQTT client id (default tocsin-agent-SITE)")
    a("--topic-root", default=DEFAULT_ROOT, metavar="R",
      help="topic root; batches go to R/site/SITE/hits (default %(default)s)")
    a("--source", default="pipe:-", metavar="SPEC",
      help="file:PATH (regular file: upload; FIFO or '-': real time), pipe:- (standard "
           "input), or sim:RATE (simulated detector, RATE hits/s); default %(default)s")
    a("--spool", type=Path, metavar="DIR",
      help="spool directory, one per site (default ~/.local/state/tocsin/spool/SITE)")
    a("--batch-s", type=float, default=1.0, metavar="S",
      help="GPS seconds per batch (default %(default)s)")
    a("--max-batch-hits", type=int, default=50_000, metavar="N",
      help="close a batch early at N hits (default %(default)s)")
    a("--spool-max-mb", type=float, default=256.0, metavar="M",
      help="spool bound in MB (10^6 bytes); when full, new batches are dropped and their time "
           "is reported as dead time (default %(default)s)")
    a("--grace-s", type=float, default=DEFAULT_GRACE_S, metavar="S",
      help="real-time input: how late a line may arrive after its hit time (default %(default)s)")
    a("--stall-s", type=float, default=DEFAULT_STALL_S, metavar="S",
      help="real-time input: silence (no line at all; comment lines count) after which the "
           "site stops counting as live; 0 = never (default %(default)s)")
    a("--keepalive-s", type=int, default=30, metavar="S",
      help="MQTT keepalive; the broker announces the last will after 1.5 x S without "
           "traffic (default %(default)s)")
    a("--status-s", type=float, default=30.0, metavar="S",
      help="seconds between status messages (default %(default)s)")
    a("--ca-file", type=Path, metavar="F", help="TLS: CA certificate(s) (mqtts:// only)")
    a("--cert-file", type=Path, metavar="F", help="TLS: client certificate (mqtts:// only)")
    a("--key-file", type=Path, metavar="F", help="TLS: client key (mqtts:// only)")
    a("--seed", type=int, metavar="N", help="random seed of the sim: source")
    a("--duration", type=float, metavar="S", help="stop after S seconds (demos and tests)")
    a("--log-level", default="info", choices=["debug", "info", "warning", "error"])


def _check(ok: bool, message: str) -> None:
    if not ok:
        raise ValueError(message)


def settings_from_args(args: argparse.Namespace, env: dict[str, str]) -> AgentSettings:
    """Validate the options; ``ValueError`` with a one-line reason naming the value."""
    _check(valid_site_id(args.site), f"--site {args.site!r} is not a valid site id "
           "([a-z0-9][a-z0-9-]{0,62})")
    _check(0.01 <= args.batch_s <= 3600, f"--batch-s {args.batch_s!r} must be in [0.01, 3600]")
    _check(args.max_batch_hits >= 1, f"--max-batch-hits {args.max_batch_hits!r} must be >= 1")
    _check(0.005 <= args.spool_max_mb <= 1e7,
           f"--spool-max-mb {args.spool_max_mb!r} must be in [0.005, 1e7]")
    _check(0 <= args.grace_s <= 60, f"--grace-s {args.grace_s!r} must be in [0, 60]")
    _check(args.stall_s == 0 or args.grace_s < args.stall_s <= 86400,
           f"--stall-s {args.stall_s!r} must be 0 or in (grace, 86400]")
    _check(5 <= args.keepalive_s <= 3600,
           f"--keepalive-s {args.keepalive_s!r} must be in [5, 3600]")
    _check(0 < args.status_s <= 3600, f"--status-s {args.status_s!r} must be in (0, 3600]")
    _check(args.duration is None or args.duration > 0,
           f"--duration {args.duration!r} must be positive")
    url = args.broker or env.get(ENV_URL)
    _check(url is not None, f"no broker: give --broker URL or set {ENV_URL}")
    password = None
    if args.password_env is not None:
        _check(args.password_env in env,
               f"--password-env {args.password_env!r}: no such environment variable")
        password = env[args.password_env]
    else:
        password = env.get(ENV_PASSWORD)
    for opt in ("ca_file", "cert_file", "key_file"):
        f = getattr(args, opt)
        flag = "--" + opt.replace("_", "-")
        if f is not None:
            _check(f.is_file(), f"{flag} {str(f)!r} does not exist")
            _check(str(url).startswith("mqtts://"), f"{flag} needs an mqtts:// broker, not {url!r}")
    try:
        broker = BrokerConfig(
            url=str(url),
            client_id=args.client_id or default_client_id(args.site),
            username=args.username or env.get(ENV_USER),
            password=password,
            ca_file=args.ca_file,
            cert_file=args.cert_file,
            key_file=args.key_file,
            keepalive_s=args.keepalive_s,
            topic_root=args.topic_root,
        )
    except ValidationError as exc:
        err = exc.errors()[0]
        loc = ".".join(str(x) for x in err["loc"])
        raise ValueError(f"broker option {loc}: {err['msg']}") from None
    spool = args.spool
    if spool is None:
        state = Path(env.get("XDG_STATE_HOME") or Path.home() / ".local" / "state")
        spool = state / "tocsin" / "spool" / args.site
    return AgentSettings(
        site=args.site,
        broker=broker,
        spool_dir=spool,
        batch_s=args.batch_s,
        max_batch_hits=args.max_batch_hits,
        spool_max_bytes=round(args.spool_max_mb * 1_000_000),
        status_every_s=args.status_s,
    )


def run(args: argparse.Namespace) -> int:
    settings = settings_from_args(args, dict(os.environ))
    logs.setup(args.log_level)
    source = open_source(
        args.source, SourceOptions(seed=args.seed, grace_s=args.grace_s, stall_s=args.stall_s)
    )
    if isinstance(source, UploadSource):
        n = upload_batches(source.hits, settings.batch_ns)
        _check(n <= MAX_UPLOAD_BATCHES,
               f"--source {args.source!r} spans {n} batches of {settings.batch_s:g} s, more than "
               f"{MAX_UPLOAD_BATCHES}: use a longer --batch-s or split the file")
    try:
        return asyncio.run(_main(settings, source, args.duration))
    except BaseExceptionGroup as eg:  # the agent's task group: report the first real cause
        raise _first_leaf(eg) from eg


async def _main(settings: AgentSettings, source: HitSource, duration: float | None) -> int:
    loop = asyncio.get_running_loop()
    agent = Agent(settings, source)
    for sig in (signal.SIGTERM, signal.SIGINT):  # kept until the shutdown is over
        loop.add_signal_handler(sig, agent.stop)
    try:
        async with agent:
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(agent.wait(), duration)
    finally:
        for sig in (signal.SIGTERM, signal.SIGINT):
            loop.remove_signal_handler(sig)
    return 0


def _first_leaf(eg: BaseExceptionGroup[Any]) -> BaseException:
    exc: BaseException = eg
    while isinstance(exc, BaseExceptionGroup):
        exc = exc.exceptions[0]
    return exc
