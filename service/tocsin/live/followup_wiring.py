"""How the live service takes on the follow-up of outside alerts (``[followup]`` table).

Two calls from :class:`tocsin.live.service.Service`: :func:`followup_for` builds the
ring buffer, the desk and the intake (None when the table is off), and
:func:`start_followup` starts the intake's task next to the alert dispatcher.
"""

from __future__ import annotations

import asyncio
from typing import TYPE_CHECKING

from tocsin.alerts.followup_desk import FollowupDesk
from tocsin.io.hitring import HitRing
from tocsin.live.followup_intake import FollowupIntake

if TYPE_CHECKING:
    from tocsin.live.service import Service


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
    return FollowupIntake(cfg.followup, desk, ring, cfg.data_dir, service.metrics.registry)


def start_followup(service: Service, stop: asyncio.Event) -> asyncio.Task[None] | None:
    """Start the intake's task (sources, parsing, due searches); None when off."""
    fu = service.followup
    if fu is None:
        return None
    fu.wake = service.dispatcher.wake
    return asyncio.create_task(fu.run(stop), name="followup")
