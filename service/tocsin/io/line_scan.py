"""Compiled reading of many recording lines at once, for replay.

A recording line of an agent's plain 1 s batch (``{"v":1,"site":"...","seq":N,
"live":[a,b],"t":[...],"recv_ns":R}``, keys in any order, JSON whitespace allowed)
is read by compiled passes over the bytes of a block of lines (numba, no Python
object per hit or per line): :func:`split_lines` finds and strips the lines,
:func:`scan_lines` reads each into int64 columns. Most of a replay's time outside
the engine went into building a Python dict, list and int per line and hit and
then checking them one by one; these passes do neither.

The pass takes only what it is sure of, and hands every other line back to the
ordinary way (:func:`tocsin.io.recording.decode_line`: orjson and the batch rules),
which alone decides and names a rejection. A line is taken only when all of this
holds, and otherwise handed back:

* one JSON object whose keys are some of ``v site seq live t recv_ns``, each at most
  once, with ``v site seq live t`` present, and nothing after its closing brace;
* ``v`` the integer 1; ``site`` a string of printable ASCII without escapes;
  ``seq``, both ``live`` ends, every hit time and ``recv_ns`` non-negative integers
  written plainly (no sign, fraction, exponent or leading zero) up to 2^63 - 1;
* ``live`` at most :data:`~tocsin.model.batch.MAX_LIVE_NS` long, not ending before
  it starts; hit times ascending inside it; at most
  :data:`~tocsin.model.batch.MAX_HITS_PER_BATCH` hits;
* and a site the registry knows (looked up in the same pass).

Every such line is one that ``decode_line`` accepts as the same batch (the same
site, sequence number, live interval, hit times and arrival time): the rules above
are a subset of JSON and of the batch rules. ``tests/test_line_scan.py`` holds the
two to that on generated and mutated lines.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Sequence
from typing import NamedTuple

import numpy as np

from tocsin.engine.jit import kernel
from tocsin.io.recording import Rejected, decode_line
from tocsin.model.batch import MAX_HITS_PER_BATCH, MAX_LIVE_NS, NO_RECV, BatchColumns, HitBatch
from tocsin.model.registry import SiteRegistry
from tocsin.types import I64Array

I64_MAX = 2**63 - 1
_CUT = (I64_MAX - 9) // 10
"""Largest value that can take one more digit without possibly passing 2^63 - 1."""

# bit of each key in the "seen" mask
_V, _SITE, _SEQ, _LIVE, _T, _RECV = 1, 2, 4, 8, 16, 32
_REQUIRED = _V | _SITE | _SEQ | _LIVE | _T

# per-line columns of the result (int64 matrix)
COL_OK, COL_SITE_A, COL_SITE_B, COL_SEQ, COL_LIVE0, COL_LIVE1 = 0, 1, 2, 3, 4, 5
COL_RECV, COL_T_A, COL_T_B, COL_SITE = 6, 7, 8, 9
N_COLS = 10


@kernel
def _skip_ws(buf: np.ndarray, i: int, end: int) -> int:
    """First position at or after ``i`` that is not JSON whitespace."""
    while i < end:
        c = buf[i]
        if c != 32 and c != 9 and c != 10 and c != 13:
            break
        i += 1
    return i


@kernel
def _uint(buf: np.ndarray, i: int, end: int) -> tuple[int, int]:
    """A plain non-negative integer at ``i``: (value, position after it), or
    (-1, i) when there is none, it is written otherwise (leading zero, fraction,
    exponent) or it passes 2^63 - 1."""
    j = i
    val = 0
    while j < end and 48 <= buf[j] <= 57:
        d = int(buf[j]) - 48
        if val > _CUT and val > (I64_MAX - d) // 10:
            return -1, i
        val = val * 10 + d
        j += 1
    if j == i or (buf[i] == 48 and j - i > 1):
        return -1, i
    if j < end:
        c = buf[j]
        if c == 46 or c == 101 or c == 69:  # '.', 'e', 'E': not an integer
            return -1, i
    return val, j


@kernel
def _key(buf: np.ndarray, a: int, b: int) -> int:
    """Bit of the key ``buf[a:b]`` (0 for any other key)."""
    n = b - a
    if n == 1 and buf[a] == 118:  # v
        return _V
    if n == 1 and buf[a] == 116:  # t
        return _T
    if n == 4 and buf[a] == 115 and buf[a + 1] == 105 and buf[a + 2] == 116 and buf[a + 3] == 101:
        return _SITE
    if n == 3 and buf[a] == 115 and buf[a + 1] == 101 and buf[a + 2] == 113:
        return _SEQ
    if n == 4 and buf[a] == 108 and buf[a + 1] == 105 and buf[a + 2] == 118 and buf[a + 3] == 101:
        return _LIVE
    if (
        n == 7
        and buf[a] == 114
        and buf[a + 1] == 101
        and buf[a + 2] == 99
        and buf[a + 3] == 118
        and buf[a + 4] == 95
        and buf[a + 5] == 110
        and buf[a + 6] == 115
    ):
        return _RECV
    return 0


@kernel
def _scan_one(
    buf: np.ndarray, i: int, end: int, row: np.ndarray, t_out: np.ndarray, t_used: int
) -> int:
    """Read one line ``buf[i:end]`` into ``row`` (its hit times from ``t_out[t_used]``
    on). Returns the hit times used (0 and ``row[COL_OK] = 0`` when the line is
    handed back)."""
    row[COL_OK] = 0
    row[COL_RECV] = NO_RECV
    i = _skip_ws(buf, i, end)
    if i >= end or buf[i] != 123:  # '{'
        return 0
    seen = 0
    n_t = 0
    live0 = 0
    live1 = 0
    while True:
        i = _skip_ws(buf, i + 1, end)
        if i >= end or buf[i] != 34:  # '"' opening a key
            return 0
        a = i + 1
        i = a
        while i < end and buf[i] != 34 and buf[i] != 92:
            i += 1
        if i >= end or buf[i] != 34:
            return 0
        bit = _key(buf, a, i)
        if bit == 0 or (seen & bit) != 0:
            return 0  # another key, or one given twice
        seen |= bit
        i = _skip_ws(buf, i + 1, end)
        if i >= end or buf[i] != 58:  # ':'
            return 0
        i = _skip_ws(buf, i + 1, end)
        if i >= end:
            return 0
        if bit == _SITE:
            if buf[i] != 34:
                return 0
            a = i + 1
            i = a
            while i < end and 32 <= buf[i] <= 126 and buf[i] != 34 and buf[i] != 92:
                i += 1
            if i >= end or buf[i] != 34:
                return 0
            row[COL_SITE_A] = a
            row[COL_SITE_B] = i
            i += 1
        elif bit == _LIVE:
            if buf[i] != 91:  # '['
                return 0
            live0, i = _uint(buf, _skip_ws(buf, i + 1, end), end)
            if live0 < 0:
                return 0
            i = _skip_ws(buf, i, end)
            if i >= end or buf[i] != 44:  # ','
                return 0
            live1, i = _uint(buf, _skip_ws(buf, i + 1, end), end)
            if live1 < 0:
                return 0
            i = _skip_ws(buf, i, end)
            if i >= end or buf[i] != 93:  # ']'
                return 0
            i += 1
        elif bit == _T:
            if buf[i] != 91:
                return 0
            i = _skip_ws(buf, i + 1, end)
            if i < end and buf[i] == 93:
                i += 1
            else:
                while True:
                    x, i = _uint(buf, i, end)
                    if x < 0 or n_t >= MAX_HITS_PER_BATCH:
                        return 0
                    t_out[t_used + n_t] = x
                    n_t += 1
                    i = _skip_ws(buf, i, end)
                    if i >= end:
                        return 0
                    if buf[i] == 93:
                        i += 1
                        break
                    if buf[i] != 44:
                        return 0
                    i = _skip_ws(buf, i + 1, end)
        else:  # v, seq, recv_ns: an integer
            x, i = _uint(buf, i, end)
            if x < 0 or (bit == _V and x != 1):
                return 0
            if bit == _SEQ:
                row[COL_SEQ] = x
            elif bit == _RECV:
                row[COL_RECV] = x
        i = _skip_ws(buf, i, end)
        if i >= end:
            return 0
        if buf[i] == 125:  # '}'
            break
        if buf[i] != 44:
            return 0
    if _skip_ws(buf, i + 1, end) != end or (seen & _REQUIRED) != _REQUIRED:
        return 0
    if live1 < live0 or live1 - live0 > MAX_LIVE_NS:
        return 0
    prev = live0
    for k in range(t_used, t_used + n_t):
        if t_out[k] < prev:
            return 0
        prev = t_out[k]
    if n_t > 0 and prev >= live1:
        return 0
    row[COL_LIVE0] = live0
    row[COL_LIVE1] = live1
    row[COL_T_A] = t_used
    row[COL_T_B] = t_used + n_t
    row[COL_OK] = 1
    return n_t


@kernel
def _compare(buf: np.ndarray, a: int, b: int, names: np.ndarray, na: int, nb: int) -> int:
    """-1, 0 or 1 as the bytes ``buf[a:b]`` sort before, equal or after ``names[na:nb]``
    (as Python compares bytes)."""
    n1 = b - a
    n2 = nb - na
    for i in range(min(n1, n2)):
        x = buf[a + i]
        y = names[na + i]
        if x != y:
            return -1 if x < y else 1
    return (n1 > n2) - (n1 < n2)


@kernel
def _site_index(
    buf: np.ndarray, a: int, b: int, names: np.ndarray, n_a: I64Array, n_b: I64Array, idx: I64Array
) -> int:
    """Index of the site whose name is ``buf[a:b]`` (binary search of the sorted names
    ``names[n_a[k]:n_b[k]]``, whose site indices are ``idx``); -1 for none."""
    lo = 0
    hi = idx.size
    while lo < hi:
        mid = (lo + hi) // 2
        c = _compare(buf, a, b, names, n_a[mid], n_b[mid])
        if c == 0:
            return int(idx[mid])
        if c > 0:
            lo = mid + 1
        else:
            hi = mid
    return -1


@kernel
def scan_lines(
    buf: np.ndarray,
    starts: I64Array,
    ends: I64Array,
    names: np.ndarray,
    n_a: I64Array,
    n_b: I64Array,
    idx: I64Array,
) -> tuple[I64Array, I64Array]:
    """Read lines ``buf[starts[k]:ends[k]]`` (uint8). Returns the (lines, N_COLS)
    column matrix (``COL_*``; ``COL_OK`` 0 for a line handed back, which includes a
    site not among the sorted names ``names[n_a[k]:n_b[k]]``, whose site indices are
    ``idx``: :func:`name_table`) and the hit times of the lines taken, each line's at
    ``[COL_T_A, COL_T_B)``."""
    n = starts.size
    rows = np.zeros((n, N_COLS), dtype=np.int64)
    # a hit time takes at least two bytes (a digit and a separator)
    t_out = np.empty(buf.size // 2 + 1, dtype=np.int64)
    used = 0
    for k in range(n):
        row = rows[k]
        got = _scan_one(buf, starts[k], ends[k], row, t_out, used)
        if row[COL_OK]:
            row[COL_SITE] = _site_index(buf, row[COL_SITE_A], row[COL_SITE_B], names, n_a, n_b, idx)
            if row[COL_SITE] < 0:  # not a known site: handed back
                row[COL_OK] = 0
                got = 0
        used += got
    return rows, t_out[:used]


@functools.lru_cache(maxsize=8)
def name_table(ids: tuple[str, ...]) -> tuple[np.ndarray, I64Array, I64Array, I64Array]:
    """The site ids as :func:`scan_lines` looks them up: their UTF-8 bytes sorted and
    joined, each one's start and end, and its site index."""
    enc = sorted((sid.encode(), k) for k, sid in enumerate(ids))
    size = np.array([len(e) for e, _ in enc], dtype=np.int64)
    n_b = np.cumsum(size)
    names = np.frombuffer(b"".join(e for e, _ in enc), dtype=np.uint8)
    return names, n_b - size, n_b, np.array([k for _, k in enc], dtype=np.int64)


