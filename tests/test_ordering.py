"""The ordering stage: duplicates, lateness, gaps and blocks."""

from __future__ import annotations

import itertools

import numpy as np

from tocsin.model.batch import HitBatch
from tocsin.ordering import Orderer

S = 10**9
T0 = 1_450_000_000 * S


def batch(site: int, seq: int, start: int, end: int, t: list[int], recv: int) -> HitBatch:
    return HitBatch(f"s{site}", site, seq, start, end, np.asarray(t, dtype=np.int64), None, recv)


def test_blocks_are_time_ordered_and_complete() -> None:
    o = Orderer(2, lateness_ns=3 * S)
    blocks = []
    # site 1 arrives out of order relative to site 0
    for b in [
        batch(0, 0, T0, T0 + S, [T0 + 100, T0 + 900], T0 + S + 10),
        batch(1, 0, T0, T0 + S, [T0 + 50, T0 + 500], T0 + S + 20),
        batch(0, 1, T0 + S, T0 + 2 * S, [T0 + S + 1], T0 + 2 * S + 10),
        batch(1, 1, T0 + S, T0 + 2 * S, [], T0 + 2 * S + 900_000_000),
        batch(0, 2, T0 + 2 * S, T0 + 3 * S, [T0 + 2 * S + 7], T0 + 4 * S + 500),
    ]:
        assert o.offer(b).status == "accepted"
        blk = o.release()
        if blk is not None:
            blocks.append(blk)
    last = o.flush()
    assert last is not None
    blocks.append(last)
    t = np.concatenate([b.t for b in blocks])
    assert t.tolist() == sorted([T0 + 100, T0 + 900, T0 + 50, T0 + 500, T0 + S + 1, T0 + 2 * S + 7])
    # blocks tile time without overlap
    for a, b in itertools.pairwise(blocks):
        assert a.t_end == b.t_start
    live = sum(int(np.sum(b.live_end - b.live_start)) for b in blocks)
    assert live == 5 * S  # 3 s of site 0 + 2 s of site 1, nothing counted twice


def test_duplicate_and_late_and_gap() -> None:
    o = Orderer(1, lateness_ns=3 * S)
    assert o.offer(batch(0, 0, T0, T0 + S, [], T0 + S)).status == "accepted"
    assert o.offer(batch(0, 0, T0, T0 + S, [], T0 + S)).status == "duplicate"
    v = o.offer(batch(0, 3, T0 + 3 * S, T0 + 4 * S, [], T0 + 4 * S))
    assert v.status == "accepted" and v.new_gaps == 2
    assert o.open_gaps() == {0: 2}
    o.release()
    # seq 1 turns up 10 s after its live interval started: late, but its gap closes
    v = o.offer(batch(0, 1, T0 + S, T0 + 2 * S, [T0 + S + 5], T0 + 11 * S))
    assert v.status == "late"
    assert o.open_gaps() == {0: 1}
    assert (o.n_accepted, o.n_duplicate, o.n_late) == (2, 1, 1)


def test_late_rule_depends_on_the_batch_alone() -> None:
    """Idle ticks never change whether a batch is late (what makes replay equal live)."""
    b = batch(0, 0, T0, T0 + S, [], T0 + 2 * S)
    o1, o2 = Orderer(1, lateness_ns=3 * S), Orderer(1, lateness_ns=3 * S)
    o2.release(T0 + 2 * S)  # a tick just before the arrival
    assert o1.offer(b).status == o2.offer(b).status == "accepted"
