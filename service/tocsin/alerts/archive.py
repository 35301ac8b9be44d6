"""The alert archive: candidates, alerts and their deliveries in one SQLite file (WAL).

An alert row (with its packet bytes) is committed *before* any delivery is tried,
together with one delivery row per sink it must reach. A sender marks a delivery
``done`` only after the sink confirmed it (MQTT PUBACK, transport ``ack``, file
renamed into place). After a crash, deliveries not yet ``done`` are sent again
with the very same bytes, so a receiver that de-duplicates identical packets
(VOEvent Transport 2.0 §8) sees each alert once; IVORNs come from the candidate
ids, so a restart never renumbers.

One archive holds one stream with one role: opening it with another stream or role
is refused, so test and observation alerts are never mixed.
"""

from __future__ import annotations

import datetime as dt
import sqlite3
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from tocsin.errors import ConfigError

SCHEMA_VERSION = "1"
DeliveryState = Literal["pending", "sent", "done", "failed", "expired"]

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS candidates (
    id TEXT NOT NULL, revision INTEGER NOT NULL, trigger TEXT NOT NULL,
    statistic TEXT NOT NULL, time_gps_ns INTEGER NOT NULL, far_per_year REAL NOT NULL,
    json BLOB NOT NULL, PRIMARY KEY (id, revision));
CREATE TABLE IF NOT EXISTS alerts (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    ivorn TEXT NOT NULL UNIQUE, candidate_id TEXT NOT NULL, revision INTEGER NOT NULL,
    source_id TEXT NOT NULL DEFAULT '',
    kind TEXT NOT NULL, level TEXT NOT NULL, status TEXT NOT NULL,
    cites TEXT, note TEXT NOT NULL DEFAULT '', created_utc TEXT NOT NULL,
    event_gps_ns INTEGER, far_per_year REAL, skymap TEXT, xml BLOB NOT NULL);
CREATE INDEX IF NOT EXISTS alerts_by_candidate ON alerts (candidate_id);
CREATE INDEX IF NOT EXISTS alerts_by_source ON alerts (source_id);
CREATE TABLE IF NOT EXISTS deliveries (
    ivorn TEXT NOT NULL REFERENCES alerts (ivorn), sink TEXT NOT NULL,
    state TEXT NOT NULL, attempts INTEGER NOT NULL DEFAULT 0, detail TEXT NOT NULL DEFAULT '',
    updated_utc TEXT NOT NULL, PRIMARY KEY (ivorn, sink));
CREATE INDEX IF NOT EXISTS deliveries_open ON deliveries (state);
CREATE TABLE IF NOT EXISTS external (
    seq INTEGER PRIMARY KEY AUTOINCREMENT, ivorn TEXT NOT NULL,
    received_utc TEXT NOT NULL, raw BLOB NOT NULL);
"""


def utc_stamp(t: dt.datetime) -> str:
    """The archive's time stamps: UTC, ISO 8601 with microseconds."""
    return t.astimezone(dt.UTC).isoformat(timespec="microseconds")


@dataclass(frozen=True, slots=True)
class AlertRow:
    """One archived alert."""

    seq: int
    ivorn: str
    candidate_id: str
    """The alert family: the id of the candidate whose first alert started it."""
    revision: int
    source_id: str
    """The candidate this packet reports (a revision or another seed of the same cluster)."""
    kind: str
    level: str
    status: str
    """``queued`` (deliveries created) or ``held`` (rate limit; archived, not sent)."""
    cites: str | None
    note: str
    created_utc: str
    event_gps_ns: int | None
    far_per_year: float | None
    skymap: str | None
    xml: bytes


@dataclass(frozen=True, slots=True)
class Delivery:
    ivorn: str
    sink: str
    state: str
    attempts: int
    detail: str
    updated_utc: str


