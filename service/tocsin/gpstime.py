"""GPS nanoseconds <-> UTC, through :class:`astropy.time.Time` (format ``gps``).

The GPS epoch is 1980-01-06T00:00:00 UTC and GPS time has no leap seconds; the
leap seconds between GPS and UTC come from astropy's bundled IERS table
(GPS - UTC = 18 s since 2017-01-01). Check value: 2017-01-01T00:00:00 UTC is GPS
second 1167264018 (IERS Bulletin C; see ``tests/test_gpstime.py``).

Precision: astropy keeps a time as two float64 Julian dates, good to well under
1 ns over centuries; we pass whole seconds and the fraction separately so that
no float ever has to hold the full nanosecond count.
"""

from __future__ import annotations

import warnings

from astropy.time import Time
from astropy.utils import iers

from tocsin.types import NS_PER_S, GpsNs

# Servers running Tocsin are often firewalled: never try to download IERS-A
# tables. The bundled astropy-iers-data table is used; UT1-UTC < 0.9 s moves a
# sky direction by < 0.004 deg, far below any timing-fit error here.
iers.conf.auto_download = False
iers.conf.auto_max_age = None


def gps_ns_to_time(ns: GpsNs) -> Time:
    """Return an astropy ``Time`` (scale tai, format gps) for ``ns`` GPS nanoseconds."""
    sec, frac = divmod(int(ns), NS_PER_S)
    return Time(float(sec), frac / NS_PER_S, format="gps")


def gps_ns_to_utc_iso(ns: GpsNs) -> str:
    """ISO 8601 UTC with 9 decimals and a ``Z``: ``2017-01-01T00:00:00.000000000Z``."""
    t = gps_ns_to_time(ns).utc
    t.precision = 9
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # ERFA "dubious year" for far-future dates
        return f"{t.isot}Z"


def utc_to_gps_ns(text: str) -> GpsNs:
    """Parse an ISO 8601 UTC time (``Z`` suffix optional) to GPS nanoseconds.

    Sub-nanosecond digits are rounded to the nearest nanosecond.
    """
    s = text.strip()
    if s.endswith("Z"):
        s = s[:-1]
    try:
        t = Time(s, format="isot", scale="utc", precision=9)
    except ValueError as exc:
        raise ValueError(f"not an ISO 8601 UTC time: {text!r}") from exc
    return time_to_gps_ns(t)


def time_to_gps_ns(t: Time) -> GpsNs:
    """Convert any astropy ``Time`` to GPS nanoseconds (rounded to the nearest ns).

    Goes through TAI as a two-double difference (``Time.isot`` alone would keep only
    its default three decimals)."""
    g = t.tai - Time(0.0, format="gps").tai  # TimeDelta, two-double precision (days)
    whole = round(float(g.jd1))
    rest = (float(g.jd1) - whole) + float(g.jd2)  # exact subtraction; |rest| < ~1 day
    return whole * 86400 * NS_PER_S + round(rest * 86400 * NS_PER_S)


UNIX_AT_GPS_EPOCH_S = 315_964_800
"""Unix time (s) of 1980-01-06T00:00:00 UTC, the GPS epoch."""

_leap_cache: dict[int, int] = {}


def gps_minus_unix_ns(unix_ns: int) -> int:
    """GPS ns minus Unix ns at the given Unix time: the epoch offset plus the leap
    seconds GPS has gained on UTC (18 s since 2017-01-01; astropy's table).

    Cached per UTC day, so the live path reads a dict, not astropy.
    """
    day = unix_ns // (86400 * NS_PER_S)
    off = _leap_cache.get(day)
    if off is None:
        t = Time(unix_ns // NS_PER_S, format="unix", scale="utc")
        gps_s = round(float(t.gps))
        off = (gps_s - unix_ns // NS_PER_S) * NS_PER_S
        _leap_cache[day] = off
    return off


def gps_now_ns() -> GpsNs:
    """The system clock as GPS nanoseconds (as good as the host's clock discipline)."""
    import time

    u = time.time_ns()
    return u + gps_minus_unix_ns(u)
