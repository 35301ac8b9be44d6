"""The follow-up desk: which outside events are searched, when, and what we answer.

Pure and synchronous (the live service and ``tocsin followup`` share it):

* :meth:`FollowupDesk.offer` takes a checked :class:`~tocsin.alerts.external.ExternalEvent`
  and keeps it only if its role and author are allowed, it is new (by IVORN and by
  the [VTP2 §8] key) and it reports something (a packet citing another only with
  ``followup`` is someone else's follow-up). A ``supersedes`` citation replaces the
  cited event (a new answer follows if one was sent); a ``retraction`` cancels a
  pending search, or retracts our answer if it was sent.
* :meth:`FollowupDesk.due` says which pending events have all their data in the ring
  buffer (the window's end plus the slots' reach) — or can never have it (the window
  starts before the oldest data held): those are answered ``no_data``, saying so.
* :meth:`FollowupDesk.answer` archives the follow-up packet (kind ``followup``, the
  same archive and deliveries as our own alerts) and writes one line to
  ``followups.jsonl``.
* Every packet the desk takes is journaled in the archive (exact bytes) before it
  is acted on; after a restart :meth:`FollowupDesk.restore`
  offers the journal again, in arrival order, so events still waiting for their
  window are searched and answered as if the service had never stopped. Answers and
  retractions already archived are adopted, never sent twice.
"""

from __future__ import annotations

import datetime as dt
import hashlib
from collections import Counter
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import orjson

from tocsin.alerts.archive import AlertRow, Archive, utc_stamp
from tocsin.alerts.external import ExternalEvent, ExternalRejected, read_external
from tocsin.alerts.followup_packet import FollowupMeta, Outcome, build_followup
from tocsin.alerts.policy import AlertDesk
from tocsin.alerts.safexml import PacketRejected, XmlLimits, check_voevent
from tocsin.engine.block import Block
from tocsin.engine.geometry import ellipsoid_up
from tocsin.engine.sky import radec_to_ecef_unit
from tocsin.engine.targeted import GUARD_NS, Direction, TargetedResult, TargetedSearch
from tocsin.gpstime import gps_ns_to_utc_iso
from tocsin.model.alert_config import AlertConfig
from tocsin.model.config import CoincidenceConfig
from tocsin.model.followup_config import FollowupConfig
from tocsin.model.registry import SiteRegistry
from tocsin.types import NS_PER_S, GpsNs

MAX_PENDING = 1000
"""Pending events kept at most (the oldest is answered ``no_data`` beyond)."""


@dataclass(slots=True)
class _Tracked:
    """One outside event (a chain of updates), keyed by its first IVORN."""

    event: ExternalEvent
    state: str  # pending | answered | cancelled | retracted
    answers: list[str]
    family: str


