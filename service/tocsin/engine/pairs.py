"""Vectorised neighbour search in a time-sorted hit stream.

For every seed hit, every hit of the stream within ``[t_seed - back, t_seed + ahead]``
becomes one (seed, neighbour) pair, built with ``np.repeat`` instead of a loop.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tocsin.types import I64Array


@dataclass(frozen=True, slots=True)
class Pairs:
    """Flat (seed, neighbour) index pairs, grouped by seed and, within a seed, by time."""

    seed: I64Array
    """Position of the seed in the caller's seed array."""
    nb: I64Array
    """Index of the neighbour hit in the stream."""
    counts: I64Array
    """Pairs of each seed (``np.repeat(x, counts)`` spreads a per-seed value over its pairs)."""


def window_pairs(
    t: I64Array, seed_t: I64Array, *, back_ns: int, ahead_ns: int, max_pairs: int = 50_000_000
) -> Pairs:
    """All stream hits within ``[seed_t - back_ns, seed_t + ahead_ns]`` of each seed.

    ``t`` must be sorted ascending. Raises ``MemoryError`` naming the count when
    more than ``max_pairs`` pairs would be built (the caller then splits its seeds).
    """
    left = np.searchsorted(t, seed_t - back_ns, side="left")
    right = np.searchsorted(t, seed_t + ahead_ns, side="right")
    counts = (right - left).astype(np.int64)
    total = int(counts.sum())
    if total > max_pairs:
        raise MemoryError(f"{total} seed-neighbour pairs exceed the limit of {max_pairs}")
    seed = np.repeat(np.arange(seed_t.size, dtype=np.int64), counts)
    # neighbour index = left[seed] + (position of the pair within its seed's run)
    nb = np.repeat(left.astype(np.int64) - (np.cumsum(counts) - counts), counts)
    nb += np.arange(total, dtype=np.int64)
    return Pairs(seed, nb, counts)
