"""Compiled count of the distinct sites in each seed's forward slots.

The ``sites`` statistic needs, for every seed hit, the number ``k`` of other sites
whose earliest hit lies in their slot ``[t_seed + lo, t_seed + hi]`` (pair-dependent
edges, see :class:`tocsin.engine.coincidence.SlotGeometry`). Its tables then say
whether the seed can pass at all; for almost none it can, and only those need the
offsets and the Fisher term that :meth:`CoincidenceTrigger.evaluate` computes in
numpy. Building every (seed, neighbour) pair in numpy just to count them was the
largest cost of that method; this loop visits each neighbour once, in integers,
and gives exactly the numpy count (``tests/test_slot_counts.py``).

Most seeds need no count at all: a seed site's tables say how many sites a seed
must gather to pass (``need``), and the hits anywhere in the seed's search span
bound its count from above. Where that bound is short of ``need`` the seed is
marked -1 after two pointer steps, without reading a pair table (whose random
reads, one cache miss per neighbour, were the loop's cost).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tocsin.engine.jit import kernel
from tocsin.types import BoolArray, F64Array, I32Array, I64Array


@dataclass(frozen=True, slots=True)
class SlotTables:
    """Slot edges of one scale laid out for :func:`slot_counts`."""

    edges: I64Array
    """(N * N, 2): lower and upper edge (ns) per (seed site, site) pair, side by side."""
    counted: BoolArray
    """(N * N,): the pair's slot can hold a hit (upper edge >= lower edge)."""
    as_neighbour: BoolArray
    """(N,): the site counts for some seed site (its hits need to be searched)."""
    rows: I64Array
    """(N, 3) per seed site, over its counted pairs: the highest lower edge, the lowest
    upper edge and the lowest lower edge (ns); a hit between the first two whose
    site's previous hit is before the third is in its slot without a look-up of
    its pair (sentinels make that test fail for a row with no counted pair)."""


def slot_tables(
    lo_flat: I64Array,
    hi_flat: I64Array | F64Array,
    n_sites: int,
    occupancy: F64Array | None = None,
) -> SlotTables:
    """:class:`SlotTables` from flat (N * N,) lower and upper slot edges (ns); a pair
    whose upper edge is below its lower edge does not count. With ``occupancy``
    (N * N,), a pair whose occupancy is not above 0 does not count either (its upper
    edge becomes ``NO_EDGE_NS``). Upper edges given as floats must hold integers.

    One compiled pass over the N * N pairs (for 1000 sites, numpy's way took ~45 ms
    a scale, twice a minute of data)."""
    if occupancy is None:
        occupancy = np.ones(lo_flat.size)
    edges, counted, as_neighbour, rows = _build_slot_tables(
        lo_flat, hi_flat, occupancy, n_sites, NO_EDGE_NS
    )
    return SlotTables(edges, counted, as_neighbour, rows)


NO_EDGE_NS = -(2**62)
"""Upper edge (ns) of a pair that does not count: below every lower edge."""


@kernel
def _build_slot_tables(
    lo: I64Array, hi: I64Array | F64Array, occ: F64Array, n: int, no_edge: int
) -> tuple[I64Array, BoolArray, BoolArray, I64Array]:
    """Edges (N * N, 2), counted (N * N,), as-neighbour (N,) and row bounds (N, 3) of
    :class:`SlotTables`, in one pass."""
    big = np.int64(2**63 - 1)
    small = np.int64(-(2**63))
    edges = np.empty((n * n, 2), dtype=np.int64)
    counted = np.empty(n * n, dtype=np.bool_)
    as_neighbour = np.zeros(n, dtype=np.bool_)
    rows = np.empty((n, 3), dtype=np.int64)
    for s in range(n):
        hi_lo, lo_hi, lo_lo = small, big, big
        row_counts = False
        for site in range(n):
            k = s * n + site
            lo_k = np.int64(lo[k])
            hi_k = np.int64(hi[k]) if occ[k] > 0.0 else np.int64(no_edge)
            edges[k, 0] = lo_k
            edges[k, 1] = hi_k
            c = hi_k >= lo_k
            counted[k] = c
            if c:
                row_counts = True
                as_neighbour[site] = True
                if lo_k > hi_lo:
                    hi_lo = lo_k
                if hi_k < lo_hi:
                    lo_hi = hi_k
                if lo_k < lo_lo:
                    lo_lo = lo_k
        if row_counts:
            rows[s, 0], rows[s, 1], rows[s, 2] = hi_lo, lo_hi, lo_lo
        else:  # sentinels that make the row test fail
            rows[s, 0], rows[s, 1], rows[s, 2] = big, small, small
    return edges, counted, as_neighbour, rows


