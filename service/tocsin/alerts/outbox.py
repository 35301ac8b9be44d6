"""The packet directory: every alert's packet as ``<local id>.xml``, written atomically.

Synchronous and idempotent (a packet is written under a temporary name, fsynced,
then renamed over any earlier copy of the same bytes), so it is safe to redo after
a crash. Used by the service and by ``tocsin replay``.
"""

from __future__ import annotations

import datetime as dt
import os
from pathlib import Path

from tocsin.alerts.archive import Archive
from tocsin.alerts.policy import SINK_DIR


def packet_name(ivorn: str) -> str:
    """File name of a packet: the IVORN's local part (our local ids are file-name safe)."""
    local = ivorn.split("#", 1)[-1]
    if not local or "/" in local or local.startswith("."):
        raise ValueError(f"IVORN {ivorn!r} has no file-name-safe local part")
    return local + ".xml"


def write_packet(directory: Path, ivorn: str, xml: bytes) -> Path:
    """Write one packet atomically; return its path."""
    directory.mkdir(parents=True, exist_ok=True)
    path = directory / packet_name(ivorn)
    tmp = path.with_name("." + path.name + ".tmp")
    with open(tmp, "wb") as fh:
        fh.write(xml)
        fh.flush()
        os.fsync(fh.fileno())
    tmp.replace(path)
    return path


def flush_directory(archive: Archive, directory: Path) -> int:
    """Write every open ``dir`` delivery; mark it done. Returns how many were written."""
    n = 0
    for d, xml in archive.open_deliveries(SINK_DIR):
        if d.sink != SINK_DIR:
            continue
        write_packet(directory, d.ivorn, xml)
        archive.mark(d.ivorn, SINK_DIR, "done", dt.datetime.now(dt.UTC).isoformat())
        n += 1
    return n