def warm_up() -> None:
    """Load (or compile) the kernel now, on a tiny input (see
    :func:`tocsin.engine.slot_counts.warm_up`)."""
    one = np.zeros(1, dtype=np.int64)
    # read-only bytes, as scan_block passes them (numba compiles per signature)
    buf = np.frombuffer(b"{}", dtype=np.uint8)
    scan_lines(buf, one, one + 1, *name_table(("a",)))
    split_lines(buf)


@kernel
def split_lines(buf: np.ndarray) -> tuple[I64Array, I64Array, I64Array]:
    """The lines of ``buf`` (uint8; split at each newline, as a binary file is read),
    each stripped of ASCII whitespace as ``bytes.strip`` does; for the lines left
    non-empty: start, end and the line's index in ``buf`` (0-based, every line
    counted, blank ones too)."""
    n = buf.size
    n_lines = 1
    for i in range(n):
        if buf[i] == 10:
            n_lines += 1
    starts = np.empty(n_lines, dtype=np.int64)
    ends = np.empty(n_lines, dtype=np.int64)
    index = np.empty(n_lines, dtype=np.int64)
    kept = 0
    line = 0
    a = 0
    while a <= n:
        b = a
        while b < n and buf[b] != 10:
            b += 1
        lo, hi = a, b
        while lo < hi and (buf[lo] == 32 or 9 <= buf[lo] <= 13):
            lo += 1
        while hi > lo and (buf[hi - 1] == 32 or 9 <= buf[hi - 1] <= 13):
            hi -= 1
        if hi > lo:
            starts[kept] = lo
            ends[kept] = hi
            index[kept] = line
            kept += 1
        line += 1
        a = b + 1
    return starts[:kept], ends[:kept], index[:kept]


