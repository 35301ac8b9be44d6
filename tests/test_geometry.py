"""Network geometry, checked against astropy (WGS84 positions, the SI speed of light)."""

from __future__ import annotations

import numpy as np
import pytest
from astropy import constants
from astropy import units as u
from astropy.coordinates import EarthLocation

from tocsin.engine.geometry import (
    EARTH_DIAMETER_LIGHT_NS,
    combined_sigma_ns,
    ellipsoid_up,
    noncollinear,
    pair_light_time_ns,
    triangle_min_angle_deg,
    widest_triangle,
)
from tocsin.engine.sky import local_up_ecef
from tocsin.types import F64Array

C_M_PER_NS_ASTROPY = float(constants.c.to_value(u.m / u.ns))  # SI definition, 299 792 458 m/s
WGS84_A_M = 6_378_137.0  # WGS84 equatorial radius (NIMA TR8350.2; CHECKS.md)


def _ecef(lat_deg: F64Array, lon_deg: F64Array, h_m: F64Array | float = 0.0) -> F64Array:
    """Positions from astropy's WGS84 geodetic -> geocentric conversion, (N, 3) metres."""
    loc = EarthLocation.from_geodetic(
        lon=np.asarray(lon_deg) * u.deg,
        lat=np.asarray(lat_deg) * u.deg,
        height=np.broadcast_to(h_m, np.shape(lat_deg)) * u.m,
        ellipsoid="WGS84",
    )
    return np.stack([loc.x.to_value(u.m), loc.y.to_value(u.m), loc.z.to_value(u.m)], axis=-1)


def test_earth_diameter_constant() -> None:
    # 2a/c with WGS84 a = 6 378 137 m and c exact (SI); CHECKS.md quotes ≈ 42.55 ms.
    reference = 2.0 * WGS84_A_M / C_M_PER_NS_ASTROPY
    assert pytest.approx(reference, rel=1e-12) == EARTH_DIAMETER_LIGHT_NS
    assert abs(EARTH_DIAMETER_LIGHT_NS / 1e6 - 42.55) < 0.005


def test_random_surface_pairs_never_exceed_the_diameter_bound() -> None:
    rng = np.random.default_rng(42)
    n = 400
    lat = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))  # uniform on the sphere
    lon = rng.uniform(-180.0, 180.0, n)
    pos = _ecef(lat, lon)
    light = pair_light_time_ns(pos)
    # |r_i − r_j| / c ≤ 2a / c: the longest chord of the ellipsoid is its equatorial diameter
    assert float(light.max()) <= EARTH_DIAMETER_LIGHT_NS
    assert float(light.max()) > 0.95 * EARTH_DIAMETER_LIGHT_NS  # random pairs come close


def test_antipodal_equator_points_reach_the_bound_and_poles_do_not() -> None:
    pos = _ecef(np.array([0.0, 0.0, 90.0, -90.0]), np.array([0.0, 180.0, 0.0, 0.0]))
    light = pair_light_time_ns(pos)
    assert light[0, 1] == pytest.approx(2.0 * WGS84_A_M / C_M_PER_NS_ASTROPY, abs=1e-3)
    # polar diameter 2b < 2a (WGS84 b = 6 356 752.314 m, NIMA TR8350.2, from memory)
    assert light[2, 3] == pytest.approx(2.0 * 6_356_752.314 / C_M_PER_NS_ASTROPY, abs=1.0)


def test_pair_light_time_matches_astropy_distances() -> None:
    rng = np.random.default_rng(7)
    lat = rng.uniform(-60.0, 70.0, 12)
    lon = rng.uniform(-180.0, 180.0, 12)
    h = rng.uniform(0.0, 3000.0, 12)
    loc = EarthLocation.from_geodetic(lon * u.deg, lat * u.deg, h * u.m, ellipsoid="WGS84")
    light = pair_light_time_ns(_ecef(lat, lon, h))
    for i in range(12):
        # astropy Quantity arithmetic: distance / c in ns, units carried by astropy
        d = np.sqrt((loc.x - loc[i].x) ** 2 + (loc.y - loc[i].y) ** 2 + (loc.z - loc[i].z) ** 2)
        ref = (d / constants.c).to_value(u.ns)
        np.testing.assert_allclose(light[i], ref, rtol=1e-12, atol=1e-6)
    np.testing.assert_array_equal(light, light.T)
    np.testing.assert_array_equal(np.diag(light), 0.0)