class FollowupDesk:
    """Decides what to search and archives the answers (see the module docstring)."""

    def __init__(
        self,
        cfg: FollowupConfig,
        alert_cfg: AlertConfig,
        registry: SiteRegistry,
        coinc: CoincidenceConfig,
        *,
        desk: AlertDesk | None,
        jsonl: Path,
        now: Any = None,
    ) -> None:
        self.cfg = cfg
        self.alert_cfg = alert_cfg
        self.registry = registry
        self.coinc = coinc
        self.desk = desk
        self.archive: Archive | None = desk.archive if desk is not None else None
        self.jsonl = jsonl
        self.now = now or (lambda: dt.datetime.now(dt.UTC))
        self.tracked: dict[str, _Tracked] = {}
        self.alias: dict[str, str] = {}
        self.keys: set[str] = set()
        self.retracted_early: set[str] = set()
        self.counters: Counter[str] = Counter()
        self.reach_ns = int(max(coinc.scales_s) * NS_PER_S) + 2 * GUARD_NS
        self.last_packet: bytes | None = None
        """The last answer's packet (for ``tocsin followup``, which keeps no archive)."""
        self._restoring = False
        self.answered_before: dict[str, str] = {}
        """Outside IVORN -> our first answer, from the archive (answers of earlier runs)."""
        if self.archive is not None:
            rows = self.archive.followup_index(limit=100_000)
            withdrawn = {cand for kind, cand, _, _ in rows if kind == "retraction"}
            for kind, cand, cites, ivorn in rows:
                if kind == "followup" and cites and cand not in withdrawn:
                    self.answered_before.setdefault(cites, ivorn)

    # -- intake ----------------------------------------------------------------
    def offer(self, ev: ExternalEvent) -> str:
        """Take a checked outside event. Returns what happened (``pending``, ``superseded``,
        ``cancelled``, ``retracted``, ``retraction_noted``); raises :class:`ExternalRejected`
        (role, author, duplicate, citation only, no time) otherwise. The packet is
        journaled in the archive (when there is one) before it is acted on, so a crash
        at any point leaves it to :meth:`restore`; a refused one is dropped again."""
        if self.archive is None:
            return self._take(ev)
        seq = self.archive.add_external(ev.ivorn, ev.raw, utc_stamp(self.now()))
        try:
            return self._take(ev)
        except ExternalRejected:
            self.archive.drop_external(seq)
            raise

    def restore(self, packets: Iterable[bytes], *, limits: XmlLimits) -> int:
        """Rebuild the tracked events from journaled packets (:meth:`Archive.externals`,
        in arrival order) after a restart. Each is checked again and offered as when it
        arrived, but nothing is journaled, written to ``followups.jsonl`` or sent again:
        an event whose answer (or retraction) is already archived takes it over. Returns
        the number of events left pending (searched when their data is in)."""
        counters = self.counters.copy()
        failed = 0
        self._restoring = True
        try:
            for raw in packets:
                try:
                    ev = read_external(check_voevent(raw, limits=limits))
                    self._take(ev)
                except (PacketRejected, ExternalRejected):
                    continue  # refused now as then (e.g. a role no longer followed)
                except Exception:  # one bad packet must not stop a start-up
                    failed += 1
                    continue
                root = self.alias.get(ev.ivorn)
                if root is not None:
                    self._adopt_answers(root)
        finally:
            self._restoring = False
        pending = sum(1 for tr in self.tracked.values() if tr.state == "pending")
        self.counters = counters
        self.counters["restored_pending"] += pending
        if failed:
            self.counters["restore_failed"] += failed
        return pending

    def _adopt_answers(self, key: str) -> None:
        """Take over answers to ``key`` archived before a restart (same IVORNs)."""
        tr = self.tracked.get(key)
        while tr is not None and tr.state == "pending" and self.archive is not None:
            row = self.archive.get(self._answer_ivorn(tr))
            if row is None or row.cites != tr.event.ivorn:
                return
            tr.answers.append(row.ivorn)
            tr.state = "answered"

    def _answer_ivorn(self, tr: _Tracked) -> str:
        """IVORN of the next answer to ``tr``: ``#<family>``, then ``-r1``, ``-r2`` ..."""
        ours = f"{self.alert_cfg.stream_ivorn}#{tr.family}"
        return f"{ours}-r{len(tr.answers)}" if tr.answers else ours

    def _take(self, ev: ExternalEvent) -> str:
        """:meth:`offer` without the journal."""
        if ev.role not in self.cfg.roles:
            raise ExternalRejected(
                "role_not_allowed",
                f"role {ev.role!r}; this service follows up {self.cfg.roles}",
                ivorn=ev.ivorn,
            )
        if not self.cfg.author_allowed(ev.author):
            raise ExternalRejected(
                "author_not_allowed",
                f"author {ev.author!r} is not among {self.cfg.authors}",
                ivorn=ev.ivorn,
            )
        if ev.dedup_key in self.keys or ev.ivorn in self.alias:
            raise ExternalRejected("duplicate", "packet already received", ivorn=ev.ivorn)
        if ev.ivorn in self.answered_before and not self._restoring:
            raise ExternalRejected(
                "duplicate",
                f"already answered by {self.answered_before[ev.ivorn]} (archive)",
                ivorn=ev.ivorn,
            )
        self.keys.add(ev.dedup_key)
        for cited, how in ev.citations:
            if how == "retraction":
                self.alias[ev.ivorn] = self.alias.get(cited, cited)
                return self._retract(cited, ev)
        for cited, how in ev.citations:
            if how == "supersedes" and cited in self.alias:
                return self._supersede(cited, ev)
        if ev.citations and all(h == "followup" for _, h in ev.citations):
            raise ExternalRejected(
                "citation_only", "a follow-up of another event, not a new one", ivorn=ev.ivorn
            )
        if ev.time_gps_ns is None:
            raise ExternalRejected("no_time", "the packet gives no event time", ivorn=ev.ivorn)
        if ev.ivorn in self.retracted_early:
            self.alias[ev.ivorn] = ev.ivorn
            self.counters["retracted_before_arrival"] += 1
            return "cancelled"
        self.alias[ev.ivorn] = ev.ivorn
        fam = "fu-" + hashlib.sha1(ev.ivorn.encode()).hexdigest()[:16]
        self.tracked[ev.ivorn] = _Tracked(ev, "pending", [], fam)
        self.counters["accepted"] += 1
        self._cap_pending()
        return "pending"

    def _supersede(self, cited: str, ev: ExternalEvent) -> str:
        root = self.alias[cited]
        self.alias[ev.ivorn] = root
        tr = self.tracked.get(root)
        if tr is None or tr.state in ("cancelled", "retracted") or ev.time_gps_ns is None:
            return "ignored"
        tr.event = ev
        tr.state = "pending"  # searched again; a sent answer is followed by a new one
        self.counters["superseded"] += 1
        return "superseded"

    def _retract(self, cited: str, ev: ExternalEvent) -> str:
        root = self.alias.get(cited)
        tr = self.tracked.get(root) if root is not None else None
        earlier = self.answered_before.pop(cited, None)
        if tr is None and earlier is not None and self.desk is not None:
            reason = f"the cited event {cited} was retracted by {ev.ivorn}"
            self.desk.retract(earlier, reason)
            self.counters["answers_retracted"] += 1
            return "retracted"
        if tr is None:
            self.retracted_early.add(cited)
            self.counters["retraction_noted"] += 1
            return "retraction_noted"
        reason = f"the cited event {cited} was retracted by {ev.ivorn}"
        if tr.answers and self.desk is not None:
            tr.state = "retracted"
            if self.archive is not None and any(
                a.kind == "retraction" for a in self.archive.alerts_for(tr.family)
            ):
                return "retracted"  # ours is retracted already (a restore, or a repeat)
            row = self.desk.retract(tr.answers[0], reason)
            self._line(tr, "retracted", None, note=reason, ours=row.ivorn)
            self.counters["answers_retracted"] += 1
            return "retracted"
        tr.state = "cancelled"
        self._line(tr, "cancelled", None, note=reason, ours=None)
        self.counters["cancelled"] += 1
        return "cancelled"

    def _cap_pending(self) -> None:
        pend = [k for k, t in self.tracked.items() if t.state == "pending"]
        for k in pend[: max(0, len(pend) - MAX_PENDING)]:
            self.tracked[k].state = "cancelled"
            self.counters["dropped_pending"] += 1

    # -- scheduling --------------------------------------------------------------
    def window(self, ev: ExternalEvent) -> tuple[int, int]:
        """(before, after) in ns for this event's messenger."""
        w = self.cfg.window_for(ev.messenger)
        return round(w.before_s * NS_PER_S), round(w.after_s * NS_PER_S)

    def due(self, held_from: GpsNs | None, held_to: GpsNs | None) -> list[tuple[str, bool]]:
        """Pending events that can be answered now: (key, has_data). ``held_from/to``:
        the span the ring buffer holds (GPS ns), None when empty."""
        out: list[tuple[str, bool]] = []
        for key, tr in self.tracked.items():
            if tr.state != "pending":
                continue
            t = tr.event.time_gps_ns
            assert t is not None
            before, after = self.window(tr.event)
            if held_to is None or held_from is None:
                continue
            if t - before < held_from + self.reach_ns:
                out.append((key, False))
            elif t + after + self.reach_ns <= held_to:
                out.append((key, True))
        return out

    def span_needed(self, key: str, held_from: GpsNs) -> tuple[GpsNs, GpsNs]:
        """The stretch of data to search for ``key`` (on-source and off-source windows)."""
        ev = self.tracked[key].event
        assert ev.time_gps_ns is not None
        before, after = self.window(ev)
        length = before + after
        cap = round(self.cfg.offsource_hours * 3600 * NS_PER_S) // 2
        half = min((self.cfg.offsource_max // 2 + 1) * length, max(cap - length // 2, 0))
        lo = max(held_from, ev.time_gps_ns - before - half - self.reach_ns)
        hi = ev.time_gps_ns + after + half + self.reach_ns
        return GpsNs(lo), GpsNs(hi)

    def search(self, key: str, block: Block) -> TargetedResult:
        """Run the targeted search for ``key`` over ``block`` (pure; may run in a thread)."""
        ev = self.tracked[key].event
        assert ev.time_gps_ns is not None
        before, after = self.window(ev)
        ts = TargetedSearch(self.registry, block, self.coinc, window_ns=before + after)
        direction = self.direction(ev)
        seed = int(hashlib.sha1(ev.dedup_key.encode()).hexdigest()[:8], 16)
        return ts.search(
            ev.time_gps_ns,
            before_ns=before,
            after_ns=after,
            direction=direction,
            seed=seed,
            max_offsource=self.cfg.offsource_max,
        )

    def direction(self, ev: ExternalEvent) -> Direction | None:
        """The Earth-fixed direction of the packet's position at its time, with the sites
        that see it above their horizon; None without a position or with < 2 such sites."""
        if ev.ra_deg is None or ev.dec_deg is None or ev.time_gps_ns is None:
            return None
        n = radec_to_ecef_unit(ev.ra_deg, ev.dec_deg, ev.time_gps_ns)
        visible = ellipsoid_up(self.registry.ecef_m) @ n > 0.0
        if int(np.sum(visible)) < 2:
            return None
        return Direction(n, visible)

    # -- answers -----------------------------------------------------------------
    def answer(self, key: str, result: TargetedResult | None, *, note: str = "") -> AlertRow | None:
        """Archive the answer to ``key`` (``result`` None: no data) and write its line."""
        tr = self.tracked[key]
        if tr.state != "pending":
            return None  # cancelled or retracted while the search ran
        ev = tr.event
        before, after = self.window(ev)
        outcome: Outcome
        if result is None:
            outcome = "no_data"
        elif result.live_fraction <= 0.0:
            outcome, result = "no_data", None
            note = note or "no site was live in the window"
        elif result.p_value <= self.cfg.detection_p:
            outcome = "detection"
        else:
            outcome = "upper_limit"
        ours = self._answer_ivorn(tr)
        created = self.now()
        meta = FollowupMeta(ours, created, outcome, before / NS_PER_S, after / NS_PER_S, note)
        xml = build_followup(ev, result, meta, self.alert_cfg)
        row: AlertRow | None = None
        if self.desk is not None and self.archive is not None:
            level = self.cfg.level
            iso = utc_stamp(created)
            new = AlertRow(
                seq=0,
                ivorn=ours,
                candidate_id=tr.family,
                source_id=tr.family,
                revision=len(tr.answers) + 1,
                kind="followup",
                level=level,
                status="queued",
                cites=ev.ivorn,
                note=note,
                created_utc=iso,
                event_gps_ns=ev.time_gps_ns,
                far_per_year=None,
                skymap=None,
                xml=xml,
            )
            self.archive.insert_alert(new, self.desk.sinks_for(level), iso)
            row = self.archive.get(ours)
        tr.answers.append(ours)
        tr.state = "answered"
        self.counters[f"answered_{outcome}"] += 1
        self._line(tr, outcome, result, note=note, ours=ours, xml=xml)
        return row

    def _line(
        self,
        tr: _Tracked,
        outcome: str,
        result: TargetedResult | None,
        *,
        note: str,
        ours: str | None,
        xml: bytes | None = None,
    ) -> None:
        if self._restoring:
            return  # written when it first happened
        ev = tr.event
        rec: dict[str, Any] = {
            "external_ivorn": ev.ivorn,
            "external_author": ev.author,
            "messenger": ev.messenger,
            "event_gps_ns": ev.time_gps_ns,
            "event_utc": gps_ns_to_utc_iso(ev.time_gps_ns) if ev.time_gps_ns else None,
            "outcome": outcome,
            "followup_ivorn": ours,
            "note": note,
        }
        if result is not None:
            rec.update(
                window_start_gps_ns=int(result.window_start),
                window_end_gps_ns=int(result.window_end),
                p_value=result.p_value,
                p_value_calibration=result.calibration,
                p_value_offsource=result.p_offsource,
                p_value_sidak=result.p_analytic,
                offsource_windows=result.n_offsource,
                offsource_excluded=result.n_offsource_excluded,
                evaluations=result.n_evaluations,
                live_fraction=result.live_fraction,
                statistics=result.statistics,
                visible_sites=result.visible_sites,
                best=None
                if result.best is None
                else {
                    "statistic": result.best.kind,
                    "scale_s": result.best.scale_s,
                    "time_gps_ns": int(result.best.time_gps_ns),
                    "local_p": result.best.local_p,
                    "site": result.best.site,
                    "multiplicity": result.best.multiplicity,
                    "observed": result.best.observed,
                },
                observed=result.observed,
                expected=result.expected,
                upper_limit_90=result.upper_limit_90,
            )
        self.jsonl.parent.mkdir(parents=True, exist_ok=True)
        with open(self.jsonl, "ab") as fh:
            fh.write(orjson.dumps(rec) + b"\n")
        if xml is not None:
            self.last_packet = xml
