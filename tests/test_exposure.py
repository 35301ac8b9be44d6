"""The bin store's counts and live time equal a direct histogram of the same blocks."""

from __future__ import annotations

import numpy as np

from tocsin.engine.block import Block
from tocsin.engine.exposure import BinStore

BIN = 1_000_000_000
T0 = 1_450_000_000 * BIN


def test_counts_and_live_time_equal_a_histogram_of_the_blocks() -> None:
    """Blocks with many hits per (site, bin), live intervals cutting bin edges and
    several intervals per site: every bin's count and live nanoseconds equal the
    reference (``np.histogram2d`` of the hits; interval overlaps summed bin by bin
    in plain Python)."""
    rng = np.random.default_rng(4)
    n, cap = 7, 40
    store = BinStore(n, bin_ns=BIN, capacity=cap)
    all_t, all_s, intervals = [], [], []
    for k in range(6):
        t0, t1 = T0 + 5 * k * BIN, T0 + 5 * (k + 1) * BIN
        t = np.sort(rng.integers(t0, t1, 3000))
        s = rng.integers(0, n, t.size).astype(np.int32)
        live_site = rng.integers(0, n, 12).astype(np.int32)
        a = rng.integers(t0, t1, 12)
        b = np.minimum(a + rng.integers(1, 3 * BIN, 12), t1)
        store.add(Block(t0, t1, t, s, live_site, a, b))
        all_t.append(t)
        all_s.append(s)
        intervals += list(zip(live_site.tolist(), a.tolist(), b.tolist(), strict=True))
    t, s = np.concatenate(all_t), np.concatenate(all_s)
    b0, b1 = T0 // BIN, T0 // BIN + 30
    want_counts, _, _ = np.histogram2d(s, t // BIN, bins=[np.arange(n + 1), np.arange(b0, b1 + 1)])
    want_live = np.zeros((n, b1 - b0), dtype=np.int64)
    for site, a, b in intervals:
        for j in range(b1 - b0):
            lo, hi = max(a, (b0 + j) * BIN), min(b, (b0 + j + 1) * BIN)
            want_live[site, j] += max(hi - lo, 0)
    assert np.array_equal(store.counts(b0, b1), want_counts.astype(np.int64))
    assert np.array_equal(store.live_ns(b0, b1), want_live)
    assert want_counts.max() > 50  # many hits share a bin
