"""``tocsin serve``: the always-on service."""

from __future__ import annotations

import argparse
import asyncio
import logging
import signal
from pathlib import Path
from typing import Any

from tocsin.cli.main import COMMANDS
from tocsin.live import logs
from tocsin.live.embedded_broker import embedded_broker
from tocsin.live.logs import event
from tocsin.live.service import Service
from tocsin.model.service_config import load_service_config


def add_parser(sub: Any) -> None:
    p = sub.add_parser(
        "serve",
        help=COMMANDS["serve"][1],
        description=(
            "Subscribe to every site's hit batches over MQTT, validate them, journal them, "
            "run the trigger engine (the same as `tocsin replay`) and write candidates to "
            "DATA_DIR/candidates.jsonl. Prometheus metrics on the configured port. SIGTERM "
            "drains, checkpoints and exits 0; a restart resumes from the checkpoint and journal. "
            "With no [broker] table in the config, an embedded broker is started on "
            "127.0.0.1:1883 (for trials; use Mosquitto in production, see deploy/)."
        ),
    )
    p.add_argument("--config", type=Path, required=True, help="service config (TOML)")
    p.add_argument("--log-level", default="info", choices=["debug", "info", "warning", "error"])


def run(args: argparse.Namespace) -> int:
    cfg = load_service_config(args.config)
    logs.setup(args.log_level)
    return asyncio.run(_main(Service(cfg)))


async def _main(service: Service) -> int:
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, stop.set)
    m = service.cfg.metrics
    if m.port:
        service.metrics.serve(m.host, m.port)
    try:
        if service.cfg.broker is None:
            b = service.broker
            async with embedded_broker(b.host, b.port) as url:
                event(logging.getLogger("tocsin.serve"), "embedded_broker", url=url)
                await service.run(stop)
        else:
            await service.run(stop)
    finally:
        service.close()
    return 0
