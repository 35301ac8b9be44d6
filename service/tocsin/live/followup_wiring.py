"""How the live service takes on the follow-up of outside alerts (``[followup]`` table).

Two calls from :class:`tocsin.live.service.Service`: :func:`followup_for` builds the
ring buffer, the desk and the intake (None when the table is off), and
:func:`start_followup` starts the intake's task next to the alert dispatcher.
"""

from __future__ import annotations

import asyncio
import datetime as dt
import logging
from pathlib import Path
from typing import TYPE_CHECKING

from tocsin.alerts.archive import utc_stamp
from tocsin.alerts.followup_desk import FollowupDesk
from tocsin.alerts.safexml import XmlLimits
from tocsin.engine.block import Block
from tocsin.io.hitring import HitRing
from tocsin.io.journal import read_from
from tocsin.io.recording import decode_line
from tocsin.live.followup_intake import FollowupIntake
from tocsin.live.logs import event
from tocsin.model.batch import HitBatch
from tocsin.model.registry import SiteRegistry
from tocsin.ordering import Orderer
from tocsin.types import GpsNs

if TYPE_CHECKING:
    from tocsin.live.service import Service

log = logging.getLogger("tocsin.followup")

JOURNAL_DAYS = 30
"""Outside packets stay in the archive's journal this long (days); those received
within the ring buffer's span are offered again at a restart."""


def followup_for(service: Service) -> FollowupIntake | None:
    """The service's follow-up intake, or None when ``[followup] enabled`` is false."""
    cfg = service.cfg
    if not cfg.followup.enabled:
        return None
    ring = HitRing(len(service.registry), hours=cfg.followup.buffer_hours)
    desk = FollowupDesk(
        cfg.followup,
        cfg.alerts,
        service.registry,
        cfg.engine.coincidence,
        desk=service.desk,
        jsonl=cfg.data_dir / "followups.jsonl",
    )
    if desk.archive is not None:
        # events taken before a restart: searched (or adopted) as if it never happened
        now = dt.datetime.now(dt.UTC)
        desk.archive.prune_externals(utc_stamp(now - dt.timedelta(days=JOURNAL_DAYS)))
        since = utc_stamp(now - dt.timedelta(hours=cfg.followup.buffer_hours))
        limits = XmlLimits(max_bytes=cfg.followup.max_packet_bytes)
        pending = desk.restore(desk.archive.externals(since), limits=limits)
        event(log, "followup_restored", pending=pending, tracked=len(desk.tracked))
    return FollowupIntake(cfg.followup, desk, ring, cfg.data_dir, service.metrics.registry)


def refill_ring(
    fu: FollowupIntake,
    journal_dir: Path,
    registry: SiteRegistry,
    *,
    since_ns: int,
    upto_ns: int,
    lateness_ns: int,
    quantum_ns: int,
) -> int:
    """After a restart from a checkpoint, give the follow-up ring buffer the journal
    from arrival time ``since_ns`` up to ``upto_ns`` (the checkpoint's watermark, where
    the restored pipeline's own blocks begin), ordered as the pipeline orders it. So
    events waiting for their window, and the off-source windows of new ones, find
    the data of before the restart. Returns the number of hits added."""
    orderer = Orderer(len(registry), lateness_ns=lateness_ns, quantum_ns=quantum_ns)
    n = 0

    def add(blk: Block | None) -> None:
        nonlocal n
        if blk is not None:
            fu.ring.add(blk)
            n += blk.n_hits

    for line in read_from(journal_dir, None, since_ns=since_ns):
        item = decode_line(line, registry)
        if not isinstance(item, HitBatch) or orderer.offer(item).status != "accepted":
            continue
        now = orderer.now or 0
        add(orderer.release_through(GpsNs(min(now - lateness_ns, upto_ns))))
        if now - lateness_ns >= upto_ns:
            break  # later arrivals can only fall after the watermark
    add(orderer.release_through(GpsNs(upto_ns)))
    event(log, "followup_ring_refilled", hits=n, upto_gps_ns=upto_ns)
    return n


def start_followup(service: Service, stop: asyncio.Event) -> asyncio.Task[None] | None:
    """Start the intake's task (sources, parsing, due searches); None when off."""
    fu = service.followup
    if fu is None:
        return None
    fu.wake = service.dispatcher.wake
    return asyncio.create_task(fu.run(stop), name="followup")
