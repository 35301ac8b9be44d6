"""The service's journal: appends, positions, torn lines, segment skipping."""

from __future__ import annotations

from pathlib import Path

from tocsin.io.journal import Journal, Position, read_from


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
