"""A bounded, ordered, crash-safe disk spool of numbered records (the agent's outbox).

Layout of a spool directory (one per site; an exclusive ``flock`` on the
directory keeps a second agent out)::

    state.json                      {"v": 1, "site", "next_seq", "acked", "last_mark"}
    seg-00000000000000000042.log    records, the number is the first record's seq

A segment is a run of records, each a 28-byte header and a payload::

    magic  4 bytes  b"TSp1"
    length uint32   payload bytes                     (all little-endian)
    seq    uint64   record number (strictly increasing through the spool)
    mark   int64    the caller's number (the agent stores the batch's live end, GPS ns)
    crc    uint32   CRC-32 of length, seq, mark and payload
    payload

Durability: :meth:`Spool.put` only stages a record; :meth:`Spool.sync` writes
every staged record and ``fsync``\\ s the touched segments (and the directory
when a segment was created) — one ``fsync`` per group of records (group
commit). Only synced records are visible to readers (:meth:`read`,
:meth:`first_pending`), so nothing is sent that a crash could take back. A
record is removed by :meth:`ack`; :meth:`commit` then saves the state file
(written to a temporary file, fsynced, renamed) and deletes segments whose
records are all acknowledged. A crash between an ack and the next commit only
means that a few acknowledged records are sent again (receivers de-duplicate
by ``seq``).

Recovery: at open every segment is read and checked record by record; the
first record that is cut short (a crash in the middle of a write) or fails its
CRC ends that segment, which is truncated there. Earlier records are kept; the
bytes cut off are reported in :attr:`Spool.recovery`. ``next_seq`` is the larger
of the state file's and the last intact record's seq + 1, so a seq is never
used twice for records that a reader could have seen.

Bound: the bytes of all segment files plus staged records never exceed
``max_bytes``; :meth:`put` refuses (returns False) a record that would not fit.
Acknowledged records still take space until their whole segment is acknowledged
and committed; segments are ``max_bytes / 16`` (at least 64 KiB or a quarter of
the bound, at most 8 MiB) so that this slack is small.

Threads: one *writer* (``put``, ``sync``, ``commit``, ``close``; the agent runs
``sync`` and ``commit`` in a worker thread) and one *reader* (``read``, ``ack``,
``first_pending``, ``next_pending``) in the event loop may work at the same time; the
shared index is guarded by a lock that is never held across an ``fsync``.
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import re
import struct
import threading
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import orjson

from tocsin.errors import TocsinError

MAGIC = b"TSp1"
_HEADER = struct.Struct("<4sIQqI")
HEADER_BYTES = _HEADER.size  # 28
MAX_RECORD_BYTES = 256 * 1024 * 1024
"""Largest payload accepted (a batch of a million hits is about 20 MB of JSON)."""
STATE_FILE = "state.json"
_SEG_RE = re.compile(r"^seg-(\d{20})\.log$")


class SpoolError(TocsinError):
    """The spool directory cannot be used (locked, another site's, unreadable state)."""


@dataclass(frozen=True, slots=True)
class Recovery:
    """What :class:`Spool` found when it opened its directory."""

    records: int
    """Intact records found in the segments (acknowledged or not)."""
    pending: int
    """Of those, records not yet acknowledged (they will be sent)."""
    discarded_bytes: int
    """Bytes cut off after a damaged or partial record (0 after a clean stop)."""
    damaged_segments: tuple[str, ...]
    """File names of the segments that were truncated."""


@dataclass(frozen=True, slots=True)
class Record:
    seq: int
    mark: int
    payload: bytes


@dataclass(slots=True)
class _Segment:
    path: Path
    fd: int
    first_seq: int
    last_seq: int
    size: int


@dataclass(frozen=True, slots=True)
class _Entry:
    seg: _Segment
    offset: int
    length: int


def _crc(length: int, seq: int, mark: int, payload: bytes) -> int:
    return zlib.crc32(payload, zlib.crc32(struct.pack("<IQq", length, seq, mark)))


def encode_record(seq: int, mark: int, payload: bytes) -> bytes:
    """One record as written to a segment (header + payload)."""
    n = len(payload)
    return _HEADER.pack(MAGIC, n, seq, mark, _crc(n, seq, mark, payload)) + payload


def scan_segment(data: bytes, after_seq: int = -1) -> tuple[list[tuple[int, int, int, int]], int]:
    """Intact records of one segment's bytes, in order, and the length they cover.

    Returns ``([(seq, mark, payload_offset, payload_length), ...], good_bytes)``.
    Scanning stops at the first record that is cut short, has a bad magic or
    CRC, or whose seq is not above the previous one (``after_seq`` to start with).
    """
    out: list[tuple[int, int, int, int]] = []
    off, end, prev = 0, len(data), after_seq
    while end - off >= HEADER_BYTES:
        magic, n, seq, mark, crc = _HEADER.unpack_from(data, off)
        p = off + HEADER_BYTES
        if magic != MAGIC or n > MAX_RECORD_BYTES or p + n > end or seq <= prev:
            break
        if _crc(n, seq, mark, data[p : p + n]) != crc:
            break
        out.append((seq, mark, p, n))
        prev = seq
        off = p + n
    return out, off


def _segments(directory: Path) -> list[tuple[int, Path]]:
    found = []
    for p in directory.iterdir():
        m = _SEG_RE.match(p.name)
        if m:
            found.append((int(m.group(1)), p))
    return sorted(found)


def _read_state(directory: Path) -> dict[str, Any]:
    p = directory / STATE_FILE
    try:
        obj = orjson.loads(p.read_bytes())
    except FileNotFoundError:
        return {}
    except orjson.JSONDecodeError as exc:
        raise SpoolError(f"spool state {str(p)!r} is not valid JSON: {exc}") from exc
    ok = (
        isinstance(obj, dict)
        and obj.get("v") == 1
        and all(isinstance(obj.get(k), int) for k in ("next_seq", "acked"))
    )
    if not ok:
        raise SpoolError(f"spool state {str(p)!r} is not a version 1 spool state: {obj!r}")
    return dict(obj)


def read_pending(directory: str | Path) -> list[Record]:
    """The records a spool would still send, read without locking or changing anything.

    For inspection (and tests) while an agent may be writing: a record being
    written is simply not seen yet.
    """
    d = Path(directory)
    acked = int(_read_state(d).get("acked", -1)) if (d / STATE_FILE).exists() else -1
    out: list[Record] = []
    prev = -1
    for _, path in _segments(d):
        data = path.read_bytes()
        recs, _ = scan_segment(data, prev)
        for seq, mark, p, n in recs:
            if seq > acked:
                out.append(Record(seq, mark, data[p : p + n]))
        if recs:
            prev = recs[-1][0]
    return out


class Spool:
    """An ordered outbox of numbered records on disk (see the module doc).

    ``max_bytes`` bounds the directory's segment files; ``segment_bytes``
    (default: see the module doc) is the size at which a new segment file is started.
    ``site`` is stored in the state file and must match when the directory is opened again.
    """

    def __init__(
        self,
        directory: str | Path,
        *,
        site: str,
        max_bytes: int,
        segment_bytes: int | None = None,
    ) -> None:
        if max_bytes < 4096:
            raise ValueError(f"spool bound {max_bytes!r} bytes is below the minimum of 4096")
        if segment_bytes is None:
            small = min(64 * 1024, max_bytes // 4)
            segment_bytes = max(1024, min(max(max_bytes // 16, small), 8 * 1024 * 1024))
        if not 1024 <= segment_bytes <= max_bytes:
            raise ValueError(
                f"segment size {segment_bytes!r} bytes must be between 1024 and the bound "
                f"{max_bytes} bytes"
            )
        self.directory = Path(directory)
        self.site = site
        self.max_bytes = max_bytes
        self.segment_bytes = segment_bytes
        self._lock = threading.Lock()
        self._segments: list[_Segment] = []
        self._entries: dict[int, _Entry] = {}  # synced, unacknowledged; in seq order
        self._staged: list[tuple[int, int, bytes]] = []  # (seq, mark, encoded record)
        self._staged_bytes = 0
        self._closed = False
        try:
            self.directory.mkdir(parents=True, exist_ok=True)
            self._dir_fd = os.open(self.directory, os.O_RDONLY | os.O_DIRECTORY)
        except OSError as exc:
            raise SpoolError(f"spool directory {str(self.directory)!r}: {exc.strerror}") from exc
        try:
            fcntl.flock(self._dir_fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(self._dir_fd)
            raise SpoolError(
                f"spool directory {str(self.directory)!r} is in use by another agent"
            ) from None
        try:
            self.recovery = self._recover()
        except BaseException:
            self._release()
            raise

    # -- opening -------------------------------------------------------------
    def _recover(self) -> Recovery:
        state = _read_state(self.directory)
        if state and state.get("site") != self.site:
            raise SpoolError(
                f"spool directory {str(self.directory)!r} belongs to site "
                f"{state.get('site')!r}, not {self.site!r}"
            )
        acked = int(state.get("acked", -1))
        next_seq = int(state.get("next_seq", 0))
        last_mark = state.get("last_mark")
        n_records, discarded, damaged = 0, 0, []
        prev = -1
        for _, path in _segments(self.directory):
            data = path.read_bytes()
            recs, good = scan_segment(data, prev)
            if good < len(data):
                discarded += len(data) - good
                damaged.append(path.name)
                os.truncate(path, good)
            if not recs:
                path.unlink()
                continue
            fd = os.open(path, os.O_RDWR | os.O_APPEND)
            seg = _Segment(path, fd, recs[0][0], recs[-1][0], good)
            self._segments.append(seg)
            for seq, mark, p, n in recs:
                if seq > acked:
                    self._entries[seq] = _Entry(seg, p - HEADER_BYTES, n)
                last_mark = mark
            n_records += len(recs)
            prev = recs[-1][0]
        if damaged:
            os.fsync(self._dir_fd)
            for s in self._segments:
                os.fsync(s.fd)
        self._next_seq = max(next_seq, prev + 1)
        self._durable_next = self._next_seq
        self._last_mark: int | None = None if last_mark is None else int(last_mark)
        self._durable_mark = self._last_mark
        self._saved: tuple[int, int] = (next_seq, acked)
        return Recovery(n_records, len(self._entries), discarded, tuple(damaged))

    # -- writer side -----------------------------------------------------------
    @property
    def next_seq(self) -> int:
        """The seq the next record must carry."""
        return self._next_seq

    @property
    def last_mark(self) -> int | None:
        """``mark`` of the last record ever put (kept in the state file), or None."""
        return self._last_mark

    @property
    def disk_bytes(self) -> int:
        """Bytes of segment files plus staged records: what the bound applies to."""
        return sum(s.size for s in self._segments) + self._staged_bytes

    def room_for(self, payload_bytes: int) -> bool:
        return self.disk_bytes + HEADER_BYTES + payload_bytes <= self.max_bytes

    def put(self, seq: int, payload: bytes, *, mark: int) -> bool:
        """Stage a record; False (nothing changes) if it would break the bound.

        ``seq`` must equal :attr:`next_seq`. The record is durable and visible
        to readers only after :meth:`sync`.
        """
        self._check_open()
        if seq != self._next_seq:
            raise ValueError(f"record seq {seq!r} is not the spool's next seq {self._next_seq}")
        if len(payload) > MAX_RECORD_BYTES:
            raise ValueError(f"record of {len(payload)} bytes exceeds {MAX_RECORD_BYTES} bytes")
        if not self.room_for(len(payload)):
            return False
        rec = encode_record(seq, mark, payload)
        self._staged.append((seq, mark, rec))
        self._staged_bytes += len(rec)
        self._next_seq = seq + 1
        self._last_mark = mark
        return True

    @property
    def staged(self) -> int:
        """Records put but not yet synced."""
        return len(self._staged)

    def sync(self) -> int:
        """Write the staged records and fsync them (one group commit); return how many."""
        self._check_open()
        staged, self._staged = self._staged, []
        if not staged:
            return 0
        touched: dict[int, _Segment] = {}
        new: list[tuple[int, _Entry]] = []
        created = False
        for seq, _mark, rec in staged:
            seg = self._segments[-1] if self._segments else None
            if seg is None or (seg.size > 0 and seg.size + len(rec) > self.segment_bytes):
                seg = self._new_segment(seq)
                created = True
            os.write(seg.fd, rec)  # O_APPEND: one write per record
            new.append((seq, _Entry(seg, seg.size, len(rec) - HEADER_BYTES)))
            seg.size += len(rec)
            seg.last_seq = seq
            touched[seg.fd] = seg
        self._staged_bytes = 0
        for fd in touched:
            os.fsync(fd)
        if created:
            os.fsync(self._dir_fd)
        with self._lock:
            for seq, entry in new:
                self._entries[seq] = entry
            self._durable_next = staged[-1][0] + 1
            self._durable_mark = staged[-1][1]
        return len(staged)

    def _new_segment(self, first_seq: int) -> _Segment:
        path = self.directory / f"seg-{first_seq:020d}.log"
        fd = os.open(path, os.O_RDWR | os.O_APPEND | os.O_CREAT | os.O_TRUNC, 0o644)
        seg = _Segment(path, fd, first_seq, first_seq, 0)
        with self._lock:
            self._segments.append(seg)
        return seg

    def commit(self) -> int:
        """Save the state file if it changed and delete fully acknowledged segments.

        Returns the number of segment files deleted.
        """
        self._check_open()
        with self._lock:
            first = next(iter(self._entries), self._durable_next)
            acked = first - 1
            done = [s for s in self._segments if s.last_seq <= acked]
        if (self._durable_next, acked) != self._saved:
            self._write_state(self._durable_next, acked, self._durable_mark)
        for s in done:
            with self._lock:
                self._segments.remove(s)
            os.close(s.fd)
            with contextlib.suppress(FileNotFoundError):
                s.path.unlink()
        if done:
            os.fsync(self._dir_fd)
        return len(done)

    def reclaimable(self) -> bool:
        """True if :meth:`commit` would delete a segment (all its records acknowledged)."""
        with self._lock:
            first = next(iter(self._entries), self._durable_next)
            return bool(self._segments) and self._segments[0].last_seq < first

    def _write_state(self, next_seq: int, acked: int, mark: int | None) -> None:
        obj = {"v": 1, "site": self.site, "next_seq": next_seq, "acked": acked, "last_mark": mark}
        tmp = self.directory / (STATE_FILE + ".tmp")
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
        try:
            os.write(fd, orjson.dumps(obj) + b"\n")
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, self.directory / STATE_FILE)
        os.fsync(self._dir_fd)
        self._saved = (next_seq, acked)

    def close(self) -> None:
        """Sync what is staged, commit, release the files and the directory lock."""
        if self._closed:
            return
        try:
            self.sync()
            self.commit()
        finally:
            self._release()

    def _release(self) -> None:
        self._closed = True
        for s in self._segments:
            with contextlib.suppress(OSError):
                os.close(s.fd)
        self._segments = []
        with contextlib.suppress(OSError):
            os.close(self._dir_fd)  # also drops the flock

    def _check_open(self) -> None:
        if self._closed:
            raise SpoolError(f"spool {str(self.directory)!r} is closed")

    # -- reader side -------------------------------------------------------------
    @property
    def pending(self) -> int:
        """Synced records not yet acknowledged."""
        return len(self._entries)

    @property
    def durable_next(self) -> int:
        """One past the last synced seq: every pending seq below it can be read."""
        return self._durable_next

    def first_pending(self) -> int | None:
        """The lowest synced, unacknowledged seq (None if there is none)."""
        with self._lock:
            return next(iter(self._entries), None)

    def next_pending(self, after: int) -> int | None:
        """The lowest synced, unacknowledged seq that is >= ``after``."""
        with self._lock:
            first = next(iter(self._entries), None)
            if first is None:
                return None
            seq = max(after, first)
            while seq < self._durable_next:
                if seq in self._entries:
                    return seq
                seq += 1
            return None

    def is_pending(self, seq: int) -> bool:
        return seq in self._entries

    def read(self, seq: int) -> bytes:
        """Payload of a pending record (``KeyError`` naming the seq if it is not pending)."""
        with self._lock:
            e = self._entries.get(seq)
            if e is None:
                raise KeyError(f"record seq {seq} is not pending in the spool")
            data = os.pread(e.seg.fd, HEADER_BYTES + e.length, e.offset)
        return data[HEADER_BYTES:]

    def ack(self, seq: int) -> bool:
        """Mark a record as delivered; False if it was not pending (already acknowledged)."""
        with self._lock:
            return self._entries.pop(seq, None) is not None
