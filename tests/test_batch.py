"""Hit batch v1 validation (contract §3): every rule rejects the whole batch, naming the field."""

from __future__ import annotations

from typing import Any

import pytest
from hypothesis import event, given, settings
from hypothesis import strategies as st

from tocsin.errors import BatchRejected
from tocsin.io.recording import Rejected, decode_line
from tocsin.model.batch import REJECT_REASONS, parse_batch
from tocsin.model.registry import Site, SiteRegistry

T0 = 1_450_000_000 * 10**9


def good(**over: Any) -> dict[str, Any]:
    b: dict[str, Any] = {
        "v": 1,
        "site": "alder-fen-1",
        "seq": 7,
        "live": [T0, T0 + 10**9],
        "t": [T0 + 5, T0 + 600_000_000],
        "amp": [1.5, 2.0],
    }
    b.update(over)
    return b


def test_good_batch_becomes_int64_arrays(small_registry: SiteRegistry) -> None:
    b = parse_batch(good(), small_registry)
    assert b.t.dtype.name == "int64"
    assert b.t.tolist() == [T0 + 5, T0 + 600_000_000]
    assert b.site_index == 0
    assert b.n_hits == 2


def test_heartbeat_is_valid(small_registry: SiteRegistry) -> None:
    b = parse_batch(good(t=[], amp=None), small_registry)
    assert b.n_hits == 0


@pytest.mark.parametrize(
    ("over", "reason", "field"),
    [
        ({"v": 2}, "bad_version", "v"),
        ({"v": True}, "bad_version", "v"),
        ({"v": 1.0}, "bad_version", "v"),
        ({"site": "nowhere-9"}, "unknown_site", "site"),
        ({"seq": -1}, "bad_schema", "seq"),
        ({"seq": "7"}, "bad_schema", "seq"),
        ({"seq": True}, "bad_schema", "seq"),
        ({"t": [T0 + 9, T0 + 5], "amp": None}, "unsorted_hits", "t"),
        ({"t": [T0 - 1], "amp": None}, "hit_outside_live", "t"),
        ({"t": [T0 + 10**9], "amp": None}, "hit_outside_live", "t"),
        ({"t": [-5], "amp": None}, "bad_schema", "t.0"),
        ({"t": [1.5e18], "amp": None}, "bad_schema", "t.0"),
        ({"live": [T0 + 10, T0]}, "bad_live", "live"),
        ({"live": [T0, T0 + 3601 * 10**9]}, "bad_live", "live"),
        ({"live": [T0]}, "bad_schema", "live"),
        ({"amp": [1.0]}, "amp_length", "amp"),
        ({"extra": 1}, "bad_schema", "extra"),
    ],
)
def test_each_rule_rejects_naming_the_field(
    small_registry: SiteRegistry, over: dict[str, Any], reason: str, field: str
) -> None:
    with pytest.raises(BatchRejected) as err:
        parse_batch(good(**over), small_registry)
    assert err.value.reason == reason
    assert err.value.field == field
    assert reason in REJECT_REASONS


def test_topic_must_match_site(small_registry: SiteRegistry) -> None:
    with pytest.raises(BatchRejected, match="brack-hill") as err:
        parse_batch(good(), small_registry, topic_site="brack-hill")
    assert err.value.reason == "site_topic_mismatch"


def test_recording_line_errors_are_reported_not_raised(small_registry: SiteRegistry) -> None:
    r = decode_line(b'{"v": 1, "site": ', small_registry, line_no=4)
    assert isinstance(r, Rejected) and r.reason == "bad_json" and r.line_no == 4
    r2 = decode_line(b"[1, 2]", small_registry, line_no=5)
    assert isinstance(r2, Rejected) and r2.reason == "bad_schema"


@given(
    st.recursive(
        st.none() | st.booleans() | st.integers() | st.floats() | st.text(),
        lambda c: st.lists(c) | st.dictionaries(st.text(), c),
        max_leaves=20,
    )
)
def test_arbitrary_json_never_crashes(obj: object) -> None:
    """Property: any JSON value is either a valid batch or a BatchRejected, never another error."""
    from tocsin.model.registry import Site

    reg = SiteRegistry(
        [Site(id="alder-fen-1", lat_deg=1, lon_deg=2, height_m=0, clock_sigma_ns=10)]
    )
    try:
        parse_batch(obj, reg)
    except BatchRejected as exc:
        assert exc.reason in REJECT_REASONS