class Archive:
    """SQLite archive for one (stream, role). Not thread-safe; one per process and thread."""

    def __init__(self, path: Path, *, stream: str, role: str, durable: bool = True) -> None:
        """Open (or create) the archive. ``durable=False`` skips fsyncs (replay output)."""
        self.path = path
        path.parent.mkdir(parents=True, exist_ok=True)
        self.db = sqlite3.connect(path, isolation_level=None, timeout=30.0)
        self.db.execute("PRAGMA journal_mode=WAL")
        self.db.execute(f"PRAGMA synchronous={'FULL' if durable else 'OFF'}")
        self.db.execute("PRAGMA foreign_keys=ON")
        self.db.executescript(_SCHEMA)
        self._bind("schema", SCHEMA_VERSION)
        self._bind("stream", stream)
        self._bind("role", role)

    def _bind(self, key: str, value: str) -> None:
        row = self.db.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        if row is None:
            self.db.execute("INSERT INTO meta (key, value) VALUES (?, ?)", (key, value))
        elif row[0] != value:
            raise ConfigError(
                f"alert archive {str(self.path)!r} holds {key} {row[0]!r}, not {value!r}: "
                "one archive per stream and role (test and observation alerts never mix); "
                "use another data directory"
            )

    def close(self) -> None:
        self.db.close()

    # -- writes ----------------------------------------------------------------
    def add_candidate(self, cand_json: dict[str, Any], raw: bytes) -> None:
        self.db.execute(
            "INSERT OR IGNORE INTO candidates VALUES (?, ?, ?, ?, ?, ?, ?)",
            (
                cand_json["id"],
                int(cand_json["revision"]),
                cand_json["trigger"],
                cand_json["statistic"],
                int(cand_json["time_gps_ns"]),
                float(cand_json["far_per_year"]),
                raw,
            ),
        )

    def insert_alert(
        self,
        row: AlertRow,
        sinks: Iterable[str],
        now_utc: str,
        *,
        also_queue: Iterable[str] = (),
    ) -> bool:
        """Archive an alert and its pending deliveries in one transaction.

        ``also_queue``: IVORNs of alerts already archived that go to ``sinks`` too
        (an update's public subscribers get the alerts it cites first), queued in the
        same transaction, so a crash leaves either all of it or none. Deliveries they
        already have are left alone.

        Returns False (and changes nothing) if the IVORN is already archived.
        """
        sinks = list(sinks)
        with self._tx():
            cur = self.db.execute(
                "INSERT OR IGNORE INTO alerts (ivorn, candidate_id, revision, source_id, kind, "
                "level, status, cites, note, created_utc, event_gps_ns, far_per_year, skymap, xml) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    row.ivorn,
                    row.candidate_id,
                    row.revision,
                    row.source_id,
                    row.kind,
                    row.level,
                    row.status,
                    row.cites,
                    row.note,
                    row.created_utc,
                    row.event_gps_ns,
                    row.far_per_year,
                    row.skymap,
                    row.xml,
                ),
            )
            if cur.rowcount == 0:
                return False
            self.db.executemany(
                "INSERT INTO deliveries (ivorn, sink, state, updated_utc) "
                "VALUES (?, ?, 'pending', ?)",
                [(row.ivorn, s, now_utc) for s in sinks],
            )
            self.db.executemany(
                "INSERT OR IGNORE INTO deliveries (ivorn, sink, state, updated_utc) "
                "VALUES (?, ?, 'pending', ?)",
                [(iv, s, now_utc) for iv in also_queue for s in sinks],
            )
        return True

    def add_external(self, ivorn: str, raw: bytes, now_utc: str) -> int:
        """Journal an outside packet for the follow-up desk (exact bytes), so that a
        restart can rebuild the events it tracks (see ``FollowupDesk.restore``);
        returns its journal number."""
        cur = self.db.execute(
            "INSERT INTO external (ivorn, received_utc, raw) VALUES (?, ?, ?)",
            (ivorn, now_utc, raw),
        )
        return int(cur.lastrowid or 0)

    def drop_external(self, seq: int) -> None:
        """Forget journaled packet ``seq`` (the desk refused it)."""
        self.db.execute("DELETE FROM external WHERE seq = ?", (seq,))

    def externals(self, since_utc: str) -> list[bytes]:
        """Journaled outside packets received at or after ``since_utc``, in arrival order."""
        cur = self.db.execute(
            "SELECT raw FROM external WHERE received_utc >= ? ORDER BY seq", (since_utc,)
        )
        return [bytes(r[0]) for r in cur.fetchall()]

    def prune_externals(self, before_utc: str) -> int:
        """Forget journaled outside packets received before ``before_utc``; returns how many."""
        return self.db.execute(
            "DELETE FROM external WHERE received_utc < ?", (before_utc,)
        ).rowcount

    def mark(
        self, ivorn: str, sink: str, state: DeliveryState, now_utc: str, detail: str = ""
    ) -> None:
        """Record a delivery's new state (``sent`` counts an attempt)."""
        self.db.execute(
            "UPDATE deliveries SET state = ?, detail = ?, updated_utc = ?, "
            "attempts = attempts + (? = 'sent') WHERE ivorn = ? AND sink = ?",
            (state, detail[:500], now_utc, state, ivorn, sink),
        )

    def _tx(self) -> _Tx:
        return _Tx(self.db)

    # -- reads -----------------------------------------------------------------
    def alerts_for(self, candidate_id: str) -> list[AlertRow]:
        cur = self.db.execute(
            "SELECT * FROM alerts WHERE candidate_id = ? ORDER BY seq", (candidate_id,)
        )
        return [AlertRow(*r) for r in cur.fetchall()]

    def latest_for_source(self, source_id: str) -> AlertRow | None:
        """The newest alert reporting candidate ``source_id`` (its own family's, or an
        update of the family it joined), None if it was not alerted."""
        r = self.db.execute(
            "SELECT * FROM alerts WHERE source_id = ? ORDER BY seq DESC LIMIT 1", (source_id,)
        ).fetchone()
        return AlertRow(*r) if r else None

    def get(self, ivorn: str) -> AlertRow | None:
        r = self.db.execute("SELECT * FROM alerts WHERE ivorn = ?", (ivorn,)).fetchone()
        return AlertRow(*r) if r else None

    def latest(self, limit: int = 50) -> list[AlertRow]:
        cur = self.db.execute("SELECT * FROM alerts ORDER BY seq DESC LIMIT ?", (limit,))
        return [AlertRow(*r) for r in cur.fetchall()]

    def followup_index(self, limit: int = 100_000) -> list[tuple[str, str, str | None, str]]:
        """(kind, candidate id, cites, IVORN) of the latest ``limit`` alerts, newest first:
        what the follow-up desk needs at start, without the packets."""
        cur = self.db.execute(
            "SELECT kind, candidate_id, cites, ivorn FROM alerts ORDER BY seq DESC LIMIT ?",
            (limit,),
        )
        return [(str(k), str(c), None if x is None else str(x), str(i)) for k, c, x, i in cur]

    def recent_families(self, since_gps_ns: int) -> list[tuple[str, bytes]]:
        """(family id, latest JSON of the source candidate) of alerts from ``since_gps_ns``."""
        cur = self.db.execute(
            "SELECT a.candidate_id, c.json FROM alerts a JOIN candidates c ON c.id = a.source_id "
            "AND c.revision = a.revision WHERE a.kind != 'retraction' AND a.event_gps_ns >= ? "
            "ORDER BY a.seq",
            (since_gps_ns,),
        )
        return [(str(f), bytes(j)) for f, j in cur.fetchall()]

    def recent_sent(self, since_gps_ns: int) -> list[tuple[int, str]]:
        """(event GPS ns, level) of queued new/update alerts from ``since_gps_ns`` on, in order."""
        cur = self.db.execute(
            "SELECT event_gps_ns, level FROM alerts WHERE status = 'queued' AND kind NOT IN "
            "('retraction', 'followup') AND event_gps_ns >= ? ORDER BY event_gps_ns",
            (since_gps_ns,),
        )
        return [(int(t), str(lv)) for t, lv in cur.fetchall()]

    def open_deliveries(self, sink_prefix: str = "") -> list[tuple[Delivery, bytes]]:
        """Deliveries not yet done (``pending`` or ``sent``), oldest alert first."""
        cur = self.db.execute(
            "SELECT d.ivorn, d.sink, d.state, d.attempts, d.detail, d.updated_utc, a.xml "
            "FROM deliveries d JOIN alerts a ON a.ivorn = d.ivorn "
            "WHERE d.state IN ('pending', 'sent') AND d.sink LIKE ? ORDER BY a.seq, d.sink",
            (sink_prefix + "%",),
        )
        return [(Delivery(*r[:6]), bytes(r[6])) for r in cur.fetchall()]

    def deliveries(self, ivorn: str | None = None) -> list[Delivery]:
        if ivorn is None:
            cur = self.db.execute("SELECT * FROM deliveries ORDER BY ivorn, sink")
        else:
            cur = self.db.execute(
                "SELECT * FROM deliveries WHERE ivorn = ? ORDER BY sink", (ivorn,)
            )
        return [Delivery(*r) for r in cur.fetchall()]


class _Tx:
    """``BEGIN IMMEDIATE`` ... ``COMMIT`` (or ``ROLLBACK`` on error) on an autocommit connection."""

    def __init__(self, db: sqlite3.Connection) -> None:
        self.db = db

    def __enter__(self) -> None:
        self.db.execute("BEGIN IMMEDIATE")

    def __exit__(self, exc_type: object, exc: object, tb: object) -> None:
        self.db.execute("COMMIT" if exc_type is None else "ROLLBACK")
