"""``tocsin demo``: broker, 40 simulated sites, the service and an injected event, in one go."""

from __future__ import annotations

import argparse
import asyncio
import tempfile
from pathlib import Path
from typing import Any

from tocsin.cli.main import COMMANDS
from tocsin.live.demo import run_demo, run_recording_demo
from tocsin.sim import shipped_registry


def add_parser(sub: Any) -> None:
    p = sub.add_parser(
        "demo",
        help=COMMANDS["demo"][1],
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
        "--recording",
        type=Path,
        help="instead of simulating, play this recording through the broker and the service",
    )
    p.add_argument(
        "--sites",
        type=Path,
        help="site registry of --recording (default: the shipped replay_data network)",
    )
    p.add_argument(
        "--speed",
        type=float,
        default=20.0,
        help="with --recording: multiple of real time to play it at (default 20)",
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
    if args.recording is not None:
        if not args.recording.is_file():
            raise FileNotFoundError(f"recording {str(args.recording)!r} does not exist")
        sites = args.sites
        if sites is None:
            workdir.mkdir(parents=True, exist_ok=True)
            sites = workdir / "network.toml"
            sites.write_text(shipped_registry().to_toml())
        return asyncio.run(run_recording_demo(workdir, args.recording, sites, speed=args.speed))
    return asyncio.run(
        run_demo(workdir, keep_running=args.keep_running, timeout_s=args.timeout, seed=args.seed)
    )
