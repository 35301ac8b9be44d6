"""Recordings (contract §4): one JSON hit batch per line, optional gzip, optional ``recv_ns``."""

from __future__ import annotations

import gzip
import io
import itertools
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

import orjson

from tocsin.errors import BatchRejected
from tocsin.model.batch import HitBatch, parse_batch
from tocsin.model.registry import SiteRegistry


@dataclass(frozen=True, slots=True)
class Rejected:
    """A recording line that could not be used, with the line number (1-based)."""

    line_no: int
    reason: str
    field: str
    detail: str


def open_text(path: str | Path, mode: str = "rt") -> IO[Any]:
    """Open a recording for reading or writing; ``.gz`` means gzip."""
    p = Path(path)
    if p.suffix == ".gz":
        return gzip.open(p, mode)  # type: ignore[return-value]
    return open(p, mode, encoding="utf-8" if "b" not in mode else None)


def read_recording(path: str | Path, registry: SiteRegistry) -> Iterator[HitBatch | Rejected]:
    """Yield each line of a recording as a validated batch or a :class:`Rejected` record.

    A bad line never stops the iteration: it is reported and reading goes on.
    """
    with open_text(path, "rb") as fh:
        for k, raw in enumerate(fh, start=1):
            line = raw.strip()
            if not line:
                continue
            yield decode_line(line, registry, line_no=k)


BLOCK_BYTES = 4 << 20
"""Bytes of a recording read at a time by :func:`read_blocks`."""
BLOCK_LINES = 16384
"""Lines joined into one block by :func:`join_lines` (~5 MB of an agent's 1 s batches)."""


def read_blocks(fh: IO[bytes], size: int = BLOCK_BYTES) -> Iterator[tuple[bytes, int]]:
    """A binary file as blocks of whole lines: ``(data, number of its first line)``,
    ``data`` without its last newline, about ``size`` bytes each (a line longer than
    that makes its block longer). Lines are counted from 1, blank ones too, as
    ``enumerate(fh, start=1)`` counts them."""
    carry = b""
    line_no = 1
    while True:
        data = fh.read(size)
        if not data:
            if carry:
                yield carry, line_no
            return
        data = carry + data
        cut = data.rfind(b"\n")
        if cut < 0:
            carry = data
            continue
        block, carry = data[:cut], data[cut + 1 :]
        yield block, line_no
        line_no += block.count(b"\n") + 1


def join_lines(lines: Iterable[bytes], per_block: int = BLOCK_LINES) -> Iterator[tuple[bytes, int]]:
    """Lines (without newlines) as blocks of :func:`read_blocks`'s form, ``per_block``
    lines each, numbered from 1."""
    it = iter(lines)
    line_no = 1
    while True:
        part = list(itertools.islice(it, per_block))
        if not part:
            return
        yield b"\n".join(part), line_no
        line_no += len(part)


def decode_line(line: bytes, registry: SiteRegistry, *, line_no: int = 0) -> HitBatch | Rejected:
    """Decode one recording line (JSON object, optional ``recv_ns``)."""
    try:
        obj = orjson.loads(line)
    except orjson.JSONDecodeError as exc:
        return Rejected(line_no, "bad_json", "<line>", f"not JSON: {exc}")
    recv = obj.pop("recv_ns", None) if isinstance(obj, dict) else None
    if recv is not None and (not isinstance(recv, int) or isinstance(recv, bool) or recv < 0):
        return Rejected(
            line_no, "bad_schema", "recv_ns", f"recv_ns {recv!r} is not a non-negative integer"
        )
    try:
        return parse_batch(obj, registry, recv_ns=recv)
    except BatchRejected as exc:
        return Rejected(line_no, exc.reason, exc.field, exc.detail)


def write_recording(path: str | Path, batches: Iterable[HitBatch]) -> int:
    """Write batches (in the given order) as a recording; returns the number of lines."""
    n = 0
    p = Path(path)
    with open(p, "wb") as raw:
        # gzip with no name and no time stamp in its header: same input, same bytes
        fh: gzip.GzipFile | io.BufferedWriter = (
            gzip.GzipFile(filename="", mode="wb", fileobj=raw, mtime=0)
            if p.suffix == ".gz"
            else raw
        )
        try:
            for b in batches:
                fh.write(orjson.dumps(b.to_json_obj()))
                fh.write(b"\n")
                n += 1
        finally:
            if fh is not raw:
                fh.close()
    return n
