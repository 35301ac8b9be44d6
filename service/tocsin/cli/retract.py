"""``tocsin retract IVORN --reason TEXT``: withdraw one of our alerts.

The retraction is archived at once (and its packet written to the packet directory);
a running ``tocsin serve`` with the same config delivers it to the MQTT topic and
the transport subscribers within a second or two, or at its next start.
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from tocsin.alerts.archive import Archive
from tocsin.alerts.outbox import flush_directory
from tocsin.alerts.policy import AlertDesk
from tocsin.cli.alerts import ARCHIVE_NAME
from tocsin.cli.main import COMMANDS
from tocsin.errors import ConfigError
from tocsin.model.service_config import load_service_config


def add_parser(sub: Any) -> None:
    p = sub.add_parser(
        "retract",
        help=COMMANDS["retract"][1],
        description=(
            "Archive a VOEvent retraction of IVORN (one of our alerts, or one of its updates) "
            "citing the original with cite='retraction' and carrying the reason. The running "
            "service delivers it to every sink the original reached."
        ),
    )
    p.add_argument("ivorn", help="IVORN of the alert to withdraw")
    p.add_argument("--reason", required=True, help="why (goes into the packet)")
    p.add_argument("--config", type=Path, required=True, help="service config (TOML)")


def run(args: argparse.Namespace) -> int:
    cfg = load_service_config(args.config)
    path = cfg.data_dir / ARCHIVE_NAME
    if not path.is_file():
        raise ConfigError(f"alert archive {str(path)!r} does not exist (no alerts yet)")
    a = cfg.alerts
    archive = Archive(path, stream=a.stream_ivorn, role=a.role)
    packet_dir = a.directory or cfg.data_dir / "alerts"
    subs = [e.name for e in a.transport.allow] if a.transport is not None else []
    try:
        desk = AlertDesk(a, archive, packet_dir=packet_dir, mqtt=True, subscribers=subs)
        row = desk.retract(args.ivorn, args.reason)
        flush_directory(archive, packet_dir)
        print(f"retraction {row.ivorn} archived; the service delivers it")
        return 0
    finally:
        archive.close()
