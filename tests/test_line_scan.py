"""The compiled reading of recording lines gives what ``decode_line`` gives, line by line.

``decode_line`` (orjson and the batch rules, tested in ``test_batch.py``) is the
reference: for every line, :func:`decode_lines` must return the same batch (site,
index, sequence number, live interval, hit times, arrival time) or the same
rejection. The compiled pass must also really take the plain lines (else the
comparison would hold trivially, every line handed back).
"""

from __future__ import annotations

import json

import numpy as np
import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tocsin.io.line_scan import COL_OK, decode_lines, name_table, scan_lines, split_lines
from tocsin.io.recording import Rejected, decode_line
from tocsin.model.batch import MAX_LIVE_NS, HitBatch
from tocsin.model.registry import Site, SiteRegistry

I64_MAX = 2**63 - 1
T0 = 1_450_000_000 * 10**9

REG = SiteRegistry(
    [
        Site(id="quarry-hill", lat_deg=46.1, lon_deg=7.2, height_m=900.0, clock_sigma_ns=20.0),
        Site(id="b", lat_deg=-33.9, lon_deg=18.5, height_m=40.0, clock_sigma_ns=50.0),
        Site(id="mesa-7", lat_deg=35.1, lon_deg=-106.6, height_m=1600.0, clock_sigma_ns=30.0),
    ]
)


def same(a: HitBatch | Rejected, b: HitBatch | Rejected) -> bool:
    if isinstance(a, Rejected) or isinstance(b, Rejected):
        return a == b
    return (
        (a.site, a.site_index, a.seq, a.live_start, a.live_end, a.recv_ns, a.amp is None)
        == (b.site, b.site_index, b.seq, b.live_start, b.live_end, b.recv_ns, b.amp is None)
        and a.t.dtype == b.t.dtype == np.int64
        and np.array_equal(a.t, b.t)
        and all(type(x) is int for x in (a.seq, a.live_start, a.live_end))
    )


def check(lines: list[bytes]) -> list[HitBatch | Rejected]:
    nos = list(range(7, 7 + len(lines)))
    got = decode_lines(lines, REG, nos)
    want = [decode_line(x, REG, line_no=k) for x, k in zip(lines, nos, strict=True)]
    assert len(got) == len(want)
    for x, g, w in zip(lines, got, want, strict=True):
        assert same(g, w), (x, g, w)
    return got


def taken(lines: list[bytes]) -> list[bool]:
    """Which lines the compiled pass takes itself (not handed back)."""
    sizes = np.array([len(x) for x in lines], dtype=np.int64)
    ends = np.cumsum(sizes + 1) - 1
    buf = np.frombuffer(b"\n".join(lines), dtype=np.uint8)
    rows, _ = scan_lines(buf, ends - sizes, ends, *name_table(REG.ids))
    return [bool(r) for r in rows[:, COL_OK]]


def plain(site: str = "b", seq: int = 3, t: list[int] | None = None, **extra: object) -> bytes:
    obj: dict[str, object] = {
        "v": 1,
        "site": site,
        "seq": seq,
        "live": [T0, T0 + 10**9],
        "t": [T0 + 5, T0 + 6, T0 + 6, T0 + 999_999_999] if t is None else t,
    }
    obj.update(extra)
    return orjson.dumps(obj)


def test_plain_lines_are_taken_by_the_compiled_pass_and_equal_the_reference() -> None:
    lines = [
        plain(),
        plain(t=[]),
        plain(recv_ns=T0 + 2 * 10**9),
        plain("quarry-hill", seq=0),
        # keys in another order, JSON whitespace everywhere
        b'{ "t" : [ 1 , 2 ] ,\t"live":[0,\r10], "seq":0,"site":"b" , "v" : 1 }',
        # the largest values the contract allows
        orjson.dumps(
            {
                "v": 1,
                "site": "b",
                "seq": I64_MAX,
                "live": [I64_MAX - 5, I64_MAX],
                "t": [I64_MAX - 5, I64_MAX - 1],
                "recv_ns": I64_MAX,
            }
        ),
        plain(t=[T0]),  # a hit at the live start
        orjson.dumps({"v": 1, "site": "b", "seq": 1, "live": [0, MAX_LIVE_NS], "t": [0]}),
        plain(t=list(range(T0, T0 + 500, 2))),  # a long batch
    ]
    assert all(taken(lines))
    got = check(lines)
    assert all(isinstance(g, HitBatch) for g in got)


