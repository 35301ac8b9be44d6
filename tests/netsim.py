"""Helpers for tests that run simulated networks through the pipeline."""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np

from tocsin.io.recording import Rejected
from tocsin.model.batch import HitBatch
from tocsin.model.candidate import Candidate
from tocsin.model.config import EngineConfig
from tocsin.model.registry import Site, SiteRegistry
from tocsin.pipeline import Pipeline


def run_pipeline(
    registry: SiteRegistry,
    items: Iterable[HitBatch | Rejected],
    *,
    candidate_far: float,
    release_every_s: float = 16.0,
    cfg: EngineConfig | None = None,
) -> tuple[Pipeline, dict[str, Candidate], list[Candidate]]:
    """Feed items; return the pipeline, the latest revision per id, and every line written."""
    pipe = Pipeline(
        registry,
        cfg or EngineConfig(),
        candidate_far_per_year=candidate_far,
        release_every_s=release_every_s,
    )
    lines: list[Candidate] = []
    for it in items:
        lines += pipe.offer(it)
    lines += pipe.finish()
    latest = {c.id: c for c in lines}
    return pipe, latest, lines


def small_network(seed: int = 3) -> tuple[SiteRegistry, dict[str, float]]:
    """16 fictional sites: 8 GPS-timed stations in one region, 4 NTP counters, 4 camera sensors.

    Returns the registry and each site's base rate (Hz).
    """
    rng = np.random.default_rng(seed)
    sites: list[Site] = []
    rates: dict[str, float] = {}

    def add(sid: str, lat: float, lon: float, sigma_ns: float, kind: str, rate: float) -> None:
        sites.append(
            Site(
                id=sid, lat_deg=lat, lon_deg=lon, height_m=100.0, clock_sigma_ns=sigma_ns, kind=kind
            )
        )
        rates[sid] = rate

    for i in range(8):
        add(
            f"fen-station-{i}",
            45 + rng.uniform(-6, 6),
            5 + rng.uniform(-8, 8),
            rng.uniform(30, 90),
            "scintillator",
            rng.uniform(4, 12),
        )
    for i in range(4):
        add(
            f"moor-counter-{i}",
            rng.uniform(-40, 60),
            rng.uniform(-120, 140),
            rng.uniform(1e6, 5e6),
            "counter",
            rng.uniform(0.5, 2),
        )
    for i in range(4):
        add(
            f"pocket-cam-{i}",
            rng.uniform(-40, 60),
            rng.uniform(-120, 140),
            1e8,
            "camera-sensor",
            rng.uniform(10, 30) / 3600,
        )
    return SiteRegistry(sites), rates


FOLLOWUP_SITES = (
    ("fen-a", 46.0, 6.0, 50.0),
    ("fen-b", 47.5, 8.5, 60.0),
    ("fen-c", 44.2, 9.8, 40.0),
    ("fen-d", 45.1, 3.9, 70.0),
    ("fen-e", 48.3, 5.1, 50.0),
    ("moor-f", 43.0, 7.0, 2e6),
)
"""(id, lat deg, lon deg, clock sigma ns): five GPS-timed stations in one region and an
NTP-timed counter, the fictional network of the follow-up tests."""


def followup_network() -> SiteRegistry:
    """The follow-up tests' six sites (:data:`FOLLOWUP_SITES`), 300 m high."""
    return SiteRegistry(
        [
            Site(id=i, lat_deg=la, lon_deg=lo, height_m=300.0, clock_sigma_ns=sg)
            for i, la, lo, sg in FOLLOWUP_SITES
        ]
    )
