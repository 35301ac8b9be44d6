"""A real Mosquitto broker for tests: started on a free loopback port, restartable.

Tests that need it use the ``mosquitto`` fixture (marker ``broker``). The broker
keeps persistent sessions on disk (``persistence true``) so that a stop/start
keeps queued QoS 1 messages, as in production.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import time
from pathlib import Path

MOSQUITTO = shutil.which("mosquitto") or "/usr/sbin/mosquitto"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Mosquitto:
    """One broker process. ``extra`` lines are appended to its configuration."""

    def __init__(self, workdir: Path, *, port: int | None = None, extra: str = "") -> None:
        self.workdir = workdir
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.port = port or free_port()
        self.conf = workdir / "mosquitto.conf"
        self.log = workdir / "mosquitto.log"
        (workdir / "db").mkdir(exist_ok=True)
        self.conf.write_text(
            "\n".join(
                [
                    f"listener {self.port} 127.0.0.1",
                    # started as root, mosquitto would switch to its own user and then
                    # could not write the test's temporary directory
                    "user root" if os.geteuid() == 0 else "",
                    "persistence true",
                    f"persistence_location {workdir / 'db'}/",
                    "autosave_interval 1",
                    "max_queued_messages 1000000",
                    "max_inflight_messages 100",
                    f"log_dest file {self.log}",
                    "log_type error",
                    "log_type warning",
                    "log_type notice",
                    extra if "allow_anonymous" in extra else "allow_anonymous true\n" + extra,
                ]
            )
            + "\n"
        )
        self.proc: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"mqtt://127.0.0.1:{self.port}"

    def start(self, timeout_s: float = 10.0) -> None:
        if self.proc is not None and self.proc.poll() is None:
            return
        with open(self.workdir / "stderr.txt", "ab") as err_fh:
            self.proc = subprocess.Popen(
                [MOSQUITTO, "-c", str(self.conf)], stdout=subprocess.DEVNULL, stderr=err_fh
            )
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                err = (self.workdir / "stderr.txt").read_text(errors="replace")
                raise RuntimeError(f"mosquitto exited at start: {err} (see {self.log})")
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=0.2):
                    return
            except OSError:
                time.sleep(0.05)
        raise RuntimeError(f"mosquitto did not listen on port {self.port} within {timeout_s} s")

    def stop(self) -> None:
        """Clean shutdown (SIGTERM): the broker saves its persistent state."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.proc = None

    def restart(self) -> None:
        self.stop()
        self.start()