@pytest.mark.parametrize(
    "line",
    [
        b"not json",
        b"[1, 2]",
        b'{"v": 1}',
        plain(site="nowhere"),  # unknown site: handed back, rejected by the rules
        b'{"v":1,"site":"\\u0062","seq":1,"live":[0,10],"t":[1]}',  # "b", escaped
        json.dumps(
            {"v": 1, "site": "mésa-7", "seq": 1, "live": [0, 10], "t": [1]}, ensure_ascii=False
        ).encode(),  # non-ASCII site
        plain(v=2),
        plain(v=True),
        plain(v=1.0),
        plain(seq=-1),
        plain(seq=True),
        plain(seq=1.5),
        plain(seq=2**63),
        b'{"v":1,"site":"b","seq":01,"live":[0,10],"t":[1]}',  # leading zero
        b'{"v":1,"site":"b","seq":1e3,"live":[0,10],"t":[1]}',  # exponent
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[1.0]}',
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[-1]}',
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[1,]}',
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[1 2]}',
        b'{"v":1,"site":"b","seq":1,"live":[0,10,20],"t":[1]}',
        b'{"v":1,"site":"b","seq":1,"live":[10,0],"t":[]}',
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[5,3]}',  # unsorted
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[10]}',  # at the live end
        b'{"v":1,"site":"b","seq":1,"live":[5,10],"t":[4]}',  # before the live start
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[1],"amp":[0.5]}',
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[1],"extra":0}',
        b'{"v":1,"v":1,"site":"b","seq":1,"live":[0,10],"t":[1]}',  # repeated key
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[1],"t":[2]}',
        b'{"v":1,"site":"b","seq":1,"seq":2,"live":[0,10],"t":[1]}',
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[1]} x',  # trailing text
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[1]',  # unterminated
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[1],"recv_ns":null}',
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[1],"recv_ns":-4}',
        b'{"v":1,"site":"b","seq":1,"live":[0,' + str(MAX_LIVE_NS + 1).encode() + b'],"t":[]}',
        b'{"v":1,"site":"b","seq":9223372036854775808,"live":[0,10],"t":[1]}',
        b'{"v":1,"site":"b","seq":99999999999999999999,"live":[0,10],"t":[1]}',
        b"\xef\xbb\xbf" + plain(),  # byte order mark
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[1],}',
        b'{"v":1,"site":"b" "seq":1,"live":[0,10],"t":[1]}',
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":{}}',
        b"{}",
        b'{"v":1,"site":"b","seq":1,"live":[0,10],"t":[1]}\x0b',
    ],
)
def test_every_other_line_gets_the_reference_answer(line: bytes) -> None:
    """Lines outside the plain subset are handed back (or, when taken, equal the
    reference), among plain ones so the chunk mixes both ways."""
    check([plain(seq=1), line, plain(seq=2)])


_ws = st.sampled_from(["", " ", "\t", "\n", "\r", "  "])
_int = st.one_of(st.integers(0, 2**64), st.sampled_from([0, 1, I64_MAX, I64_MAX + 1, T0]))


@st.composite
def lines(draw: st.DrawFn) -> bytes:
    """A batch written as JSON with random key order, spacing and values (mostly
    valid, sometimes not), and sometimes one random byte changed."""
    start = draw(st.sampled_from([T0, 0, I64_MAX - 100]))
    width = draw(st.sampled_from([10**9, 100, MAX_LIVE_NS, MAX_LIVE_NS + 1, 0]))
    end = start + width
    t = sorted(draw(st.lists(st.integers(start - 2, end + 1), max_size=12)))
    if draw(st.booleans()):
        t = draw(st.permutations(t))
    fields: dict[str, str] = {
        "v": draw(st.sampled_from(["1", "1", "1", "2", "true", "1.0"])),
        "site": json.dumps(
            draw(st.sampled_from(["b", "quarry-hill", "mesa-7", "mésa-7", "zz", ""])),
            ensure_ascii=draw(st.booleans()),
        ),
        "seq": str(draw(_int)),
        "live": json.dumps([start, end]),
        "t": json.dumps(t),
    }
    if draw(st.booleans()):
        fields["recv_ns"] = str(draw(_int))
    for k in draw(st.lists(st.sampled_from(list(fields)), max_size=1)):
        del fields[k]
    keys = draw(st.permutations(list(fields)))
    ws = draw(_ws)
    body = ("," + ws).join(f'"{k}"{ws}:{draw(_ws)}{fields[k]}' for k in keys)
    text = ("{" + ws + body + draw(_ws) + "}").encode()
    if draw(st.integers(0, 4)) == 0 and text:
        i = draw(st.integers(0, len(text) - 1))
        text = text[:i] + bytes([draw(st.integers(0, 255))]) + text[i + 1 :]
    return text


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(lines(), min_size=1, max_size=8))
def test_generated_lines_equal_the_reference(chunk: list[bytes]) -> None:
    check([x.strip() or b"{}" for x in chunk])


def test_hit_times_are_read_only_views_of_one_array() -> None:
    got = decode_lines([plain(seq=1), plain(seq=2)], REG, [1, 2])
    assert all(isinstance(g, HitBatch) for g in got)
    first = got[0]
    assert isinstance(first, HitBatch)
    with pytest.raises(ValueError):
        first.t[0] = 0


@settings(max_examples=300, deadline=None)
@given(st.lists(st.sampled_from([b"\n", b"\r", b" ", b"\t", b"\x0b", b"\x0c", b"x", b"{}"])))
def test_lines_of_a_block_are_split_and_stripped_as_python_does(parts: list[bytes]) -> None:
    """``split_lines`` gives each line of a block as ``bytes.split(b"\\n")`` and
    ``bytes.strip()`` give it, blank lines left out, each with its index."""
    data = b"".join(parts)
    starts, ends, index = split_lines(np.frombuffer(data, dtype=np.uint8))
    got = [(int(k), data[a:b]) for k, a, b in zip(index, starts, ends, strict=True)]
    want = [(k, x.strip()) for k, x in enumerate(data.split(b"\n")) if x.strip()]
    assert got == want