def test_pair_light_time_rejects_bad_shape() -> None:
    with pytest.raises(ValueError, match=r"\(4,\)"):
        pair_light_time_ns(np.zeros(4))


def test_combined_sigma_is_the_quadrature_sum() -> None:
    # independent errors add in quadrature (textbook error propagation)
    s = np.array([30.0, 50.0, 2e6, 0.0])
    out = combined_sigma_ns(s)
    for i in range(4):
        for j in range(4):
            assert out[i, j] == pytest.approx(float(np.hypot(s[i], s[j])), rel=1e-15)
    with pytest.raises(ValueError, match=r"-1\.0"):
        combined_sigma_ns(np.array([10.0, -1.0]))


def test_triangle_min_angle_matches_law_of_cosines() -> None:
    rng = np.random.default_rng(3)
    a, b, c = rng.normal(size=(3, 200, 3)) * 1e6
    got = triangle_min_angle_deg(a - b, a - c)

    def corner(p: F64Array, q: F64Array, r: F64Array) -> F64Array:
        u1, u2 = q - p, r - p
        cosang = np.einsum("ij,ij->i", u1, u2) / (
            np.linalg.norm(u1, axis=1) * np.linalg.norm(u2, axis=1)
        )
        out: F64Array = np.degrees(np.arccos(np.clip(cosang, -1.0, 1.0)))
        return out

    angles = np.stack([corner(a, b, c), corner(b, c, a), corner(c, a, b)])
    np.testing.assert_allclose(angles.sum(axis=0), 180.0, atol=1e-9)  # Euclid I.32
    np.testing.assert_allclose(got, angles.min(axis=0), atol=1e-7)


def test_noncollinear_criterion() -> None:
    spread = _ecef(np.array([44.0, 51.0, 47.5]), np.array([2.0, 4.0, 14.0]))
    assert noncollinear(spread)
    # exact straight line in ECEF
    line = np.array([[6.4e6, 0.0, 0.0], [6.4e6, 1e5, 1e5], [6.4e6, 3e5, 3e5], [6.4e6, 5e4, 5e4]])
    assert not noncollinear(line)
    # 3 sites on a straight 10 km road: the Earth's curvature bends it by ~2 m only
    road = _ecef(np.array([46.0, 46.045, 46.09]), np.array([7.0, 7.0, 7.0]))
    assert not noncollinear(road)
    # a long meridian line bends enough (sagitta L²/8R ≈ 20 km over 1000 km) to be a triangle
    meridian = _ecef(np.array([40.0, 44.5, 49.0]), np.array([7.0, 7.0, 7.0]))
    assert noncollinear(meridian)
    assert not noncollinear(meridian, min_angle_deg=5.0)
    assert not noncollinear(spread[:2])
    with pytest.raises(ValueError, match="90"):
        noncollinear(spread, min_angle_deg=90.0)


def test_widest_triangle_uses_the_longest_baseline() -> None:
    pos = _ecef(np.array([40.0, 41.0, 60.0, 50.0]), np.array([-5.0, -4.0, 25.0, 0.0]))
    (a, b, k), angle = widest_triangle(pos)
    light = pair_light_time_ns(pos)
    assert light[a, b] == light.max()
    assert k not in (a, b)
    others = [i for i in range(4) if i not in (a, b)]
    best = max(float(triangle_min_angle_deg(pos[a] - pos[b], pos[a] - pos[i])) for i in others)
    assert angle == pytest.approx(best)


def test_ellipsoid_up_is_the_geodetic_normal() -> None:
    # geodetic latitude is the angle of the ellipsoid normal: up = (cos φ cos λ, cos φ sin λ,
    # sin φ) (WGS84 definition, NIMA TR8350.2); positions from astropy.
    rng = np.random.default_rng(11)
    lat = rng.uniform(-89.0, 89.0, 50)
    lon = rng.uniform(-180.0, 180.0, 50)
    ref = np.stack([local_up_ecef(a, b) for a, b in zip(lat, lon, strict=True)])
    on_surface = ellipsoid_up(_ecef(lat, lon, 0.0))
    np.testing.assert_allclose(on_surface, ref, atol=1e-12)
    # at 10 km height: documented bound e² h / (2a) with WGS84 e² = 0.00669438 (from memory)
    high = ellipsoid_up(_ecef(lat, lon, 10_000.0))
    bound = 0.00669438 * 10_000.0 / (2.0 * WGS84_A_M)
    assert float(np.max(np.linalg.norm(high - ref, axis=1))) < 1.01 * bound
