"""Alert policy: which candidates become alerts, updates and retractions, and the rate limit.

Pure and synchronous (the service, replay and the ``retract`` command share it):

* Thresholds may be set per trigger (``*_by_trigger``, e.g. from ``tocsin tune``).
* A candidate whose false alarm rate is at most ``internal_far_per_year`` becomes an
  ``internal`` alert (our own sinks: the MQTT alert topic, the packet directory); at
  most ``public_far_per_year`` a ``public`` one (also every transport subscriber).
* A later revision of an alerted candidate (the merger only revises to a lower false
  alarm rate: more sites arrived, or a sharper scale) becomes an ``update`` packet with
  IVORN ``#<id>-u<revision>`` that cites the first alert with ``supersedes``.
* IVORNs derive from the candidate id (a function of the data), so replay and live give
  the same IVORN for the same candidate, and a restart never renumbers.
* Rate limit: a token bucket per level (``burst`` tokens, refilled at ``max_per_hour``
  per hour of *event* time, so replay decides exactly as live did). An alert that finds
  its level's bucket empty is archived as ``held``: recorded, never sent. A public
  alert is held only by the public bucket: a storm of internal alerts (a noisy site,
  thresholds set low for a trial) cannot hold back the one alert that observatories
  need; it still takes an internal token when one is left, so the internal bucket
  counts all the traffic of our own sinks. Retractions are never held.
"""

from __future__ import annotations

import datetime as dt
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path

import orjson

from tocsin.alerts.archive import AlertRow, Archive, utc_stamp
from tocsin.alerts.packet import (
    AlertKind,
    AlertMeta,
    Level,
    build_alert,
    build_retraction,
    error_ellipse_of,
    event_time,
    local_id,
)
from tocsin.alerts.skymap import write_skymap
from tocsin.errors import TocsinError
from tocsin.gpstime import gps_ns_to_utc_iso
from tocsin.model.alert_config import AlertConfig
from tocsin.model.candidate import Candidate
from tocsin.types import NS_PER_S

SINK_MQTT = "mqtt"
SINK_DIR = "dir"
VTP_PREFIX = "vtp:"
BUCKET_MEMORY_S = 86_400
"""On restart the buckets are rebuilt from the archived alerts of the last day."""
FAMILY_MEMORY_S = 600
"""Hits of alerted coincidences are remembered this long (s of event time) to group
other seeds of the same cluster into the same alert family."""


class AlertError(TocsinError):
    """A retraction or alert request that cannot be carried out (the message says why)."""


@dataclass(slots=True)
class TokenBucket:
    """``capacity`` tokens, refilled at ``per_hour`` per hour of event time (GPS ns)."""

    capacity: float
    per_hour: float
    tokens: float = field(init=False)
    t_ns: int | None = None

    def __post_init__(self) -> None:
        self.tokens = self.capacity

    def take(self, t_ns: int) -> bool:
        """Refill up to ``t_ns`` (event times may arrive slightly out of order) and take one."""
        if self.t_ns is not None and t_ns > self.t_ns:
            gained = (t_ns - self.t_ns) / NS_PER_S / 3600.0 * self.per_hour
            self.tokens = min(self.capacity, self.tokens + gained)
        if self.t_ns is None or t_ns > self.t_ns:
            self.t_ns = t_ns
        if self.tokens >= 1.0:
            self.tokens -= 1.0
            return True
        return False


def _hit_keys(sites: object, hit_times_ns: object) -> list[tuple[str, int]]:
    """(site, hit time ns) of a coincidence's hits (from a candidate or its archived
    JSON); empty for an excess."""
    if not isinstance(sites, list) or not isinstance(hit_times_ns, list):
        return []
    if not hit_times_ns or len(hit_times_ns) != len(sites):
        return []
    return [(str(s), int(t)) for s, t in zip(sites, hit_times_ns, strict=True)]


def _utc_now() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


