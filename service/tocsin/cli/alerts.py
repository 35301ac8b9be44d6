"""``tocsin alerts``: list archived alerts as a table, or show one alert's packet."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from tocsin.alerts.archive import Archive
from tocsin.cli.main import COMMANDS
from tocsin.errors import ConfigError
from tocsin.model.service_config import load_service_config

ARCHIVE_NAME = "alerts.sqlite"


def add_parser(sub: Any) -> None:
    p = sub.add_parser(
        "alerts",
        help=COMMANDS["alerts"][1],
        description=(
            "List the alerts in an archive (newest first) with their deliveries, or print one "
            "alert's VOEvent packet. The archive is DATA_DIR/alerts.sqlite of a service config, "
            "or any archive file (e.g. a replay's DIR/alerts.sqlite)."
        ),
    )
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--config", type=Path, help="service config (TOML)")
    src.add_argument("--archive", type=Path, help="archive file (alerts.sqlite)")
    p.add_argument("--show", metavar="IVORN", help="print this alert's packet (XML)")
    p.add_argument(
        "--sky-plot",
        metavar="PNG",
        type=Path,
        help="with --show: also draw the alert's localisation (error ellipses) to this file",
    )
    p.add_argument("--limit", type=int, default=50, help="rows in the table (default 50)")


def archive_path(args: argparse.Namespace) -> Path:
    if args.archive is not None:
        path: Path = args.archive
    else:
        path = load_service_config(args.config).data_dir / ARCHIVE_NAME
    if not path.is_file():
        raise ConfigError(f"alert archive {str(path)!r} does not exist")
    return path


def open_existing(path: Path) -> Archive:
    """Open an archive with the stream and role it already holds."""
    import sqlite3

    db = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        meta = dict(db.execute("SELECT key, value FROM meta").fetchall())
    except sqlite3.DatabaseError as exc:
        raise ConfigError(f"{str(path)!r} is not a Tocsin alert archive: {exc}") from exc
    finally:
        db.close()
    return Archive(path, stream=meta["stream"], role=meta["role"])


def run(args: argparse.Namespace) -> int:
    if args.sky_plot is not None and not args.show:
        raise ConfigError("--sky-plot needs --show IVORN (the alert to draw)")
    arch = open_existing(archive_path(args))
    try:
        if args.show:
            row = arch.get(args.show)
            if row is None:
                raise ConfigError(f"no archived alert has IVORN {args.show!r}")
            sys.stdout.write(row.xml.decode())
            sys.stdout.write("\n")
            if args.sky_plot is not None:
                from tocsin.alerts.packet import read_alert
                from tocsin.alerts.skyplot import sky_plot

                png = sky_plot(read_alert(row.xml))
                args.sky_plot.parent.mkdir(parents=True, exist_ok=True)
                args.sky_plot.write_bytes(png)
                print(f"sky plot written to {args.sky_plot}", file=sys.stderr)
            return 0
        rows = arch.latest(args.limit)
        table = [
            ("seq", "ivorn", "kind", "level", "status", "far/yr", "created (UTC)", "delivered")
        ]
        for r in rows:
            ds = arch.deliveries(r.ivorn)
            done = sum(d.state == "done" for d in ds)
            table.append(
                (
                    str(r.seq),
                    r.ivorn,
                    r.kind,
                    r.level,
                    r.status,
                    "-" if r.far_per_year is None else f"{r.far_per_year:.3g}",
                    r.created_utc[:19],
                    f"{done}/{len(ds)}",
                )
            )
        widths = [max(len(t[i]) for t in table) for i in range(len(table[0]))]
        for cells in table:
            print("  ".join(c.ljust(w) for c, w in zip(cells, widths, strict=True)).rstrip())
        if not rows:
            print("(no alerts)")
        return 0
    finally:
        arch.close()