class ScannedChunk(NamedTuple):
    """A chunk of lines after :func:`scan_chunk` or :func:`scan_block`."""

    cols: BatchColumns
    """The batches of the lines the compiled pass took, in line order."""
    row_pos: I64Array
    """Position of each line in ``cols`` among the chunk's (non-empty) lines."""
    others: list[tuple[int, HitBatch | Rejected]]
    """(position, :func:`decode_line`'s answer) for every other line, in order."""


def _scan(
    data: bytes,
    starts: I64Array,
    ends: I64Array,
    registry: SiteRegistry,
    line_no: Callable[[int], int],
) -> ScannedChunk:
    """Lines ``data[starts[k]:ends[k]]``: the plain ones read by the compiled pass into
    columns, the others by :func:`decode_line` (numbered ``line_no(k)``)."""
    rows, t_all = scan_lines(
        np.frombuffer(data, dtype=np.uint8), starts, ends, *name_table(registry.ids)
    )
    t_all.flags.writeable = False
    row_pos = np.flatnonzero(rows[:, COL_OK])
    r = rows[row_pos]
    cols = BatchColumns(
        r[:, COL_SITE],
        r[:, COL_SEQ],
        r[:, COL_LIVE0],
        r[:, COL_LIVE1],
        r[:, COL_RECV],
        r[:, COL_T_A],
        r[:, COL_T_B],
        t_all,
    )
    taken = np.zeros(starts.size, dtype=bool)
    taken[row_pos] = True
    others: list[tuple[int, HitBatch | Rejected]] = [
        (k, decode_line(data[a:b], registry, line_no=line_no(k)))
        for k, a, b in zip(
            *(x.tolist() for x in (np.flatnonzero(~taken), starts[~taken], ends[~taken])),
            strict=True,
        )
    ]
    return ScannedChunk(cols, row_pos, others)


