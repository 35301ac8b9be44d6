"""The follow-up desk and intake: filters, de-duplication, updates, retractions, answers,
hostile packets (fictional facility ``ivo://far-observatory.example``)."""

from __future__ import annotations

import asyncio
import json
import tracemalloc
from pathlib import Path

import numpy as np
import pytest
from prometheus_client import CollectorRegistry

from tests.alertkit import config as alert_config
from tests.extpackets import (
    AUTHOR_IVORN,
    BILLION_LAUGHS,
    EXTERNAL_ENTITY,
    external_packet,
    huge_packet,
    ivorn,
)
from tocsin.alerts.archive import Archive
from tocsin.alerts.external import ExternalRejected, parse_external
from tocsin.alerts.followup_desk import FollowupDesk
from tocsin.alerts.packet import read_alert
from tocsin.alerts.policy import AlertDesk
from tocsin.alerts.safexml import XmlLimits, check_voevent
from tocsin.engine.block import Block
from tocsin.io.hitring import HitRing
from tocsin.live.followup_intake import FollowupIntake
from tocsin.model.config import CoincidenceConfig
from tocsin.model.followup_config import FollowupConfig
from tocsin.model.registry import SiteRegistry
from tocsin.types import NS_PER_S

T0 = 1_457_481_618 * NS_PER_S
SPAN_S = 1200
LIMITS = XmlLimits()
COINC = CoincidenceConfig(scales_s=[1e-6, 1e-4, 1e-2], front_scales_s=[1e-6])


def _cfg(**kw: object) -> FollowupConfig:
    base: dict[str, object] = {
        "enabled": True,
        "authors": [AUTHOR_IVORN],
        "windows": {"gw": {"before_s": 10.0, "after_s": 10.0}},
    }
    return FollowupConfig.model_validate({**base, **kw})


