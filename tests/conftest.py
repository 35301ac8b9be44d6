"""Shared fixtures: small fictional registries."""

from __future__ import annotations

import pytest

from tocsin.model.registry import Site, SiteRegistry


@pytest.fixture
def small_registry() -> SiteRegistry:
    """Three fictional sites: two GPS-timed stations and an NTP-timed counter."""
    return SiteRegistry(
        [
            Site(id="alder-fen-1", lat_deg=52.1, lon_deg=5.2, height_m=10.0, clock_sigma_ns=50.0),
            Site(id="brack-hill", lat_deg=48.7, lon_deg=9.1, height_m=420.0, clock_sigma_ns=80.0),
            Site(
                id="cold-spring-3",
                lat_deg=45.3,
                lon_deg=-75.6,
                height_m=90.0,
                clock_sigma_ns=2e6,
                kind="counter",
            ),
        ]
    )