def scan_block(data: bytes, registry: SiteRegistry, first_line_no: int) -> ScannedChunk:
    """Read the lines of ``data`` (whole lines separated by newlines, the first one
    numbered ``first_line_no``), blank ones left out, as :func:`decode_line` reads
    each line stripped: a recording read a few megabytes at a time, without a Python
    object per line (module doc)."""
    starts, ends, index = split_lines(np.frombuffer(data, dtype=np.uint8))
    return _scan(data, starts, ends, registry, lambda k: first_line_no + int(index[k]))


def scan_chunk(
    lines: Sequence[bytes], registry: SiteRegistry, line_nos: Sequence[int]
) -> ScannedChunk:
    """Read ``lines`` (numbered ``line_nos``; each already stripped, none empty) as
    :func:`scan_block` does."""
    sizes = np.fromiter(map(len, lines), dtype=np.int64, count=len(lines))
    ends = np.cumsum(sizes + 1) - 1  # lines joined by one byte each
    return _scan(b"\n".join(lines), ends - sizes, ends, registry, line_nos.__getitem__)


def decode_lines(
    lines: Sequence[bytes], registry: SiteRegistry, line_nos: Sequence[int]
) -> list[HitBatch | Rejected]:
    """``[decode_line(x, registry, line_no=k) for x, k in zip(lines, line_nos)]``, by
    way of :func:`scan_chunk`. Each taken batch's hit times are a read-only view into
    one array per call."""
    scan = scan_chunk(lines, registry, line_nos)
    out: list[HitBatch | Rejected | None] = [None] * len(lines)
    ids = registry.ids
    for row, pos in enumerate(scan.row_pos.tolist()):
        out[pos] = scan.cols.batch(row, ids)
    for pos, item in scan.others:
        out[pos] = item
    return out  # type: ignore[return-value]
