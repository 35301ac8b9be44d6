"""Network geometry: light-travel times between sites, combined clock errors, shape checks.

All positions are Earth-centred, Earth-fixed (ITRS/WGS84) Cartesian coordinates in
metres, as in :attr:`tocsin.model.registry.SiteRegistry.ecef_m`; all times are in
nanoseconds. Everything here is vectorised over sites and over triangles.
"""

from __future__ import annotations

import numpy as np

from tocsin.types import C_M_PER_NS, F64Array, I64Array

WGS84_A_M: float = 6_378_137.0
"""WGS84 equatorial radius (semi-major axis) in metres (NIMA TR8350.2, defining parameter)."""

WGS84_F: float = 1.0 / 298.257223563
"""WGS84 flattening (NIMA TR8350.2, defining parameter)."""

WGS84_E2: float = WGS84_F * (2.0 - WGS84_F)
"""WGS84 first eccentricity squared, e² = f (2 − f) (about 0.00669)."""

EARTH_DIAMETER_LIGHT_NS: float = 2.0 * WGS84_A_M / C_M_PER_NS
"""Light time across the Earth's equatorial diameter in ns: 2a/c ≈ 4.2551e7 ns (42.55 ms).

This is the largest delay a plane front can put between two sites on (or near)
the ground: ``|t_i − t_j| = |n · (r_i − r_j)| / c ≤ |r_i − r_j| / c ≤ 2a / c``
(the ellipsoid's longest chord is the equatorial diameter). Sites on mountains
can exceed it by at most their heights over c (10 km ≈ 33 µs).
"""

MIN_TRIANGLE_ANGLE_DEG: float = 1.0
"""Default smallest interior angle (degrees) for a triangle of sites to fix a direction.

Below it the three sites are treated as collinear. Common practice for timing
triangulation: a triangle whose smallest angle is θ amplifies delay errors into
the direction across its long side by roughly 1/sin θ (≈ 57 at 1°), and the
solve's normal matrix becomes ill-conditioned as θ → 0.
"""


def _as_positions(ecef_m: F64Array) -> F64Array:
    pos = np.asarray(ecef_m, dtype=np.float64)
    if pos.ndim != 2 or pos.shape[1] != 3:
        raise ValueError(f"site positions must have shape (N, 3) in metres, got {pos.shape}")
    return pos


def pair_light_time_ns(ecef_m: F64Array) -> F64Array:
    """Light-travel time |r_i − r_j| / c between every pair of sites, in ns, shape (N, N).

    ``ecef_m`` is (N, 3) ECEF metres. The diagonal is zero; the matrix is symmetric.
    Precision: float64 differences of ECEF coordinates (≤ 6.4e6 m) are good to
    ~1e-9 m, i.e. far below 1 ns.
    """
    pos = _as_positions(ecef_m)
    diff = pos[:, None, :] - pos[None, :, :]
    out: F64Array = np.sqrt(np.einsum("ijk,ijk->ij", diff, diff)) / C_M_PER_NS
    return out


def combined_sigma_ns(sigma_ns: F64Array) -> F64Array:
    """1σ error of a time difference between two sites, sqrt(σ_i² + σ_j²), in ns, shape (N, N).

    ``sigma_ns`` holds each site's 1σ clock error (ns, shape (N,)); clocks are
    independent. The diagonal is sqrt(2) σ_i (two hits of the same site).
    """
    s = np.asarray(sigma_ns, dtype=np.float64)
    if s.ndim != 1:
        raise ValueError(f"clock sigmas must have shape (N,) in ns, got {s.shape}")
    if not np.all(np.isfinite(s) & (s >= 0.0)):
        raise ValueError(f"clock sigmas must be finite and >= 0 ns, got {s.tolist()}")
    out: F64Array = np.sqrt(s[:, None] ** 2 + s[None, :] ** 2)
    return out


