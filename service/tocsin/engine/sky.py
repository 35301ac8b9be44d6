"""Directions on the sky <-> Earth-fixed unit vectors, through astropy.

A plane front travelling from a source in direction ``n`` (unit vector from
Earth towards the source, Earth-centred Earth-fixed ITRS axes) reaches a site at
ECEF position ``r`` at ``t = t0 - (n . r) / c``. The engine works in ECEF; RA/Dec
(ICRS) appear only at the edges, converted with astropy's full ITRS -> ICRS
chain (precession, nutation, Earth rotation; UT1 from the bundled IERS table,
no downloads: see :mod:`tocsin.gpstime`).
"""

from __future__ import annotations

import numpy as np
from astropy import units as u
from astropy.coordinates import ITRS, SkyCoord, UnitSphericalRepresentation

from tocsin.gpstime import gps_ns_to_time
from tocsin.types import F64Array, GpsNs


def radec_to_ecef_unit(ra_deg: float, dec_deg: float, t_gps_ns: GpsNs) -> F64Array:
    """Unit ECEF vector pointing at ICRS (``ra_deg``, ``dec_deg``) at GPS time ``t_gps_ns``."""
    obstime = gps_ns_to_time(t_gps_ns)
    c = SkyCoord(ra=ra_deg * u.deg, dec=dec_deg * u.deg, frame="icrs")
    itrs = c.transform_to(ITRS(obstime=obstime))
    v = itrs.represent_as(UnitSphericalRepresentation).to_cartesian().xyz.value
    out = np.asarray(v, dtype=float)
    return out / float(np.linalg.norm(out))


def ecef_unit_to_radec(n: F64Array, t_gps_ns: GpsNs) -> tuple[float, float]:
    """ICRS (RA, Dec) in degrees of the ECEF unit vector ``n`` at GPS time ``t_gps_ns``."""
    obstime = gps_ns_to_time(t_gps_ns)
    x, y, z = (float(a) for a in np.asarray(n, dtype=float) / float(np.linalg.norm(n)))
    rep = UnitSphericalRepresentation(
        lon=np.arctan2(y, x) * u.rad, lat=np.arcsin(np.clip(z, -1.0, 1.0)) * u.rad
    )
    icrs = SkyCoord(ITRS(rep, obstime=obstime)).transform_to("icrs")
    return float(icrs.ra.deg) % 360.0, float(icrs.dec.deg)


def local_up_ecef(lat_deg: float, lon_deg: float) -> F64Array:
    """Unit normal of the WGS84 ellipsoid (local geodetic zenith) in ECEF axes."""
    la, lo = np.radians(lat_deg), np.radians(lon_deg)
    return np.array([np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)])
