"""The service's journal: appends, positions, torn lines, segment skipping."""

from __future__ import annotations

from pathlib import Path

import pytest
from pydantic import ValidationError

from tocsin.io.journal import Journal, Position, prune, read_from
from tocsin.live.service import Service
from tocsin.model.registry import SiteRegistry
from tocsin.model.service_config import MetricsConfig, ServiceConfig
from tocsin.types import NS_PER_S


def test_positions_segments_and_torn_lines(tmp_path: Path) -> None:
    j = Journal(tmp_path, segment_bytes=1024)
    positions: list[Position] = []
    for k in range(100):
        positions.append(j.append(b'{"k": %d, "pad": "%s"}' % (k, b"x" * 40), 1_000 + k))
    j.sync()
    assert len(list(tmp_path.glob("journal-*.jsonl"))) > 3  # rotated by size
    lines = list(read_from(tmp_path, None))
    assert [int(x.split(b":")[1].split(b",")[0]) for x in lines] == list(range(100))
    after = list(read_from(tmp_path, positions[49]))
    assert len(after) == 50 and after[0].startswith(b'{"k": 50,')
    # only segments that end after since_ns are read
    recent = list(read_from(tmp_path, None, since_ns=1_090))
    assert 10 <= len(recent) < 100 and recent[-1].startswith(b'{"k": 99,')
    j.close()
    # a torn last line (crash mid-write) is skipped, and the next append starts clean
    last = sorted(tmp_path.glob("journal-*.jsonl"))[-1]
    with open(last, "ab") as fh:
        fh.write(b'{"k": 100, "torn')
    j2 = Journal(tmp_path, segment_bytes=1024)
    j2.append(b'{"k": 101}', 2_000)
    j2.close()
    tail = list(read_from(tmp_path, positions[98]))
    assert tail[0].startswith(b'{"k": 99,') and tail[-1] == b'{"k": 101}'
    assert not any(b"torn" in x for x in tail)


def _segment(directory: Path, first_recv: int) -> Path:
    path = directory / f"journal-{first_recv:020d}.jsonl"
    path.write_bytes(b'{"recv": %d}\n' % first_recv)
    return path


def test_prune_deletes_only_whole_segments_before_the_cutoff(tmp_path: Path) -> None:
    segs = [_segment(tmp_path, r) for r in (100, 200, 300, 400, 500)]
    # a segment ends where the next begins: 100-200 and 200-300 end by 300
    gone = prune(tmp_path, before_ns=320, keep=None)
    assert gone == segs[:2]
    assert [p.exists() for p in segs] == [False, False, True, True, True]
    # never the segment a checkpoint points into, nor any after it
    assert prune(tmp_path, before_ns=10**6, keep=Position(segs[3].name, 5)) == [segs[2]]
    # never the newest (being written), however old
    assert prune(tmp_path, before_ns=10**6, keep=None) == [segs[3]]
    assert [p.name for p in sorted(tmp_path.glob("journal-*"))] == [segs[4].name]
    assert list(read_from(tmp_path, None)) == [b'{"recv": 500}']


def test_service_deletes_old_segments_after_a_checkpoint(
    tmp_path: Path, small_registry: SiteRegistry
) -> None:
    """With ``journal_keep_days`` the checkpoint deletes segments whose batches all
    arrived longer ago; with 0 nothing goes; a retention under a day is refused
    naming the key."""
    day = 86_400 * NS_PER_S
    now = 1_460_000_000 * NS_PER_S
    reg = tmp_path / "sites.toml"
    reg.write_text(small_registry.to_toml())
    for keep, left in ((0.0, 4), (2.0, 3)):
        data = tmp_path / f"data-{keep}"
        jdir = data / "journal"
        jdir.mkdir(parents=True)
        for age_days in (5.0, 3.0, 1.5, 0.5):
            _segment(jdir, now - round(age_days * day))
        cfg = ServiceConfig(
            registry=reg, data_dir=data, metrics=MetricsConfig(port=0), journal_keep_days=keep
        )
        service = Service(cfg, clock=lambda: now)
        try:
            service.save_checkpoint()
            # 5 d and 3 d old segments end 3 d and 1.5 d ago: only the first is past 2 d
            assert len(list(jdir.glob("journal-*.jsonl"))) == left
            deleted = service.metrics.registry.get_sample_value(
                "tocsin_journal_segments_deleted_total"
            )
            assert deleted == 4 - left
            on_disk = sum(p.stat().st_size for p in jdir.glob("journal-*.jsonl"))
            got = service.metrics.registry.get_sample_value("tocsin_journal_bytes")
            assert got == on_disk > 0
        finally:
            service.close()
    for bad in (0.5, -1.0):
        with pytest.raises(ValidationError, match="journal_keep_days"):
            ServiceConfig(registry=reg, journal_keep_days=bad)
