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
    for i in range(8):
        sid = f"fen-station-{i}"
        sites.append(
            Site(
                id=sid,
                lat_deg=45 + rng.uniform(-6, 6),
                lon_deg=5 + rng.uniform(-8, 8),
                height_m=200.0,
                clock_sigma_ns=rng.uniform(30, 90),
                kind="scintillator",
            )
        )
        rates[sid] = rng.uniform(4, 12)
    for i in range(4):
        sid = f"moor-counter-{i}"
        sites.append(
            Site(
                id=sid,
                lat_deg=rng.uniform(-40, 60),
                lon_deg=rng.uniform(-120, 140),
                height_m=50.0,
                clock_sigma_ns=rng.uniform(1e6, 5e6),
                kind="counter",
            )
        )
        rates[sid] = rng.uniform(0.5, 2)
    for i in range(4):
        sid = f"pocket-cam-{i}"
        sites.append(
            Site(
                id=sid,
                lat_deg=rng.uniform(-40, 60),
                lon_deg=rng.uniform(-120, 140),
                height_m=50.0,
                clock_sigma_ns=1e8,
                kind="camera-sensor",
            )
        )
        rates[sid] = rng.uniform(10, 30) / 3600
    return SiteRegistry(sites), rates