@pytest.mark.parametrize("n", [3, 64, 65, 500])
@pytest.mark.parametrize("where", ["start", "middle", "end"])
def test_unsorted_hits_name_the_first_descent(
    small_registry: SiteRegistry, n: int, where: str
) -> None:
    """Short batches are checked in plain Python, long ones with numpy: both name the
    first pair out of order (and a sorted batch of the same length passes)."""
    t = [T0 + 1000 * k for k in range(n)]
    parse_batch(good(t=t, amp=None), small_registry)
    k = {"start": 0, "middle": n // 2, "end": n - 2}[where]
    t[k], t[k + 1] = t[k + 1], t[k]  # the first descent is at k
    with pytest.raises(BatchRejected) as err:
        parse_batch(good(t=t, amp=None), small_registry)
    assert err.value.reason == "unsorted_hits"
    assert err.value.detail == f"t[{k + 1}]={t[k + 1]} is earlier than t[{k}]={t[k]}"


_valid_int = st.integers(min_value=0, max_value=2**63 - 1)
_any_int = st.one_of(
    st.integers(min_value=-3, max_value=2**64), st.booleans(), st.floats(), st.text(max_size=2)
)


def _mostly(
    valid: st.SearchStrategy[object], other: st.SearchStrategy[object]
) -> st.SearchStrategy[object]:
    """``valid`` nine times in ten (so the plain path is often taken), else ``other``."""
    return st.tuples(st.integers(0, 9), valid, other).map(lambda x: x[1] if x[0] else x[2])


_elem = _mostly(_valid_int, _any_int)


@settings(max_examples=500)
@given(
    v=_mostly(st.just(1), st.sampled_from([True, 1.0, 2])),
    site=_mostly(st.just("alder-fen-1"), st.integers()),
    seq=_mostly(_valid_int, _any_int),
    live=_mostly(st.lists(_elem, min_size=2, max_size=2), st.lists(_elem, max_size=3)),
    t=st.lists(_elem, max_size=6),
    amp=_mostly(st.none(), st.lists(st.floats(), max_size=2)),
    extra=_mostly(
        st.just({}), st.dictionaries(st.sampled_from(["x", "recv"]), st.integers(), max_size=1)
    ),
)
def test_the_plain_path_accepts_only_what_pydantic_accepts(
    v: object,
    site: object,
    seq: object,
    live: object,
    t: object,
    amp: object,
    extra: dict[str, int],
) -> None:
    """Property: the validator-free path for plainly valid batches accepts a batch
    only if pydantic's strict model accepts it too, with the same values."""
    from tocsin.model.batch import _BatchV1, _plainly_valid

    obj = {"v": v, "site": site, "seq": seq, "live": live, "t": t, "amp": amp, **extra}
    plain = _plainly_valid(obj)
    event("plain path" if plain is not None else "validator")
    if plain is not None:
        m = _BatchV1.model_validate(obj)
        assert (plain.site, plain.seq, plain.live, plain.t, plain.amp) == (
            m.site,
            m.seq,
            m.live,
            m.t,
            m.amp,
        )


def test_the_plain_path_takes_the_common_batch() -> None:
    """The typical batch (no amplitudes) goes the validator-free way; one with
    amplitudes, or a hit time given as a float, goes through pydantic."""
    from tocsin.model.batch import _plainly_valid

    assert _plainly_valid(good(amp=None)) is not None
    assert _plainly_valid(good()) is None
    assert _plainly_valid(good(amp=None, t=[T0 + 5, float(T0 + 6)])) is None
    for bad in ({"seq": True}, {"live": [T0, True]}, {"t": [True]}, {"v": True}, {"x": 1}):
        assert _plainly_valid(good(amp=None, **bad)) is None, bad


_REG_ONE = SiteRegistry(
    [Site(id="alder-fen-1", lat_deg=1, lon_deg=2, height_m=0, clock_sigma_ns=10)]
)
_SPAN = 10**9


@st.composite
def _near_valid_batches(draw: st.DrawFn) -> dict[str, Any]:
    """A batch that is valid, or broken in one place by an edit the fast path must
    notice: a hit at or past a live edge, out of order, a boolean or float hit,
    long batches, a wrong version or site, amplitudes, an unknown key."""
    start = draw(st.sampled_from([0, T0, 2**63 - 1 - _SPAN]))
    end = start + draw(st.sampled_from([0, 1, _SPAN, 3600 * 10**9 + 1]))
    n = draw(st.sampled_from([0, 1, 5, 64, 65]))
    t = sorted(draw(st.lists(st.integers(start, max(start, end - 1)), min_size=n, max_size=n)))
    obj: dict[str, Any] = {"v": 1, "site": "alder-fen-1", "seq": 3, "live": [start, end], "t": t}
    edit = draw(
        st.sampled_from(
            ["none", "at_end", "before_start", "swap", "bool", "float", "v", "site", "amp", "key"]
        )
    )
    if edit == "at_end":
        obj["t"] = [*t, end]
    elif edit == "before_start":
        obj["t"] = [start - 1, *t]
    elif edit == "swap" and len(t) >= 2 and t[0] != t[1]:
        obj["t"] = [t[1], t[0], *t[2:]]
    elif edit == "bool":
        obj["t"] = [*t, True]
    elif edit == "float":
        obj["t"] = [float(x) for x in t] or [float(start)]
    elif edit == "v":
        obj["v"] = draw(st.sampled_from([True, 1.0, 2]))
    elif edit == "site":
        obj["site"] = draw(st.sampled_from(["nowhere-9", 7]))
    elif edit == "amp":
        obj["amp"] = [1.0] * len(t)
    elif edit == "key":
        obj["x"] = 1
    return obj


@settings(max_examples=600)
@given(obj=_near_valid_batches(), recv=st.sampled_from([None, 0, T0]))
def test_the_one_pass_batch_is_what_the_rule_by_rule_path_gives(
    obj: dict[str, Any], recv: int | None
) -> None:
    """Property: the one-pass path (:func:`_plain_batch`) returns a batch only if the
    rule-by-rule path accepts it, with the same fields and array; and it takes every
    short batch without amplitudes that the rule-by-rule path accepts, so the
    common batch never pays for the slow way."""
    from tocsin.model.batch import _checked_batch, _plain_batch

    fast = _plain_batch(obj, _REG_ONE, recv)
    try:
        slow = _checked_batch(obj, _REG_ONE, recv_ns=recv)
    except BatchRejected as exc:
        event(f"rejected: {exc.reason}")
        assert fast is None
        return
    plain_kind = (
        "amp" not in obj and len(obj["t"]) <= 64 and obj.keys() <= {"v", "site", "seq", "live", "t"}
    )
    event("one pass" if fast is not None else "rule by rule")
    if fast is None:
        assert not plain_kind
        return
    assert fast[:5] + fast[6:] == slow[:5] + slow[6:]
    assert fast.t.dtype == slow.t.dtype and fast.t.tolist() == slow.t.tolist()