def _ring(reg: SiteRegistry, seed: int = 1) -> HitRing:
    rng = np.random.default_rng(seed)
    ring = HitRing(len(reg), hours=1.0)
    n = len(reg)
    for k in range(SPAN_S // 60):
        a, b = T0 + k * 60 * NS_PER_S, T0 + (k + 1) * 60 * NS_PER_S
        cnt = rng.poisson(3.0 * 60, n)
        t = np.concatenate([rng.integers(a, b, c) for c in cnt]).astype(np.int64)
        s = np.repeat(np.arange(n, dtype=np.int32), cnt)
        o = np.argsort(t, kind="stable")
        ring.add(
            Block(a, b, t[o], s[o], np.arange(n, dtype=np.int32), np.full(n, a), np.full(n, b))
        )
    return ring


class _Setup:
    def __init__(self, tmp: Path, reg: SiteRegistry, **kw: object) -> None:
        self.acfg = alert_config(role="test")
        self.archive = Archive(
            tmp / "alerts.sqlite", stream=self.acfg.stream_ivorn, role=self.acfg.role
        )
        self.alert_desk = AlertDesk(self.acfg, self.archive, packet_dir=tmp / "pk", mqtt=True)
        self.jsonl = tmp / "followups.jsonl"
        self.desk = FollowupDesk(
            _cfg(**kw), self.acfg, reg, COINC, desk=self.alert_desk, jsonl=self.jsonl
        )

    def lines(self) -> list[dict[str, object]]:
        return [json.loads(x) for x in self.jsonl.read_text().splitlines()]


def _ev(local: str, t: int | None, **kw: object) -> object:
    return parse_external(external_packet(local, t, **kw), limits=LIMITS)  # type: ignore[arg-type]


def test_roles_and_authors_are_filtered(tmp_path: Path, small_registry: SiteRegistry) -> None:
    st = _Setup(tmp_path, small_registry)
    t = T0 + 600 * NS_PER_S
    assert st.desk.offer(_ev("A1", t)) == "pending"  # type: ignore[arg-type]
    with pytest.raises(ExternalRejected) as e1:
        st.desk.offer(_ev("A2", t, role="test"))  # type: ignore[arg-type]
    assert e1.value.reason == "role_not_allowed"
    with pytest.raises(ExternalRejected) as e2:
        st.desk.offer(_ev("A3", t, author="elsewhere.example"))  # type: ignore[arg-type]
    assert e2.value.reason == "author_not_allowed"
    # test packets are followed up when the operator asks for them
    st2 = _Setup(tmp_path / "b", small_registry, roles=["observation", "test"])
    assert st2.desk.offer(_ev("A2", t, role="test")) == "pending"  # type: ignore[arg-type]


def test_duplicates_by_ivorn_and_by_key(tmp_path: Path, small_registry: SiteRegistry) -> None:
    st = _Setup(tmp_path, small_registry)
    raw = external_packet("D1", T0 + 600 * NS_PER_S)
    st.desk.offer(parse_external(raw, limits=LIMITS))
    for again in (raw, raw.replace(b"?>", b"?>\n<!-- resent -->", 1)):  # same §8 key
        with pytest.raises(ExternalRejected, match="duplicate"):
            st.desk.offer(parse_external(again, limits=LIMITS))
    # same IVORN, different content (another serialisation): still the same event
    other = external_packet("D1", T0 + 601 * NS_PER_S)
    with pytest.raises(ExternalRejected, match="duplicate"):
        st.desk.offer(parse_external(other, limits=LIMITS))


def test_answer_is_a_valid_followup_packet(tmp_path: Path, small_registry: SiteRegistry) -> None:
    st = _Setup(tmp_path, small_registry)
    ring = _ring(small_registry)
    t = T0 + 600 * NS_PER_S
    st.desk.offer(_ev("F1", t, ra_dec_err=(150.0, 35.0, 2.0)))  # type: ignore[arg-type]
    due = st.desk.due(ring.t_start, ring.t_end)
    assert due == [(ivorn("F1"), True)]
    lo, hi = st.desk.span_needed(ivorn("F1"), ring.t_start or 0)
    row = st.desk.answer(ivorn("F1"), st.desk.search(ivorn("F1"), ring.block(lo, hi)))
    assert row is not None and row.kind == "followup" and row.cites == ivorn("F1")
    chk = check_voevent(row.xml)  # VOEvent 2.0 schema, through the untrusted-input gate
    assert chk.role == "test"
    got = read_alert(row.xml)
    assert (ivorn("F1"), "followup") in got.citations
    assert got.params["alert_kind"] == "followup"
    assert got.params["followup_outcome"] in ("upper_limit", "detection")
    assert 0.0 <= float(got.params["p_value"]) <= 1.0
    assert got.ra_deg == pytest.approx(150.0)
    [line] = st.lines()
    assert line["outcome"] == got.params["followup_outcome"]
    assert line["followup_ivorn"] == row.ivorn
    assert {d.sink for d in st.archive.deliveries(row.ivorn)} == {"dir", "mqtt"}
    assert st.desk.due(ring.t_start, ring.t_end) == []  # answered once


def test_event_before_the_buffer_is_answered_no_data(
    tmp_path: Path, small_registry: SiteRegistry
) -> None:
    st = _Setup(tmp_path, small_registry)
    ring = _ring(small_registry)
    st.desk.offer(_ev("N1", T0 - 3600 * NS_PER_S))  # type: ignore[arg-type]
    assert st.desk.due(ring.t_start, ring.t_end) == [(ivorn("N1"), False)]
    row = st.desk.answer(ivorn("N1"), None, note="before the oldest data held")
    assert row is not None
    got = read_alert(row.xml)
    assert got.params["followup_outcome"] == "no_data"
    assert "p_value" not in got.params
    assert st.lines()[0]["outcome"] == "no_data"


def test_retraction_cancels_a_pending_search(tmp_path: Path, small_registry: SiteRegistry) -> None:
    st = _Setup(tmp_path, small_registry)
    ring = _ring(small_registry)
    t = T0 + 600 * NS_PER_S
    st.desk.offer(_ev("R1", t))  # type: ignore[arg-type]
    retr = _ev("R1-x", None, cite=(ivorn("R1"), "retraction"))
    assert st.desk.offer(retr) == "cancelled"  # type: ignore[arg-type]
    assert st.desk.due(ring.t_start, ring.t_end) == []
    assert st.archive.latest() == []  # nothing was, or will be, sent
    assert st.lines()[0]["outcome"] == "cancelled"


def test_retraction_after_the_answer_retracts_ours(
    tmp_path: Path, small_registry: SiteRegistry
) -> None:
    st = _Setup(tmp_path, small_registry)
    ring = _ring(small_registry)
    key = ivorn("R2")
    st.desk.offer(_ev("R2", T0 + 600 * NS_PER_S))  # type: ignore[arg-type]
    lo, hi = st.desk.span_needed(key, ring.t_start or 0)
    ours = st.desk.answer(key, st.desk.search(key, ring.block(lo, hi)))
    assert ours is not None
    retr = _ev("R2-x", None, cite=(key, "retraction"))
    assert st.desk.offer(retr) == "retracted"  # type: ignore[arg-type]
    rows = {r.kind: r for r in st.archive.latest()}
    assert rows["retraction"].cites == ours.ivorn
    got = read_alert(rows["retraction"].xml)
    assert (ours.ivorn, "retraction") in got.citations
    assert {d.sink for d in st.archive.deliveries(rows["retraction"].ivorn)} == {"dir", "mqtt"}
    outcomes = [x["outcome"] for x in st.lines()]
    assert outcomes[1:] == ["retracted"] and outcomes[0] in ("upper_limit", "detection")


def test_supersedes_moves_a_pending_event(tmp_path: Path, small_registry: SiteRegistry) -> None:
    st = _Setup(tmp_path, small_registry)
    st.desk.offer(_ev("S1", T0 + 600 * NS_PER_S))  # type: ignore[arg-type]
    upd = _ev("S1-2", T0 + 700 * NS_PER_S, cite=(ivorn("S1"), "supersedes"))
    assert st.desk.offer(upd) == "superseded"  # type: ignore[arg-type]
    assert st.desk.tracked[ivorn("S1")].event.time_gps_ns == T0 + 700 * NS_PER_S
    # a retraction citing the update reaches the same event
    retr = _ev("S1-x", None, cite=(ivorn("S1-2"), "retraction"))
    assert st.desk.offer(retr) == "cancelled"  # type: ignore[arg-type]


def test_hostile_packets_are_refused_with_bounded_memory(
    tmp_path: Path, small_registry: SiteRegistry
) -> None:
    st = _Setup(tmp_path, small_registry)
    intake = FollowupIntake(_cfg(), st.desk, _ring(small_registry), tmp_path, CollectorRegistry())
    big = huge_packet()
    assert len(big) == 50 * 1024 * 1024

    async def go() -> list[str]:
        out = []
        for raw in (BILLION_LAUGHS, EXTERNAL_ENTITY, big):
            tracemalloc.start()
            out.append(await intake.submit(raw, "test"))
            _, peak = tracemalloc.get_traced_memory()
            tracemalloc.stop()
            # bounded: far below the 50 MB payload, let alone a ~3 GB expansion
            assert peak < 2_000_000, (out[-1], peak)
        out.append(await intake.submit(external_packet("OK1", T0 + 600 * NS_PER_S), "test"))
        return out

    assert asyncio.run(go()) == ["doctype", "doctype", "too_large", "accepted"]
    assert intake.counts == {"doctype": 2, "too_large": 1, "accepted": 1}
    refused = [
        json.loads(x) for x in (tmp_path / "external_rejected.jsonl").read_text().split("\n") if x
    ]
    assert [r["reason"] for r in refused] == ["doctype", "doctype", "too_large"]
    status = json.loads((tmp_path / "followup_status.json").read_text())
    assert status["packets"] == {"accepted": 1, "doctype": 2, "too_large": 1}


def _restart(tmp: Path, reg: SiteRegistry, old: _Setup) -> tuple[_Setup, int]:
    """Close ``old`` as a crash would leave it, open a new desk on the same archive and
    offer it the journal, as the service does at start-up."""
    old.archive.close()
    st = _Setup(tmp, reg)
    return st, st.desk.restore(st.archive.externals(""), limits=LIMITS)


def test_a_pending_event_survives_a_restart(tmp_path: Path, small_registry: SiteRegistry) -> None:
    st = _Setup(tmp_path, small_registry)
    ring = _ring(small_registry)
    key = ivorn("J1")
    assert st.desk.offer(_ev("J1", T0 + 600 * NS_PER_S)) == "pending"  # type: ignore[arg-type]
    with pytest.raises(ExternalRejected):  # refused packets are not journaled
        st.desk.offer(_ev("J2", T0, role="utility"))  # type: ignore[arg-type]
    assert len(st.archive.externals("")) == 1
    # the service stops before the window has its data: nothing answered yet
    st, pending = _restart(tmp_path, small_registry, st)
    assert pending == 1
    assert st.desk.due(ring.t_start, ring.t_end) == [(key, True)]
    lo, hi = st.desk.span_needed(key, ring.t_start or 0)
    row = st.desk.answer(key, st.desk.search(key, ring.block(lo, hi)))
    assert row is not None and row.cites == key
    assert [x["external_ivorn"] for x in st.lines()] == [key]
    # the same packet arriving again (a broker re-delivery) is a duplicate
    with pytest.raises(ExternalRejected, match="duplicate"):
        st.desk.offer(_ev("J1", T0 + 600 * NS_PER_S))  # type: ignore[arg-type]


def test_a_restart_sends_nothing_twice(tmp_path: Path, small_registry: SiteRegistry) -> None:
    """Answered, updated, re-answered and retracted before the restart: after it the
    chain is tracked again with the same answers and nothing new is archived or written."""
    st = _Setup(tmp_path, small_registry)
    ring = _ring(small_registry)
    key = ivorn("K1")

    def answer() -> None:
        lo, hi = st.desk.span_needed(key, ring.t_start or 0)
        assert st.desk.answer(key, st.desk.search(key, ring.block(lo, hi))) is not None

    st.desk.offer(_ev("K1", T0 + 600 * NS_PER_S))  # type: ignore[arg-type]
    answer()
    upd = _ev("K1-2", T0 + 650 * NS_PER_S, cite=(key, "supersedes"))
    assert st.desk.offer(upd) == "superseded"  # type: ignore[arg-type]
    answer()
    before_rows = [(r.ivorn, r.kind) for r in st.archive.latest()]
    before_lines = st.lines()
    st, pending = _restart(tmp_path, small_registry, st)
    assert pending == 0
    tr = st.desk.tracked[key]
    assert tr.state == "answered" and len(tr.answers) == 2
    assert tr.event.ivorn == ivorn("K1-2")
    # a retraction after the restart retracts our answer once
    retr = _ev("K1-x", None, cite=(ivorn("K1-2"), "retraction"))
    assert st.desk.offer(retr) == "retracted"  # type: ignore[arg-type]
    rows = [(r.ivorn, r.kind) for r in st.archive.latest()]
    assert len(rows) == len(before_rows) + 1 and rows[0][1] == "retraction"
    # and a second restart replays all three packets without a new row or line
    lines = st.lines()
    st, pending = _restart(tmp_path, small_registry, st)
    assert pending == 0 and st.desk.tracked[key].state == "retracted"
    assert [(r.ivorn, r.kind) for r in st.archive.latest()] == rows
    assert st.lines() == lines and lines[: len(before_lines)] == before_lines


def test_packet_is_journaled_before_the_desk_acts(
    tmp_path: Path, small_registry: SiteRegistry, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A crash while the desk acts on a packet leaves it in the journal for the restart;
    a journaled packet the desk cannot take at start-up is counted, not fatal."""
    st = _Setup(tmp_path, small_registry)

    def crash(self: FollowupDesk, ev: object) -> str:
        raise RuntimeError("power cut")

    monkeypatch.setattr(FollowupDesk, "_take", crash)
    with pytest.raises(RuntimeError):
        st.desk.offer(_ev("C1", T0 + 600 * NS_PER_S))  # type: ignore[arg-type]
    assert len(st.archive.externals("")) == 1
    # start-up while the desk still fails on it: counted, the service starts
    st.archive.close()
    st = _Setup(tmp_path, small_registry)
    assert st.desk.restore(st.archive.externals(""), limits=LIMITS) == 0
    assert st.desk.counters["restore_failed"] == 1
    # and once the desk works again, the next start-up picks the event up
    monkeypatch.undo()
    st, pending = _restart(tmp_path, small_registry, st)
    assert pending == 1 and st.desk.tracked[ivorn("C1")].state == "pending"
