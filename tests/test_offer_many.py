"""Bulk intake (``Pipeline.offer_many``, ``Orderer.take_run``, ``Pipeline.feed``) equals
offering batch by batch: same blocks to the engine, same candidates, same counters
and the same ordering state, on streams with duplicates, gaps, late and undelayed
batches and rejected lines."""

from __future__ import annotations

import io
import random
from typing import Any

import numpy as np
import orjson
import pytest

import tocsin.ordering
from tocsin.engine.block import Block
from tocsin.io.recording import Rejected, decode_line, join_lines, read_blocks
from tocsin.model.batch import HitBatch
from tocsin.model.config import EngineConfig
from tocsin.model.registry import Site, SiteRegistry
from tocsin.pipeline import REPLAY_BLOCK_S, Pipeline

S = 10**9
T0 = 1_450_000_000 * S
REG = SiteRegistry(
    [
        Site(
            id=f"knoll-{k}",
            lat_deg=40.0 + k,
            lon_deg=-3.0 + 2 * k,
            height_m=600.0,
            clock_sigma_ns=30.0,
        )
        for k in range(4)
    ]
)


def stream(seed: int, n: int) -> list[HitBatch | Rejected]:
    """Per site 1 s batches with ~20 Hz of hits, arriving 0.1-2 s late (sometimes
    very late; one site's batches 30 s late for a while, in sequence), sometimes
    twice, sometimes never, sometimes without ``recv_ns``; a rejected line now and
    then."""
    rng = random.Random(seed)
    out: list[tuple[int, HitBatch | Rejected]] = []
    for k in range(n):
        for s in range(len(REG)):
            if rng.random() < 0.03:
                continue  # lost: a gap
            start = T0 + k * S
            t = sorted(rng.randrange(start, start + S) for _ in range(rng.randrange(0, 40)))
            delay = (
                rng.choice([rng.randrange(S // 10, 2 * S), 30 * S])
                if rng.random() < 0.1
                else rng.randrange(S // 10, 2 * S)
            )
            if s == 3 and 50 <= k < 80:
                delay = 30 * S  # a backlog: late, but in sequence
            recv = None if rng.random() < 0.02 else start + S + delay
            b = HitBatch(
                REG.ids[s], s, k, start, start + S, np.array(t, dtype=np.int64), None, recv
            )
            arrive = start + S + delay
            out.append((arrive, b))
            if rng.random() < 0.03:
                out.append((arrive + rng.randrange(0, 3 * S), b))  # delivered twice
            if rng.random() < 0.01:
                out.append((arrive, Rejected(0, "unknown_site", "site", "test")))
    out.sort(key=lambda x: x[0])
    return [x for _, x in out]


def run(items: list[HitBatch | Rejected], bulk: bool, chunk: int, **kw: Any) -> dict[str, Any]:
    pipe = Pipeline(REG, EngineConfig(), candidate_far_per_year=1e9, **kw)
    blocks: list[Block] = []
    pipe.block_sink = blocks.append
    calls = 0
    one = pipe.offer

    def counted(item: HitBatch | Rejected) -> list[Any]:
        nonlocal calls
        calls += 1
        return one(item)

    pipe.offer = counted  # type: ignore[method-assign]
    cands = []
    if bulk:
        for i in range(0, len(items), chunk):
            cands += pipe.offer_many(items[i : i + chunk])
    else:
        for it in items:
            cands += pipe.offer(it)
    cands += pipe.finish()
    o = pipe.orderer
    return {
        "candidates": [c.to_json_line() for c in cands],
        "blocks": [
            (
                b.t_start,
                b.t_end,
                b.t.tolist(),
                b.site.tolist(),
                b.live_site.tolist(),
                b.live_start.tolist(),
                b.live_end.tolist(),
            )
            for b in blocks
        ],
        "counters": (
            pipe.counters.batches,
            pipe.counters.accepted,
            dict(pipe.counters.rejected),
            pipe.counters.hits_accepted,
            pipe.counters.new_gaps,
        ),
        "orderer": (
            o.watermark,
            o.now,
            o.n_accepted,
            o.n_duplicate,
            o.n_late,
            [(st.max_seq, sorted(st.seen), sorted(st.missing)) for st in o._seq],
        ),
        "offer_calls": calls,
    }


@pytest.mark.parametrize(("seed", "chunk"), [(1, 10_000), (2, 37), (3, 2)])
@pytest.mark.parametrize("release_every_s", [None, REPLAY_BLOCK_S])
def test_bulk_intake_equals_batch_by_batch(
    seed: int, chunk: int, release_every_s: float | None
) -> None:
    items = stream(seed, 150)
    one = run(items, False, chunk, release_every_s=release_every_s)
    many = run(items, True, chunk, release_every_s=release_every_s)
    assert one.pop("offer_calls") == len(items)
    calls = many.pop("offer_calls")
    assert many == one
    assert one["counters"][2] and one["counters"][4]  # the stream has rejections and gaps
    if chunk > 2:  # runs were taken in bulk, not one by one (short runs between
        # releases every bin, long ones between replay's 16 s releases)
        assert calls < (len(items) / 2 if release_every_s else len(items))


def test_remembered_seqs_are_trimmed_as_one_by_one(monkeypatch: pytest.MonkeyPatch) -> None:
    """A run stops where :meth:`Orderer.offer` would trim a site's remembered
    sequence numbers, so the trimmed sets are the same."""
    monkeypatch.setattr(tocsin.ordering, "SEQ_MEMORY", 8)
    items = stream(4, 120)
    one = run(items, False, 500, release_every_s=REPLAY_BLOCK_S)
    many = run(items, True, 500, release_every_s=REPLAY_BLOCK_S)
    assert many.pop("offer_calls") < one.pop("offer_calls")
    assert many == one


def test_feed_equals_decoding_and_offering_line_by_line() -> None:
    """A recording read in blocks (``read_blocks``, here a few hundred bytes each so
    lines straddle block ends) and fed gives what decoding and offering each
    stripped, non-empty line gives: the same candidates, rejections with the same
    line numbers, the same counters. With blank lines, CRLF endings, spaces around
    lines and no newline at the end."""
    items = stream(5, 150)
    lines = [
        orjson.dumps(x.to_json_obj()) if isinstance(x, HitBatch) else b'{"v":1,"site":"nowhere"}'
        for x in items
    ]
    lines[17] = b"{broken"
    lines[40] = b"  " + lines[40] + b" \r"
    lines[41] = lines[41] + b"\r"
    lines.insert(60, b"")
    lines.insert(61, b" \t ")
    text = b"\n".join(lines)  # no newline after the last line
    a = Pipeline(REG, EngineConfig(), candidate_far_per_year=1e9, release_every_s=REPLAY_BLOCK_S)
    b = Pipeline(REG, EngineConfig(), candidate_far_per_year=1e9, release_every_s=REPLAY_BLOCK_S)
    want, want_bad, want_recv = [], [], []
    for k, raw in enumerate(io.BytesIO(text), start=1):
        if not raw.strip():
            continue
        item = decode_line(raw.strip(), REG, line_no=k)
        if isinstance(item, Rejected):
            want_bad.append(item)
        elif item.recv_ns is not None:
            want_recv.append((item.recv_ns, item.live_end))
        want += a.offer(item)
    want += a.finish()
    got, got_bad, got_recv = [], [], []
    for fed in b.feed(read_blocks(io.BytesIO(text), size=300)):
        got_bad += fed.rejected
        got += fed.candidates
        if fed.last_recv_ns is not None:
            got_recv.append((fed.last_recv_ns, fed.last_live_end_ns))
    got += b.finish()
    # the latest arrival and live end the blocks report are those of the batches
    assert max(r for r, _ in got_recv) == max(r for r, _ in want_recv)
    assert max(e for _, e in got_recv) == max(e for _, e in want_recv)
    assert [c.to_json_line() for c in got] == [c.to_json_line() for c in want]
    assert got_bad == want_bad and len(want_bad) >= 2
    assert b.counters == a.counters


@pytest.mark.parametrize("size", [1, 5, 64, 10_000])
def test_blocks_hold_every_line_once_with_its_number(size: int) -> None:
    text = b"a\n\nbb\r\n ccc \n\n\ndddd"
    got = []
    for data, first in read_blocks(io.BytesIO(text), size=size):
        got += list(enumerate(data.split(b"\n"), start=first))
    assert got == list(enumerate(text.split(b"\n"), start=1))
    assert list(read_blocks(io.BytesIO(b""))) == []
    joined = list(join_lines([b"x", b"y", b"z"], per_block=2))
    assert joined == [(b"x\ny", 1), (b"z", 3)]
