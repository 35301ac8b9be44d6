"""GPS nanoseconds <-> UTC, checked against the IERS leap-second table and astropy."""

from __future__ import annotations

import socket
import sys
import warnings
from datetime import UTC, datetime
from typing import Any

import numpy as np
import pytest
from astropy.time import Time
from astropy.utils import iers
from astropy.utils.exceptions import AstropyWarning
from erfa import ErfaWarning  # type: ignore[import-untyped]

from tocsin import gpstime
from tocsin.gpstime import gps_ns_to_utc_iso, utc_to_gps_ns

NS = 1_000_000_000
GPS_EPOCH = datetime(1980, 1, 6, tzinfo=UTC)
TAI_MINUS_GPS_S = 19  # GPS time = TAI − 19 s exactly (IS-GPS-200, GPS time definition)


def _utc_seconds_since_gps_epoch(iso: str) -> int:
    """Whole SI seconds from the GPS epoch to ``iso`` counting no leap seconds (Python datetime)."""
    dt = datetime.fromisoformat(iso.rstrip("Z")).replace(tzinfo=UTC)
    delta = dt - GPS_EPOCH
    return delta.days * 86400 + delta.seconds


def _gps_minus_utc_from_table(iso: str) -> int:
    """GPS − UTC in seconds from astropy's bundled IERS leap-second table (TAI − UTC − 19 s)."""
    table = iers.LeapSeconds.auto_open()  # columns year, month, tai_utc (either source)
    starts = np.asarray(table["year"]) * 12 + np.asarray(table["month"]) - 1
    dt = datetime.fromisoformat(iso.rstrip("Z"))
    row = int(np.searchsorted(starts, dt.year * 12 + dt.month - 1, side="right")) - 1
    return int(np.asarray(table["tai_utc"])[row]) - TAI_MINUS_GPS_S


def test_check_value_2017_both_ways() -> None:
    # IERS Bulletin C leap-second table: 2017-01-01T00:00:00 UTC = GPS second 1167264018
    # (CHECKS.md); reproduced independently by astropy's own Time(...).gps.
    reference_s = Time("2017-01-01T00:00:00", scale="utc").gps
    assert reference_s == 1167264018
    ns = utc_to_gps_ns("2017-01-01T00:00:00")
    assert ns == round(reference_s) * NS
    assert utc_to_gps_ns("2017-01-01T00:00:00Z") == ns
    assert gps_ns_to_utc_iso(1167264018 * NS) == "2017-01-01T00:00:00.000000000Z"


def test_random_ns_round_trip_through_iso_to_the_nanosecond() -> None:
    rng = np.random.default_rng(20170101)
    lo = utc_to_gps_ns("2000-01-01T00:00:00")
    hi = utc_to_gps_ns("2026-06-30T00:00:00")
    values = rng.integers(lo, hi, size=300, dtype=np.int64)
    for v in values:
        ns = int(v)
        iso = gps_ns_to_utc_iso(ns)
        assert iso.endswith("Z") and len(iso.split(".")[1]) == 10  # 9 decimals + "Z"
        assert utc_to_gps_ns(iso) == ns, iso
        # Independent reading of the string: datetime arithmetic (no leap seconds)
        # plus GPS − UTC from the IERS table (via astropy's bundled leap-second file).
        whole, frac = iso.rstrip("Z").split(".")
        expected = (
            _utc_seconds_since_gps_epoch(whole) + _gps_minus_utc_from_table(whole)
        ) * NS + int(frac)
        assert expected == ns, iso


@pytest.mark.parametrize(
    "iso",
    ["2017-01-01T00:00:00", "2019-07-14T08:30:00", "2023-02-28T23:59:59", "2026-11-01T12:00:00"],
)
def test_gps_minus_utc_is_18_s_since_2017(iso: str) -> None:
    # IERS Bulletin C: no leap second after 2016-12-31, so TAI − UTC = 37 s and
    # GPS − UTC = 37 − 19 = 18 s; cross-checked against astropy's leap-second table.
    assert _gps_minus_utc_from_table(iso) == 18
    gps_minus_utc_ns = utc_to_gps_ns(iso) - _utc_seconds_since_gps_epoch(iso) * NS
    assert gps_minus_utc_ns == 18 * NS


def test_gps_minus_utc_was_17_s_in_2016() -> None:
    # IERS Bulletin C: leap second 2016-12-31T23:59:60 raised GPS − UTC from 17 s to 18 s.
    iso = "2016-12-31T23:59:59"
    assert utc_to_gps_ns(iso) - _utc_seconds_since_gps_epoch(iso) * NS == 17 * NS
    # the leap second itself is a real UTC second: 23:59:59 and 00:00:00 are 2 s apart
    assert utc_to_gps_ns("2017-01-01T00:00:00") - utc_to_gps_ns(iso) == 2 * NS


def test_bad_iso_text_names_the_value() -> None:
    with pytest.raises(ValueError, match="not-a-time"):
        utc_to_gps_ns("not-a-time")


@pytest.fixture
def no_network(monkeypatch: pytest.MonkeyPatch) -> None:
    """Any attempt to open a connection raises (a firewalled server)."""

    def refuse(*args: Any, **kwargs: Any) -> Any:
        raise AssertionError(f"network access attempted: {args!r}")

    monkeypatch.setattr(socket.socket, "connect", refuse)
    monkeypatch.setattr(socket, "create_connection", refuse)


def test_iers_auto_download_is_off_after_import() -> None:
    # CHECKS.md, "Earth-orientation tables offline": importing the module switches it off.
    assert gpstime.__name__ in sys.modules
    assert iers.conf.auto_download is False


@pytest.mark.usefixtures("no_network")
def test_next_year_converts_offline_without_warnings() -> None:
    # Within the bundled IERS/leap-second tables: no download, no warning at all
    # (warnings are errors in this test suite).
    iers.IERS_Auto.close()  # force a fresh table load under the network block
    ns = utc_to_gps_ns("2027-03-01T06:00:00.5")
    assert ns - _utc_seconds_since_gps_epoch("2027-03-01T06:00:00") * NS == 18 * NS + NS // 2
    assert gps_ns_to_utc_iso(ns) == "2027-03-01T06:00:00.500000000Z"


@pytest.mark.usefixtures("no_network")
def test_far_future_converts_offline_without_raising() -> None:
    # Beyond the bundled tables astropy may warn (ERFA "dubious year"), but must
    # neither download nor raise; it assumes no new leap seconds, so GPS − UTC
    # stays 18 s (IERS: none announced after 2017).
    iers.IERS_Auto.close()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        ns = utc_to_gps_ns("2035-07-01T00:00:00.000000001")
        back = gps_ns_to_utc_iso(ns)
    assert back == "2035-07-01T00:00:00.000000001Z"
    assert ns - _utc_seconds_since_gps_epoch("2035-07-01T00:00:00") * NS == 18 * NS + 1
    unexpected = [w for w in caught if not issubclass(w.category, ErfaWarning | AstropyWarning)]
    assert not unexpected, [str(w.message) for w in unexpected]


def test_time_to_gps_ns_keeps_nanoseconds() -> None:
    """Any astropy Time converts to the ns (astropy Time, two-double precision)."""
    from tocsin.gpstime import time_to_gps_ns

    t = Time("2026-03-14T00:03:00.123456789", format="isot", scale="utc", precision=9)
    ns = time_to_gps_ns(t)
    assert ns == utc_to_gps_ns("2026-03-14T00:03:00.123456789Z")
    assert ns % 1000 == 789  # not truncated to ms
    assert abs(time_to_gps_ns(t.tt) - ns) <= 1  # the same instant in TT
