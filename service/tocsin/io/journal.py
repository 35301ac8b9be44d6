"""The service's journal: every valid batch it received, in arrival order, on disk.

Each line is a recording line (contract §4) with ``recv_ns``, so a journal is a
recording: ``tocsin replay`` over it gives the live service's candidates. Lines
are appended to segment files ``journal-<first recv_ns>.jsonl``; a new segment
starts when one exceeds ``segment_bytes``. :meth:`Journal.sync` flushes and
fsyncs; the service acknowledges MQTT messages only after that (group commit),
so an acknowledged batch is never lost.

A :class:`Position` (segment name, byte offset) marks how far a checkpoint got;
:func:`read_from` yields the lines after it, for recovery. :func:`prune` deletes
whole segments older than the service's retention, never one a restart needs.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

PREFIX = "journal-"
SUFFIX = ".jsonl"


@dataclass(frozen=True, slots=True)
class Position:
    """A place in the journal: segment file name and byte offset within it."""

    segment: str
    offset: int


class Journal:
    """Append-only, segmented, fsynced log of received batches."""

    def __init__(self, directory: Path, *, segment_bytes: int = 256 * 1024 * 1024) -> None:
        if segment_bytes < 1024:
            raise ValueError(f"segment_bytes={segment_bytes} is too small (>= 1024)")
        self.directory = directory
        self.directory.mkdir(parents=True, exist_ok=True)
        self.segment_bytes = segment_bytes
        self._fh: BinaryIO | None = None
        self._name: str | None = None
        self._size = 0
        self._dirty = False
        segs = segments(directory)
        if segs:
            self._open(segs[-1].name)

    def _open(self, name: str) -> None:
        if self._fh is not None:
            self._fh.close()
        path = self.directory / name
        if path.exists():
            _cut_torn_line(path)
        fh = open(path, "ab")  # noqa: SIM115 - held open for the journal's life
        self._size = fh.tell()
        self._fh, self._name = fh, name

    def append(self, line: bytes, recv_ns: int) -> Position:
        """Append one JSON line (without newline); returns the position after it."""
        if self._fh is None or self._size >= self.segment_bytes:
            self._open(f"{PREFIX}{recv_ns:020d}{SUFFIX}")
        assert self._fh is not None and self._name is not None
        self._fh.write(line)
        self._fh.write(b"\n")
        self._size += len(line) + 1
        self._dirty = True
        return Position(self._name, self._size)

    @property
    def position(self) -> Position | None:
        """Position after the last appended line (None for an empty journal)."""
        return None if self._name is None else Position(self._name, self._size)

    def sync(self) -> None:
        """Flush and fsync: everything appended so far survives a crash."""
        if self._fh is not None and self._dirty:
            self._fh.flush()
            os.fsync(self._fh.fileno())
            self._dirty = False

    def close(self) -> None:
        if self._fh is not None:
            self.sync()
            self._fh.close()
            self._fh = None


def segments(directory: Path) -> list[Path]:
    """Segment files in order."""
    return sorted(directory.glob(f"{PREFIX}*{SUFFIX}"))


def read_from(
    directory: Path, pos: Position | None, *, since_ns: int | None = None
) -> Iterator[bytes]:
    """Journal lines after ``pos`` (all of them for None), oldest first.

    ``since_ns`` (used without a position) skips whole segments that ended before
    that arrival time (GPS ns): a segment ends where the next one starts.
    A torn line (no newline: the process died mid-write) is skipped.
    """
    segs = segments(directory)
    for k, seg in enumerate(segs):
        if pos is not None and seg.name < pos.segment:
            continue
        ended = k + 1 < len(segs) and since_ns is not None and _first_recv(segs[k + 1]) <= since_ns
        if pos is None and ended:
            continue
        with open(seg, "rb") as fh:
            if pos is not None and seg.name == pos.segment:
                fh.seek(pos.offset)
            for line in fh:
                if line.endswith(b"\n") and line.strip():
                    yield line.rstrip(b"\n")


def prune(directory: Path, *, before_ns: int, keep: Position | None) -> list[Path]:
    """Delete the oldest segments that end at or before the arrival time ``before_ns``
    (GPS ns; a segment ends where the next one starts), oldest first; never the
    newest segment (being written), nor the segment of ``keep`` (where the latest
    checkpoint got to: a restart replays from there) or any after it. Returns the
    deleted paths."""
    segs = segments(directory)
    gone: list[Path] = []
    for k in range(len(segs) - 1):
        if keep is not None and segs[k].name >= keep.segment:
            break
        if _first_recv(segs[k + 1]) > before_ns:
            break
        segs[k].unlink()
        gone.append(segs[k])
    return gone


def _cut_torn_line(path: Path) -> None:
    """Drop a last line without its newline: the process died while writing it, before
    the fsync, so its message was never acknowledged and the broker sends it again."""
    data = path.read_bytes()
    if data and not data.endswith(b"\n"):
        keep = data.rfind(b"\n") + 1
        with open(path, "r+b") as fh:
            fh.truncate(keep)
            fh.flush()
            os.fsync(fh.fileno())


def _first_recv(seg: Path) -> int:
    """The arrival time (GPS ns) in a segment's name."""
    return int(seg.name[len(PREFIX) : -len(SUFFIX)])
