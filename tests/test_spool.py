"""The agent's disk spool: order, persistence, bound, acknowledgements and crash recovery."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tocsin.live.spool import HEADER_BYTES, Spool, SpoolError, read_pending

SITE = "alder-fen-1"


def payload(seq: int, size: int = 100) -> bytes:
    """A payload that differs for every seq (and has a size of our choosing)."""
    return (f"{seq:08d}".encode() * (size // 8 + 1))[:size]


def segments(d: Path) -> list[Path]:
    return sorted(d.glob("seg-*.log"))


def fill(sp: Spool, n: int, size: int = 100, group: int = 7) -> None:
    for k in range(n):
        seq = sp.next_seq
        assert sp.put(seq, payload(seq, size), mark=1000 + seq)
        if (k + 1) % group == 0:
            sp.sync()
    sp.sync()


def test_order_and_persistence_across_reopen(tmp_path: Path) -> None:
    sp = Spool(tmp_path, site=SITE, max_bytes=1_000_000, segment_bytes=2048)
    sizes = [(37 * k) % 300 + 1 for k in range(60)]
    for k, size in enumerate(sizes):
        assert sp.put(k, payload(k, size), mark=10 * k)
        if k % 5 == 4:
            sp.sync()
    assert sp.staged == 0
    assert [sp.read(k) for k in range(60)] == [payload(k, s) for k, s in enumerate(sizes)]
    sp.close()
    assert len(segments(tmp_path)) > 1  # records really span several segment files
    sp = Spool(tmp_path, site=SITE, max_bytes=1_000_000, segment_bytes=2048)
    try:
        assert sp.recovery.records == 60 and sp.recovery.pending == 60
        assert sp.recovery.discarded_bytes == 0
        assert sp.next_seq == 60 and sp.last_mark == 590
        seqs, seq = [], sp.next_pending(0)
        while seq is not None:
            seqs.append(seq)
            seq = sp.next_pending(seq + 1)
        assert seqs == list(range(60))
        assert [sp.read(k) for k in seqs] == [payload(k, s) for k, s in enumerate(sizes)]
        assert [(r.seq, r.payload) for r in read_pending(tmp_path)] == [
            (k, payload(k, s)) for k, s in enumerate(sizes)
        ]
    finally:
        sp.close()


def test_only_synced_records_are_visible(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="next seq 0"):
        Spool(tmp_path, site=SITE, max_bytes=10_000).put(3, b"x", mark=0)
    sp = Spool(tmp_path / "b", site=SITE, max_bytes=10_000)
    assert sp.put(0, b"a", mark=0) and sp.put(1, b"b", mark=1)
    assert sp.first_pending() is None and sp.pending == 0 and sp.staged == 2
    assert sp.sync() == 2
    assert sp.first_pending() == 0 and sp.pending == 2
    sp.close()


def test_acknowledged_records_are_removed_and_seq_continues(tmp_path: Path) -> None:
    sp = Spool(tmp_path, site=SITE, max_bytes=100_000, segment_bytes=1024)
    fill(sp, 40)
    # out-of-order acknowledgements: the lowest unacknowledged record stays first
    assert sp.ack(1) and sp.ack(3) and not sp.ack(3)
    assert sp.first_pending() == 0 and sp.next_pending(1) == 2 and sp.pending == 38
    for k in range(0, 20):
        sp.ack(k)
    n_seg = len(segments(tmp_path))
    deleted = sp.commit()
    assert deleted >= 1 and len(segments(tmp_path)) == n_seg - deleted
    sp.close()
    sp = Spool(tmp_path, site=SITE, max_bytes=100_000, segment_bytes=1024)
    assert sp.pending == 20 and sp.first_pending() == 20 and sp.next_seq == 40
    for k in range(20, 40):
        sp.ack(k)
    sp.commit()
    assert segments(tmp_path) == []  # nothing left to send: no segment files
    sp.close()
    sp = Spool(tmp_path, site=SITE, max_bytes=100_000, segment_bytes=1024)
    assert sp.pending == 0 and sp.next_seq == 40  # from state.json: seq is never reused
    assert sp.put(40, b"next", mark=0)
    sp.close()


def test_bound_refuses_and_recovers_room(tmp_path: Path) -> None:
    record = HEADER_BYTES + 100  # 128 bytes a record
    sp = Spool(tmp_path, site=SITE, max_bytes=4096, segment_bytes=1024)
    n = 0
    while sp.put(n, payload(n), mark=n):
        n += 1
    assert n == 4096 // record == 32  # exactly as many as fit
    assert not sp.room_for(100) and sp.next_seq == 32  # a refusal changes nothing
    sp.sync()
    assert sp.disk_bytes == 32 * record <= sp.max_bytes
    assert len(segments(tmp_path)) == 4  # 8 records of 128 bytes per 1024-byte segment
    for k in range(8):  # the first segment delivered
        sp.ack(k)
    assert not sp.put(32, payload(32), mark=32)  # acknowledged but not yet committed
    assert sp.commit() == 1
    assert sp.put(32, payload(32), mark=32)
    sp.close()


def test_partial_last_record_is_cut_off(tmp_path: Path) -> None:
    sp = Spool(tmp_path, site=SITE, max_bytes=100_000)
    fill(sp, 10)
    sp.close()
    (seg,) = segments(tmp_path)
    size = seg.stat().st_size
    os.truncate(seg, size - 40)  # a crash in the middle of writing record 9
    sp = Spool(tmp_path, site=SITE, max_bytes=100_000)
    assert sp.recovery.records == 9 and sp.recovery.pending == 9
    assert sp.recovery.discarded_bytes == HEADER_BYTES + 100 - 40
    assert sp.recovery.damaged_segments == (seg.name,)
    assert [sp.read(k) for k in range(9)] == [payload(k) for k in range(9)]
    assert seg.stat().st_size == 9 * (HEADER_BYTES + 100)  # truncated at the last good record
    # state.json (written at the clean close above) knew seq 9: it is not used again
    assert sp.next_seq == 10 and sp.put(10, b"again", mark=10)
    sp.close()
    sp = Spool(tmp_path, site=SITE, max_bytes=100_000)
    assert sp.recovery.discarded_bytes == 0 and sp.read(10) == b"again" and sp.pending == 10
    assert sp.first_pending() == 0 and sp.next_pending(9) == 10
    sp.close()


def test_corrupt_record_ends_its_segment_only(tmp_path: Path) -> None:
    record = HEADER_BYTES + 100
    sp = Spool(tmp_path, site=SITE, max_bytes=100_000, segment_bytes=8 * record)
    fill(sp, 24)  # three segments of 8 records
    sp.close()
    _, second, third = segments(tmp_path)
    data = bytearray(second.read_bytes())
    data[3 * record + HEADER_BYTES + 50] ^= 0x01  # one bit of record 11's payload
    second.write_bytes(bytes(data))
    data = bytearray(third.read_bytes())
    data[7 * record + HEADER_BYTES - 1] ^= 0xFF  # the CRC of record 23, the last one
    third.write_bytes(bytes(data))
    sp = Spool(tmp_path, site=SITE, max_bytes=100_000, segment_bytes=8 * record)
    kept = list(range(0, 11)) + list(range(16, 23))
    assert [r.seq for r in read_pending(tmp_path)] == kept
    assert sp.pending == len(kept) and sp.recovery.damaged_segments == (second.name, third.name)
    assert sp.recovery.discarded_bytes == 5 * record + record
    assert [sp.read(k) for k in kept] == [payload(k) for k in kept]
    sp.close()


@settings(max_examples=40, deadline=None)
@given(cut=st.integers(min_value=0, max_value=12 * (HEADER_BYTES + 100)))
def test_any_truncation_keeps_every_complete_record(
    tmp_path_factory: pytest.TempPathFactory, cut: int
) -> None:
    d = tmp_path_factory.mktemp("spool")
    sp = Spool(d, site=SITE, max_bytes=100_000)
    fill(sp, 12)
    sp.close()
    (d / "state.json").unlink()  # as after a crash before the first commit
    (seg,) = segments(d)
    os.truncate(seg, cut)
    sp = Spool(d, site=SITE, max_bytes=100_000)
    whole = cut // (HEADER_BYTES + 100)
    assert sp.recovery.records == whole and sp.next_seq == whole
    assert sp.recovery.discarded_bytes == cut - whole * (HEADER_BYTES + 100)
    sp.close()


def test_one_agent_per_directory_and_site(tmp_path: Path) -> None:
    sp = Spool(tmp_path, site=SITE, max_bytes=10_000)
    with pytest.raises(SpoolError, match="in use by another agent"):
        Spool(tmp_path, site=SITE, max_bytes=10_000)
    sp.put(0, b"x", mark=0)
    sp.close()  # writes state.json, which names the site
    with pytest.raises(SpoolError, match="belongs to site 'alder-fen-1', not 'brack-hill'"):
        Spool(tmp_path, site="brack-hill", max_bytes=10_000)
    with pytest.raises(ValueError, match="below the minimum"):
        Spool(tmp_path, site=SITE, max_bytes=100)


_WRITER = """
import sys
from tocsin.live.spool import Spool
sp = Spool(sys.argv[1], site="alder-fen-1", max_bytes=50_000_000)
while True:
    for _ in range(5):
        s = sp.next_seq
        sp.put(s, (b"%08d" % s) * 40, mark=s)
    sp.sync()
    print(sp.next_seq - 1, flush=True)
"""


def test_sigkill_while_writing_loses_nothing_synced(tmp_path: Path) -> None:
    proc = subprocess.Popen(
        [sys.executable, "-c", _WRITER, str(tmp_path)], stdout=subprocess.PIPE, text=True
    )
    assert proc.stdout is not None
    synced = -1
    deadline = time.monotonic() + 30
    while synced < 3000 and time.monotonic() < deadline:
        synced = int(proc.stdout.readline())
    os.kill(proc.pid, signal.SIGKILL)  # somewhere in the middle of a write or an fsync
    proc.wait()
    proc.stdout.close()
    assert synced >= 3000
    sp = Spool(tmp_path, site=SITE, max_bytes=50_000_000)
    try:
        n = sp.next_seq
        assert n > synced  # every record reported as synced is there
        assert sp.pending == n and sp.first_pending() == 0  # contiguous from 0, nothing lost
        assert all(sp.read(k) == (b"%08d" % k) * 40 for k in range(n))
    finally:
        sp.close()
