"""A bounded ring of the network's recent final data: hits and live intervals.

The live service keeps the last ``hours`` of accepted hits (every released
:class:`~tocsin.engine.block.Block`) so that an external alert can be searched
for in our own past data. Storage is a list of numpy chunks (one per block, or
merged chunks after :meth:`HitRing.compact`), never per-hit Python objects.

Memory: a hit costs 8 bytes (int64 GPS ns) + 2 bytes (int16 site index); a live
interval 8 + 8 + 2 bytes. Measured on the shipped scenario (``replay_data/``: 40
sites, 1.18 M hits per hour in ``demo.jsonl.gz``, 1 s batches): 14.6 MB per hour of
data, so about 350 MB for the default 24 h (:meth:`HitRing.nbytes` reports the
actual figure; ``followup_status.json`` shows it live).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tocsin.engine.block import Block
from tocsin.types import NS_PER_S, GpsNs, I64Array

MAX_SITES = 32767
"""Site indices are stored as int16."""


@dataclass(frozen=True, slots=True)
class _Chunk:
    t_start: int
    t_end: int
    t: I64Array
    site: np.ndarray  # int16
    live_site: np.ndarray  # int16
    live_start: I64Array
    live_end: I64Array


class HitRing:
    """The last ``hours`` of blocks (GPS ns), in time order; older data is dropped
    (a chunk goes once its end is more than ``hours`` before the newest data)."""

    def __init__(self, n_sites: int, *, hours: float) -> None:
        if not 0 < n_sites <= MAX_SITES:
            raise ValueError(f"n_sites {n_sites!r} must be in 1..{MAX_SITES}")
        if not hours > 0:
            raise ValueError(f"ring length {hours!r} h must be > 0")
        self.n_sites = n_sites
        self.span_ns = round(hours * 3600 * NS_PER_S)
        self._chunks: list[_Chunk] = []
        self._since_compact = 0

    # -- writing -------------------------------------------------------------
    def add(self, block: Block) -> None:
        """Append a released block (it must follow the previous one) and drop old data."""
        if self._chunks and block.t_start < self._chunks[-1].t_end:
            raise ValueError(
                f"block starts at {block.t_start}, before the ring's end {self._chunks[-1].t_end}"
            )
        self._chunks.append(
            _Chunk(
                int(block.t_start),
                int(block.t_end),
                np.asarray(block.t, dtype=np.int64),
                np.asarray(block.site, dtype=np.int16),
                np.asarray(block.live_site, dtype=np.int16),
                np.asarray(block.live_start, dtype=np.int64),
                np.asarray(block.live_end, dtype=np.int64),
            )
        )
        self._since_compact += 1
        if self._since_compact >= 256:
            self.compact()
        self._trim()

    def _trim(self) -> None:
        end = self._chunks[-1].t_end
        cut = end - self.span_ns
        drop = 0
        while drop < len(self._chunks) and self._chunks[drop].t_end <= cut:
            drop += 1
        if drop:
            del self._chunks[:drop]

    def compact(self) -> None:
        """Merge small chunks into larger ones (fewer arrays, same data).

        A merged chunk spans at most 1/16 of the ring, so the data held never
        exceeds ``hours`` by more than that plus one block.
        """
        merged: list[_Chunk] = []
        group: list[_Chunk] = []
        hits = 0
        for c in self._chunks:
            if group and (
                hits + c.t.size > 1 << 16 or c.t_end - group[0].t_start > self.span_ns // 16
            ):
                merged.append(_merge(group))
                group, hits = [], 0
            group.append(c)
            hits += c.t.size
        if group:
            merged.append(_merge(group))
        self._chunks = merged
        self._since_compact = 0

    # -- reading -------------------------------------------------------------
    @property
    def t_start(self) -> GpsNs | None:
        """Start of the oldest data held (GPS ns), None when empty."""
        return GpsNs(self._chunks[0].t_start) if self._chunks else None

    @property
    def t_end(self) -> GpsNs | None:
        """End of the newest data held (GPS ns): everything before it is final."""
        return GpsNs(self._chunks[-1].t_end) if self._chunks else None

    def nbytes(self) -> int:
        """Bytes held in the arrays."""
        return sum(
            c.t.nbytes
            + c.site.nbytes
            + c.live_site.nbytes
            + c.live_start.nbytes
            + c.live_end.nbytes
            for c in self._chunks
        )

    @property
    def n_hits(self) -> int:
        return sum(int(c.t.size) for c in self._chunks)

    def block(self, t0: GpsNs | None = None, t1: GpsNs | None = None) -> Block:
        """The data in ``[t0, t1)`` (clipped to what is held) as one :class:`Block`."""
        if not self._chunks:
            lo = 0 if t0 is None else t0
            return Block.empty(GpsNs(lo), GpsNs(max(lo, t1 or lo)))
        lo = max(self._chunks[0].t_start, self._chunks[0].t_start if t0 is None else t0)
        hi = min(self._chunks[-1].t_end, self._chunks[-1].t_end if t1 is None else t1)
        if hi <= lo:
            return Block.empty(GpsNs(lo), GpsNs(lo))
        sel = [c for c in self._chunks if c.t_end > lo and c.t_start < hi]
        t = np.concatenate([c.t for c in sel]) if sel else np.zeros(0, np.int64)
        s = np.concatenate([c.site for c in sel]) if sel else np.zeros(0, np.int16)
        m = (t >= lo) & (t < hi)
        ls = np.concatenate([c.live_site for c in sel]) if sel else np.zeros(0, np.int16)
        l0 = np.concatenate([c.live_start for c in sel]) if sel else np.zeros(0, np.int64)
        l1 = np.concatenate([c.live_end for c in sel]) if sel else np.zeros(0, np.int64)
        l0c, l1c = np.maximum(l0, lo), np.minimum(l1, hi)
        keep = l1c > l0c
        return Block(
            GpsNs(lo),
            GpsNs(hi),
            t[m],
            s[m].astype(np.int32),
            ls[keep].astype(np.int32),
            l0c[keep],
            l1c[keep],
        )


def _merge(group: list[_Chunk]) -> _Chunk:
    if len(group) == 1:
        return group[0]
    return _Chunk(
        group[0].t_start,
        group[-1].t_end,
        np.concatenate([g.t for g in group]),
        np.concatenate([g.site for g in group]),
        np.concatenate([g.live_site for g in group]),
        np.concatenate([g.live_start for g in group]),
        np.concatenate([g.live_end for g in group]),
    )