def triangle_min_angle_deg(b_j: F64Array, b_k: F64Array) -> F64Array:
    """Smallest interior angle (degrees) of the triangles with sides ``b_j``, ``b_k`` at one corner.

    ``b_j = r_s − r_j`` and ``b_k = r_s − r_k`` are baselines (metres, shape (..., 3),
    broadcast against each other) from a common corner s. The smallest angle lies
    opposite the shortest side and is below 60°, so
    ``sin θ_min = |b_j × b_k| / (L_mid · L_max)`` (twice the area over the product
    of the two longer sides) fixes it. Degenerate triangles (a
    zero side, or exactly collinear corners) give 0.
    """
    bj, bk = np.broadcast_arrays(
        np.asarray(b_j, dtype=np.float64), np.asarray(b_k, dtype=np.float64)
    )
    sides = np.stack(
        [
            np.linalg.norm(bj, axis=-1),
            np.linalg.norm(bk, axis=-1),
            np.linalg.norm(bk - bj, axis=-1),
        ],
        axis=-1,
    )
    sides.sort(axis=-1)
    twice_area = np.linalg.norm(np.cross(bj, bk), axis=-1)
    denom = sides[..., 1] * sides[..., 2]
    with np.errstate(invalid="ignore", divide="ignore"):
        s = np.where(denom > 0.0, twice_area / denom, 0.0)
    out: F64Array = np.degrees(np.arcsin(np.clip(s, 0.0, 1.0)))
    return out


def widest_triangle(ecef_m: F64Array) -> tuple[I64Array, float]:
    """Indices (a, b, k) of a well-shaped triangle of sites, and its smallest angle in degrees.

    ``a, b`` are the two sites farthest apart (the longest baseline) and ``k`` the
    site for which the triangle (a, b, k) has the largest smallest angle. Cost is
    O(N²) for N sites. With fewer than 3 sites the angle is 0 and the indices
    repeat site 0.
    """
    pos = _as_positions(ecef_m)
    n = pos.shape[0]
    if n < 3:
        return np.zeros(3, dtype=np.int64), 0.0
    d = pair_light_time_ns(pos)
    a, b = np.unravel_index(int(np.argmax(d)), d.shape)
    angles = triangle_min_angle_deg(pos[a] - pos[b], pos[a] - pos)
    angles[[a, b]] = -1.0
    k = int(np.argmax(angles))
    return np.array([a, b, k], dtype=np.int64), float(max(angles[k], 0.0))


def noncollinear(ecef_m: F64Array, *, min_angle_deg: float = MIN_TRIANGLE_ANGLE_DEG) -> bool:
    """True when the sites (ECEF metres, shape (N, 3)) can fix a plane-front direction.

    Criterion: at least 3 sites, and the triangle formed by the longest baseline
    and the best third site (:func:`widest_triangle`) has its smallest interior
    angle at least ``min_angle_deg``. In words: not all baselines are (nearly)
    parallel, measured by the shape of the widest triangle, independent of scale.
    A direction so fixed still has a mirror twin when all sites lie in one plane.
    """
    if not 0.0 < min_angle_deg < 60.0:
        raise ValueError(f"min_angle_deg must be in (0, 60) degrees, got {min_angle_deg!r}")
    pos = _as_positions(ecef_m)
    if pos.shape[0] < 3 or not np.all(np.isfinite(pos)):
        return False
    _, angle = widest_triangle(pos)
    return angle >= min_angle_deg


def ellipsoid_up(ecef_m: F64Array) -> F64Array:
    """Unit normals (local geodetic zenith) of the WGS84 ellipsoid near ECEF points, shape (..., 3).

    Uses the gradient of the ellipsoid, (x, y, z / (1 − e²)), which is the exact
    normal for points on the ellipsoid; at a height h it is off by at most about
    e² h / (2a) (5.3e-6 rad at h = 10 km), far below any direction error here.
    """
    pos = np.asarray(ecef_m, dtype=np.float64)
    if pos.shape[-1:] != (3,):
        raise ValueError(f"positions must have shape (..., 3) in metres, got {pos.shape}")
    g = pos * np.array([1.0, 1.0, 1.0 / (1.0 - WGS84_E2)])
    out: F64Array = g / np.linalg.norm(g, axis=-1, keepdims=True)
    return out
