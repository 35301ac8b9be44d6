"""Compiled count of the distinct sites in each seed's forward slots.

The ``sites`` statistic needs, for every seed hit, the number ``k`` of other sites
whose earliest hit lies in their slot ``[t_seed + lo, t_seed + hi]`` (pair-dependent
edges, see :class:`tocsin.engine.coincidence.SlotGeometry`). Its tables then say
whether the seed can pass at all; for almost none it can, and only those need the
offsets and the Fisher term that :meth:`CoincidenceTrigger.evaluate` computes in
numpy. Building every (seed, neighbour) pair in numpy just to count them was the
largest cost of that method; this loop visits each neighbour once, in integers,
and gives exactly the numpy count (``tests/test_slot_counts.py``).
"""

from __future__ import annotations

import numpy as np

from tocsin.engine.jit import kernel
from tocsin.types import I64Array


@kernel
def slot_counts(
    t: I64Array,
    site: I64Array,
    prev: I64Array,
    t_seed: I64Array,
    seed_site: I64Array,
    edges: I64Array,
    n_sites: int,
    back_ns: int,
    ahead_ns: int,
) -> I64Array:
    """Distinct sites counted in each seed's slots (the seed's own site excluded).

    ``t`` (sorted, GPS ns) and ``site`` are the stream of hits that may count,
    ``prev`` each one's previous hit time of the same site (GPS ns; anything far
    earlier stands for none). ``t_seed`` (sorted) and ``seed_site`` are the seeds.
    ``edges`` (N*N, 2, ns) holds the lower and upper slot edge per (seed site, site)
    pair, the upper one far negative for a site that does not count. A hit counts when
    ``lo <= t - t_seed <= hi`` and its site's previous hit is before the slot start
    (so each site counts once, by its earliest hit in the slot). Neighbours are
    searched within ``[t_seed - back_ns, t_seed + ahead_ns]``, which must hold every slot.
    """
    n_seed = t_seed.size
    out = np.zeros(n_seed, dtype=np.int64)
    left = 0
    n = t.size
    for i in range(n_seed):
        ts = t_seed[i]
        row = seed_site[i] * n_sites
        while left < n and t[left] < ts - back_ns:
            left += 1
        j = left
        end = ts + ahead_ns
        count = 0
        while j < n and t[j] <= end:
            pair = row + site[j]
            d = t[j] - ts
            lo = edges[pair, 0]
            if lo <= d <= edges[pair, 1] and prev[j] - ts < lo:
                count += 1
            j += 1
        out[i] = count
    return out


def warm_up() -> None:
    """Load (or compile, on the first run after an install) the kernel now, on a
    tiny input, rather than in the middle of the first block: the first call in a
    process costs ~0.7 s even from numba's cache."""
    one = np.zeros(1, dtype=np.int64)
    slot_counts(one, one, one, one, one, np.zeros((1, 2), dtype=np.int64), 1, 0, 0)