@kernel
def slot_counts(
    t: I64Array,
    site: I64Array,
    prev: I64Array,
    t_seed: I64Array,
    seed_site: I64Array,
    edges: I64Array,
    counted: BoolArray,
    rows: I64Array,
    n_sites: int,
    back_ns: int,
    ahead_ns: int,
    need: I64Array,
) -> I64Array:
    """Distinct sites counted in each seed's slots (the seed's own site excluded),
    or -1 for a seed whose count is surely below ``need[seed site]``.

    ``t`` (sorted, GPS ns) and ``site`` are the stream of hits that may count,
    ``prev`` each one's previous hit time of the same site (GPS ns; anything far
    earlier stands for none). ``t_seed`` (sorted) and ``seed_site`` are the seeds.
    ``edges``, ``counted`` and ``rows`` are a scale's :class:`SlotTables`. A hit
    counts when its pair is counted, ``lo <= t - t_seed <= hi`` and its site's
    previous hit is before the slot start (so each site counts once, by its
    earliest hit in the slot). Neighbours are searched within ``[t_seed - back_ns,
    t_seed + ahead_ns]``, which must hold every slot. ``need`` (N,): per seed site,
    the smallest count of interest (0: count every seed); a seed with fewer than
    that many hits of ``t`` in its search span cannot reach it and gets -1.
    """
    n_seed = t_seed.size
    out = np.zeros(n_seed, dtype=np.int64)
    left = 0
    right = 0
    n = t.size
    for i in range(n_seed):
        ts = t_seed[i]
        s = seed_site[i]
        while left < n and t[left] < ts - back_ns:
            left += 1
        end = ts + ahead_ns
        if right < left:
            right = left
        while right < n and t[right] <= end:
            right += 1
        if right - left < need[s]:  # every hit of the span counting would not do
            out[i] = -1
            continue
        row = s * n_sites
        lo_max, hi_min, lo_min = rows[s, 0], rows[s, 1], rows[s, 2]
        j = left
        count = 0
        while j < right:
            pair = row + site[j]
            if counted[pair]:
                d = t[j] - ts
                before = prev[j] - ts
                if lo_max <= d <= hi_min and before < lo_min:
                    count += 1  # inside every counted slot of this seed site
                else:
                    lo = edges[pair, 0]
                    if lo <= d <= edges[pair, 1] and before < lo:
                        count += 1
            j += 1
        out[i] = count
    return out


@kernel
def previous_in_time_order(t: I64Array, site: I32Array, last: I64Array) -> I64Array:
    """For hits sorted by time (GPS ns), each one's previous hit time of the same
    site: ``last[site]`` for a site's first hit here. ``last`` (N,) is updated in
    place to each site's latest time. Hits of one site at equal times are taken in
    their given order."""
    out = np.empty(t.size, dtype=np.int64)
    for i in range(t.size):
        s = site[i]
        out[i] = last[s]
        last[s] = t[i]
    return out


def warm_up() -> None:
    """Load (or compile, on the first run after an install) the kernel now, on a
    tiny input, rather than in the middle of the first block: the first call in a
    process costs ~0.7 s even from numba's cache."""
    one = np.zeros(1, dtype=np.int64)
    tab = slot_tables(one, one, 1)
    slot_tables(one, np.zeros(1), 1, occupancy=np.ones(1))  # as the engine calls it
    slot_counts(one, one, one, one, one, tab.edges, tab.counted, tab.rows, 1, 0, 0, one)
    previous_in_time_order(one, np.zeros(1, dtype=np.int32), one.copy())
