"""Shared fixtures: small fictional registries."""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.mosquitto import MOSQUITTO, Mosquitto
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


@pytest.fixture
def mosquitto(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Mosquitto]:
    """A fresh Mosquitto on a free port (stopped after the test)."""
    if not Path(MOSQUITTO).exists():
        pytest.fail("mosquitto is not installed (apt-get install mosquitto); .ci/run installs it")
    broker = Mosquitto(tmp_path_factory.mktemp("mosquitto"))
    broker.start()
    try:
        yield broker
    finally:
        broker.stop()


@pytest.fixture
def stack() -> Iterator[contextlib.ExitStack]:
    """Resources a test opens (service processes ...), closed even when it fails."""
    with contextlib.ExitStack() as st:
        yield st