class AlertDesk:
    """Turns candidates into archived alerts; knows which sinks each alert must reach."""

    def __init__(
        self,
        cfg: AlertConfig,
        archive: Archive,
        *,
        packet_dir: Path,
        mqtt: bool,
        subscribers: list[str] | None = None,
    ) -> None:
        self.cfg = cfg
        self.archive = archive
        self.packet_dir = packet_dir
        self.mqtt = mqtt
        self.subscribers = list(subscribers or [])
        self.now = _utc_now
        self.buckets: dict[str, TokenBucket] = {
            lv: TokenBucket(float(cfg.burst), cfg.max_per_hour) for lv in ("internal", "public")
        }
        self.n_held = 0
        self._by_hit: dict[tuple[str, int], str] = {}
        self._hits_by_time: deque[tuple[int, list[tuple[str, int]]]] = deque()
        self._rebuild_buckets()

    def _rebuild_buckets(self) -> None:
        rows = self.archive.latest(limit=1)
        if not rows or rows[0].event_gps_ns is None:
            return
        since = rows[0].event_gps_ns - BUCKET_MEMORY_S * NS_PER_S
        for family, raw in self.archive.recent_families(since):
            obj = orjson.loads(raw)
            self._remember(
                family,
                int(obj["time_gps_ns"]),
                _hit_keys(obj.get("sites"), obj.get("hit_times_ns")),
            )
        for t, level in self.archive.recent_sent(since):
            self._take(level, t)  # the same takes as when it was sent

    # -- sinks -----------------------------------------------------------------
    def sinks_for(self, level: str) -> list[str]:
        out = [SINK_DIR]
        if self.mqtt:
            out.append(SINK_MQTT)
        if level == "public":
            out += [VTP_PREFIX + s for s in self.subscribers]
        return out

    # -- candidates ------------------------------------------------------------
    def level_of(self, far_per_year: float, trigger: str = "") -> Level | None:
        public, internal = self.cfg.thresholds(trigger)
        if far_per_year <= public:
            return "public"
        if far_per_year <= internal:
            return "internal"
        return None

    def consider(self, cand: Candidate) -> AlertRow | None:
        """Archive ``cand``; return the new alert row if it became (or updated) an alert.

        Alerts come in *families*, one per physical cluster: a candidate that shares a
        hit with an alerted coincidence (another seed of the same cluster, which the
        engine keeps as a separate trial) or is a revision of an alerted candidate
        joins that family. A family member alerts only as an ``update`` that beats the
        family's best false alarm rate so far; otherwise it is archived, not sent.
        """
        obj = cand.to_json_obj()
        self.archive.add_candidate(obj, orjson.dumps(obj))
        level = self.level_of(cand.far_per_year, cand.trigger)
        if level is None:
            return None
        members = self.archive.alerts_for(cand.id)
        family = cand.id if members else self._family_by_hits(cand)
        if family != cand.id:
            members = self.archive.alerts_for(family)
        if any(a.kind == "retraction" for a in members):
            return None  # withdrawn by an operator: the cluster stays quiet
        kind: AlertKind = "new"
        cites = None
        note = ""
        if members:
            best = min(a.far_per_year for a in members if a.far_per_year is not None)
            if not cand.far_per_year < best:
                return None
            kind = "update"
            first = members[0]
            cites = first.ivorn
            if first.level == "public":
                level = "public"
            what = (
                f"revision {cand.revision}"
                if cand.id == family
                else f"candidate {cand.id} of the same cluster"
            )
            note = (
                f"Superseded by {what}: {len(cand.sites)} sites, false alarm rate "
                f"{cand.far_per_year:.3g} per year (was {best:.3g})."
            )
        ivorn = f"{self.cfg.stream_ivorn}#{local_id(family, kind, len(members))}"
        t_ns, _, _ = event_time(cand)
        held = not self._take(level, int(t_ns))
        created = self.now()
        now_iso = utc_stamp(created)
        skymap_uri, skymap_path = self._skymap(cand, ivorn)
        meta = AlertMeta(ivorn, kind, level, created, cites, note, skymap_uri)
        xml = build_alert(cand, meta, self.cfg)
        row = AlertRow(
            seq=0,
            ivorn=ivorn,
            candidate_id=family,
            revision=cand.revision,
            source_id=cand.id,
            kind=kind,
            level=level,
            status="held" if held else "queued",
            cites=cites,
            note=note,
            created_utc=now_iso,
            event_gps_ns=int(t_ns),
            far_per_year=float(cand.far_per_year),
            skymap=skymap_path,
            xml=xml,
        )
        sinks = [] if held else self.sinks_for(level)
        # Subscribers of the public level get the alerts this update cites first
        # (archive order: they go out before the update), queued in the update's
        # own transaction.
        cited = (
            [m.ivorn for m in members if m.status == "queued" and m.kind != "followup"]
            if members and not held and level == "public"
            else []
        )
        if not self.archive.insert_alert(row, sinks, now_iso, also_queue=cited):
            return None
        self._remember(family, int(cand.time_gps_ns), _hit_keys(cand.sites, cand.hit_times_ns))
        if held:
            self.n_held += 1
        return self.archive.get(ivorn)

    # -- families --------------------------------------------------------------
    def _family_by_hits(self, cand: Candidate) -> str:
        """The family of an alerted coincidence sharing a hit with ``cand``, else its own id."""
        for key in _hit_keys(cand.sites, cand.hit_times_ns):
            fam = self._by_hit.get(key)
            if fam is not None:
                return fam
        return cand.id

    def _remember(self, family: str, t: int, keys: list[tuple[str, int]]) -> None:
        """Remember an alerted cluster's hits (first hit at ``t`` GPS ns) for its family."""
        if not keys:
            return
        for k in keys:
            self._by_hit[k] = family
        self._hits_by_time.append((t, keys))
        horizon = t - FAMILY_MEMORY_S * NS_PER_S
        while self._hits_by_time and self._hits_by_time[0][0] < horizon:
            _, old = self._hits_by_time.popleft()
            for k in old:
                self._by_hit.pop(k, None)

    def _take(self, level: str, t_ns: int) -> bool:
        """Whether an alert of ``level`` at event time ``t_ns`` may be sent (taking its
        tokens): internal ones from the internal bucket; public ones from the public
        bucket alone, and then an internal token too if one is left."""
        if level != "public":
            return self.buckets["internal"].take(t_ns)
        if not self.buckets["public"].take(t_ns):
            return False
        self.buckets["internal"].take(t_ns)  # counted there too; never holds it back
        return True

    def _skymap(self, cand: Candidate, ivorn: str) -> tuple[str | None, str | None]:
        if not self.cfg.skymaps or cand.ra_deg is None or cand.dec_deg is None:
            return None, None
        if cand.err_deg is None:
            return None, None
        name = ivorn.split("#", 1)[1] + ".multiorder.fits"
        path = write_skymap(
            self.packet_dir / "maps" / name,
            cand.ra_deg,
            cand.dec_deg,
            cand.err_deg,
            object_id=ivorn,
            date_obs=gps_ns_to_utc_iso(cand.time_gps_ns),
            ellipse=error_ellipse_of(cand),
        )
        base = self.cfg.skymap_url_base
        uri = f"{base.rstrip('/')}/{name}" if base else path.resolve().as_uri()
        return uri, str(path)

    # -- retraction ------------------------------------------------------------
    def retract(self, ivorn: str, reason: str) -> AlertRow:
        """Archive a retraction of ``ivorn`` (our own alert) for every sink the original reached."""
        if not reason.strip():
            raise AlertError("a retraction needs --reason TEXT saying why")
        orig = self.archive.get(ivorn)
        if orig is None:
            raise AlertError(f"no archived alert has IVORN {ivorn!r}")
        if orig.kind == "retraction":
            raise AlertError(f"{ivorn!r} is itself a retraction")
        family = self.archive.alerts_for(orig.candidate_id)
        if any(a.kind == "retraction" for a in family):
            raise AlertError(f"candidate {orig.candidate_id!r} of {ivorn!r} is already retracted")
        first = family[0]
        created = self.now()
        now_iso = utc_stamp(created)
        new_ivorn = f"{self.cfg.stream_ivorn}#{local_id(orig.candidate_id, 'retraction')}"
        sent_levels = {a.level for a in family if a.status == "queued"}
        level: Level = "public" if "public" in sent_levels else "internal"
        meta = AlertMeta(new_ivorn, "retraction", level, created, first.ivorn, reason)
        xml = build_retraction(first.ivorn, orig.candidate_id, meta, self.cfg)
        row = AlertRow(
            seq=0,
            ivorn=new_ivorn,
            candidate_id=orig.candidate_id,
            revision=orig.revision,
            source_id=orig.source_id,
            kind="retraction",
            level=level,
            status="queued",
            cites=first.ivorn,
            note=reason,
            created_utc=now_iso,
            event_gps_ns=orig.event_gps_ns,
            far_per_year=orig.far_per_year,
            skymap=None,
            xml=xml,
        )
        self.archive.insert_alert(row, self.sinks_for(level), now_iso)
        got = self.archive.get(new_ivorn)
        assert got is not None
        return got
