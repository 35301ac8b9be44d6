"""Render a `tocsin tune` report in headless Chromium and save a screenshot.

A tool, not a test: it shows that the static page renders with its plots and no
server. Usage::

    .venv/bin/python bench/screenshot_report.py OUT/report.html /tmp/tune-report.png

Chromium comes from the Debian package (``apt-get install -y chromium``); the
browser runs with a fresh, empty profile directory and no network services.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

CHROMIUM = "/usr/bin/chromium"


def screenshot(page: Path, png: Path, *, width: int = 1400, height: int = 3000) -> None:
    """Save a ``width`` x ``height`` screenshot of ``page`` (a local HTML file) to ``png``."""
    exe = CHROMIUM if Path(CHROMIUM).exists() else shutil.which("chromium")
    if exe is None:
        raise SystemExit("chromium is not installed (apt-get install -y chromium)")
    with tempfile.TemporaryDirectory(prefix="tocsin-chromium-") as profile:
        cmd = [
            exe,
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            f"--user-data-dir={profile}",
            f"--screenshot={png}",
            f"--window-size={width},{height}",
            page.resolve().as_uri(),
        ]
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    if proc.returncode != 0 or not png.exists():
        raise SystemExit(f"chromium failed ({proc.returncode}): {proc.stderr[-2000:]}")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("report", type=Path, help="report.html written by tocsin tune")
    ap.add_argument("png", type=Path, help="screenshot to write (PNG)")
    ap.add_argument("--width", type=int, default=1400)
    ap.add_argument("--height", type=int, default=3000)
    args = ap.parse_args(argv)
    if not args.report.is_file():
        print(f"no report at {str(args.report)!r}", file=sys.stderr)
        return 2
    args.png.unlink(missing_ok=True)
    screenshot(args.report, args.png, width=args.width, height=args.height)
    print(f"screenshot {args.png} ({args.png.stat().st_size:,} bytes) of {args.report}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
