"""The engine's unit of input: every site's final hits and live time over one span."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tocsin.types import GpsNs, I32Array, I64Array


@dataclass(frozen=True, slots=True)
class Block:
    """All final data of the network for ``[t_start, t_end)`` (GPS ns).

    ``t`` is sorted ascending and ``site`` gives each hit's site index. Live
    intervals are clipped to the block, non-overlapping per site, and every hit
    lies inside one of its site's intervals. A site with no interval in the
    block was dead for all of it.
    """

    t_start: GpsNs
    t_end: GpsNs
    t: I64Array
    site: I32Array
    live_site: I32Array
    live_start: I64Array
    live_end: I64Array

    def __post_init__(self) -> None:
        if self.t_end < self.t_start:
            raise ValueError(f"block ends ({self.t_end}) before it starts ({self.t_start})")
        if self.t.shape != self.site.shape:
            raise ValueError(f"{self.t.size} hit times but {self.site.size} site indices")
        if self.t.size and (int(self.t[0]) < self.t_start or int(self.t[-1]) >= self.t_end):
            raise ValueError(
                f"hits span [{int(self.t[0])}, {int(self.t[-1])}] outside block "
                f"[{self.t_start}, {self.t_end})"
            )

    @property
    def n_hits(self) -> int:
        return int(self.t.size)

    @staticmethod
    def empty(t_start: GpsNs, t_end: GpsNs) -> Block:
        """A block in which no site was live."""
        z64 = np.zeros(0, dtype=np.int64)
        z32 = np.zeros(0, dtype=np.int32)
        return Block(t_start, t_end, z64, z32, z32, z64, z64)
