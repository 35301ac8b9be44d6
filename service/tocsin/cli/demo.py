"""``tocsin demo``: broker, 40 simulated sites, the service and an injected event, in one go."""

from __future__ import annotations

import argparse
import asyncio
import tempfile
from pathlib import Path
from typing import Any

from tocsin.live.demo import run_demo


def add_parser(sub: Any) -> None:
    p = sub.add_parser(
        "demo",
        help="the whole chain on one machine: broker, 40 simulated sites, service, an event",
        description=(
            "Start an embedded MQTT broker, 40 simulated site agents (the shipped invented "
            "network), and the service; inject a plane front (six to eight GPS-timed sites) "
            "about 20 s in; show the network's status and the candidate when it fires, then "
            "exit 0 (1 if it did not fire)."
        ),
    )
    p.add_argument(
        "--workdir",
        type=Path,
        help="where journal, candidates and spools go (default: a new temporary directory)",
    )
    p.add_argument("--keep-running", action="store_true", help="keep going until Ctrl-C")
    p.add_argument(
        "--seed",
        type=int,
        help="seed of the simulated detectors and the event (default: from the clock)",
    )
    p.add_argument(
        "--timeout",
        type=float,
        default=90.0,
        help="give up after this many seconds without the front's candidate (default 90)",
    )


def run(args: argparse.Namespace) -> int:
    if not args.timeout > 0:
        raise ValueError(f"--timeout {args.timeout!r} must be positive")
    workdir = args.workdir or Path(tempfile.mkdtemp(prefix="tocsin-demo-"))
    return asyncio.run(
        run_demo(workdir, keep_running=args.keep_running, timeout_s=args.timeout, seed=args.seed)
    )
