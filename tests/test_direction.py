"""Plane-front directions: triple solve, least-squares fit, sky conversion.

References: astropy (sidereal time, AltAz/TETE frames, WGS84 positions), SciPy
(Rayleigh, normal and Poisson distributions) and the plane-front model of
CHECKS.md, t_i = t0 − (n · r_i) / c, simulated with Gaussian clock errors.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import ITRS, TETE, AltAz, CartesianRepresentation, EarthLocation, SkyCoord
from astropy.time import Time
from scipy import integrate, special, stats

from tocsin.engine.direction import (
    FrontFit,
    error_ellipse,
    fit_front,
    front_radec,
    position_angle_deg,
    seed_baselines,
    solve_triples,
)
from tocsin.engine.geometry import ellipsoid_up, triangle_min_angle_deg
from tocsin.engine.sky import ecef_unit_to_radec, local_up_ecef, radec_to_ecef_unit
from tocsin.gpstime import utc_to_gps_ns
from tocsin.types import C_M_PER_NS, F64Array, I64Array

# Fictional GPS-timed sites at plausible places across one continent:
# (lat_deg, lon_deg, height_m, clock_sigma_ns).
SITES = np.array(
    [
        (41.2, -4.6, 800.0, 40.0),
        (47.9, 1.9, 120.0, 60.0),
        (52.4, 9.7, 60.0, 30.0),
        (59.3, 18.1, 30.0, 80.0),
        (45.1, 16.2, 150.0, 100.0),
        (38.2, 23.5, 300.0, 50.0),
        (50.1, 30.4, 180.0, 70.0),
        (55.7, -3.9, 250.0, 45.0),
        (43.6, 11.0, 90.0, 35.0),
        (64.1, 25.7, 40.0, 90.0),
    ]
)


def _ecef(lat: F64Array, lon: F64Array, h: F64Array) -> F64Array:
    """WGS84 positions in metres from astropy (EarthLocation.from_geodetic)."""
    loc = EarthLocation.from_geodetic(lon * u.deg, lat * u.deg, h * u.m, ellipsoid="WGS84")
    return np.stack([loc.x.to_value(u.m), loc.y.to_value(u.m), loc.z.to_value(u.m)], axis=-1)


POS = _ecef(SITES[:, 0], SITES[:, 1], SITES[:, 2])
SIGMA = SITES[:, 3]
UP = ellipsoid_up(POS)
T_BASE = utc_to_gps_ns("2026-03-01T00:00:00")


def _hits(
    n: F64Array, t0: int, pos: F64Array, sigma: F64Array, rng: np.random.Generator | None
) -> I64Array:
    """Model hit times t_i = t0 − n·r_i/c (+ Gaussian clock error), int64 GPS ns.

    Offsets are computed in float ns and only then added to the integer t0.
    """
    offset = -(pos @ n) / C_M_PER_NS
    if rng is not None:
        offset = offset + rng.normal(size=len(sigma)) * sigma
    return np.int64(t0) + np.round(offset).astype(np.int64)


def _unit(v: F64Array) -> F64Array:
    out: F64Array = v / np.linalg.norm(v, axis=-1, keepdims=True)
    return out


# --------------------------------------------------------------------------- (a) sky


ZENITH_CASES = [
    ("2024-03-20T12:00:00", 46.1, 7.4),
    ("2024-03-20T12:00:00", -33.9, 151.2),
    ("2025-08-09T19:45:30", 64.8, -147.7),
    ("2026-11-15T03:21:09.5", 0.5, -60.0),
    ("2026-11-15T03:21:09.5", 85.0, 20.0),
]


@pytest.mark.parametrize(("iso", "lat", "lon"), ZENITH_CASES)
def test_zenith_is_at_local_sidereal_time_and_latitude(iso: str, lat: float, lon: float) -> None:
    ra, dec = ecef_unit_to_radec(local_up_ecef(lat, lon), utc_to_gps_ns(iso))
    t = Time(iso, scale="utc")
    last = t.sidereal_time("apparent", longitude=lon * u.deg)
    expected = SkyCoord(ra=last, dec=lat * u.deg)
    got = SkyCoord(ra=ra * u.deg, dec=dec * u.deg)
    # CHECKS.md: zenith at RA = local apparent sidereal time, Dec ≈ geodetic latitude,
    # within 0.5° (the ICRS result differs from the of-date frame by precession,
    # ≈ 0.014°/yr since J2000 (from memory)).
    assert got.separation(expected).deg < 0.5
    # Same check in astropy's apparent-of-date frame (TETE), where no precession
    # separates them: left are polar motion and diurnal aberration (< 1″ each, from memory).
    of_date = got.transform_to(TETE(obstime=t))
    assert SkyCoord(ra=of_date.ra, dec=of_date.dec).separation(expected).deg < 1e-3
    # Second reference: astropy's AltAz zenith (alt = 90°) at that place -> ICRS.
    loc = EarthLocation.from_geodetic(lon * u.deg, lat * u.deg, 0.0 * u.m)
    zenith = SkyCoord(AltAz(alt=90 * u.deg, az=0 * u.deg, location=loc, obstime=t)).icrs
    assert got.separation(zenith).deg < 1e-3


def test_front_radec_round_trip() -> None:
    # A noise-free front from ICRS (ra, dec) (astropy, via radec_to_ecef_unit) fitted
    # back: the Earth turns 15″/s, so the ≤ 21 ms between hits and t0 move it < 1e-4°.
    ra, dec = 123.4, 38.9
    t0 = T_BASE + 3_600 * 10**9
    n = radec_to_ecef_unit(ra, dec, t0)
    above = UP @ n > 0.0
    assert above.sum() >= 6
    fit = fit_front(POS[above], _hits(n, t0, POS[above], SIGMA[above], None), SIGMA[above])
    assert fit is not None
    got = SkyCoord(*front_radec(fit), unit="deg")
    assert got.separation(SkyCoord(ra, dec, unit="deg")).deg < 1e-4


# --------------------------------------------------------------------------- (b) statistics


@dataclass(frozen=True)
class Trials:
    """Results of many fits of simulated fronts (one row per trial)."""

    whitened: F64Array  # error radius in units of the covariance (Mahalanobis distance)
    scaled: F64Array  # angular error / err
    axis_ratio: F64Array  # sqrt(largest / smallest eigenvalue) of the 2×2 covariance
    hoyt_1: F64Array  # P(angular error < 1 err) for this trial's error ellipse
    hoyt_3: F64Array  # P(angular error < 3 err)
    chi2: F64Array
    ndof: F64Array
    t0_pull: F64Array
    ambiguous: F64Array


def _within_ellipse(s1: float, s2: float, radius: float) -> float:
    """P(s1² z1² + s2² z2² < radius²) for independent standard normals.

    One-dimensional integral of normal pdf × (2 Φ − 1) with SciPy (quad, special.ndtr).
    """

    def integrand(z: float) -> float:
        rest = math.sqrt(max(radius * radius - s1 * s1 * z * z, 0.0)) / s2
        pdf = math.exp(-0.5 * z * z) / math.sqrt(2.0 * math.pi)
        return pdf * (2.0 * float(special.ndtr(rest)) - 1.0)

    value, _ = integrate.quad(integrand, -radius / s1, radius / s1)
    return float(value)


@pytest.fixture(scope="module")
def trials() -> Trials:
    rng = np.random.default_rng(2026)
    rows: list[tuple[float, ...]] = []
    while len(rows) < 1000:
        n = _unit(rng.normal(size=3))
        above = UP @ n > 0.0
        if above.sum() < 6:  # source above the horizon of at least 6 sites
            continue
        pos, sig = POS[above], SIGMA[above]
        t0 = T_BASE + int(rng.integers(0, 86_400 * 10**9))
        fit = fit_front(pos, _hits(n, t0, pos, sig, rng), sig)
        assert fit is not None
        d = fit.tangent_basis @ (n - fit.n)  # error in the tangent plane (first order)
        evals = np.linalg.eigvalsh(fit.cov_rad2)
        err = np.radians(fit.err_deg)
        s1, s2 = np.sqrt(evals[1]) / err, np.sqrt(evals[0]) / err
        angle = float(np.arccos(np.clip(n @ fit.n, -1.0, 1.0)))
        rows.append(
            (
                float(np.sqrt(d @ np.linalg.solve(fit.cov_rad2, d))),
                angle / err,
                float(np.sqrt(evals[1] / evals[0])),
                _within_ellipse(s1, s2, 1.0),
                _within_ellipse(s1, s2, 3.0),
                fit.chi2,
                float(fit.ndof),
                (fit.t0_ns - t0) / fit.t0_sigma_ns,
                float(fit.ambiguous),
            )
        )
    return Trials(*(np.array(col) for col in zip(*rows, strict=True)))


def _binomial_3sigma(p: F64Array | float, n: int) -> float:
    """3σ of an observed fraction for n trials with success probabilities p (common practice)."""
    pp = np.broadcast_to(np.asarray(p, dtype=float), (n,))
    return 3.0 * float(np.sqrt(np.sum(pp * (1.0 - pp)))) / n


def test_whitened_direction_errors_are_rayleigh(trials: Trials) -> None:
    # With the right covariance, the Mahalanobis error radius of a 2-D Gaussian is
    # Rayleigh(1) (χ² with 2 dof): scipy.stats.rayleigh.
    r = trials.whitened
    n = len(r)
    for k in (1.0, 3.0):
        expected = float(stats.rayleigh.cdf(k))  # 39.3 % and 98.9 %
        assert abs(np.mean(r < k) - expected) < _binomial_3sigma(expected, n)
    assert stats.kstest(r, stats.rayleigh.cdf).pvalue > 1e-3


def test_err_deg_coverage(trials: Trials) -> None:
    # err_deg is circularised (sqrt of the ellipse's semi-axis product). For each
    # trial, the chance that the error falls inside k radii follows from its
    # ellipse (integral of normal pdf/cdf, SciPy); the observed fraction must match.
    n = len(trials.scaled)
    for k, p in ((1.0, trials.hoyt_1), (3.0, trials.hoyt_3)):
        assert abs(np.mean(trials.scaled < k) - np.mean(p)) < _binomial_3sigma(p, n)
    # Near-round ellipses (axis ratio ≤ 1.5): plain Rayleigh, 39.3 % within 1 radius and
    # 98.9 % within 3 (scipy.stats.rayleigh); an axis ratio of 1.5 lowers these by at
    # most 0.7 and 1.0 points (from the ellipse integral above).
    round_ = trials.axis_ratio <= 1.5
    m = int(round_.sum())
    assert m > 150
    scaled = trials.scaled[round_]
    p1, p3 = float(stats.rayleigh.cdf(1.0)), float(stats.rayleigh.cdf(3.0))
    assert abs(np.mean(scaled < 1.0) - p1) < _binomial_3sigma(p1, m) + 0.007
    assert np.mean(scaled < 3.0) > p3 - _binomial_3sigma(p3, m) - 0.010


def test_chi2_mean_equals_ndof(trials: Trials) -> None:
    # E[χ²] = ndof, Var[χ²] = 2 ndof for a correct linear(ised) Gaussian model (textbook)
    n = len(trials.chi2)
    assert trials.ndof.min() >= 3
    tolerance = 3.0 * float(np.sqrt(2.0 * trials.ndof.sum())) / n
    assert abs(trials.chi2.mean() - trials.ndof.mean()) < tolerance


def test_t0_pulls_are_standard_normal(trials: Trials) -> None:
    pulls = trials.t0_pull
    n = len(pulls)
    # sample std of n standard normals has sd ≈ 1/sqrt(2n) (textbook): 3σ band
    assert abs(float(np.std(pulls)) - 1.0) < 3.0 / np.sqrt(2.0 * n)
    assert abs(float(np.mean(pulls))) < 3.0 / np.sqrt(n)
    # fraction outside 3σ: 2 * norm.sf(3) = 0.27 %; count bounded by a Poisson 99.9 % quantile
    outside = int(np.sum(np.abs(pulls) > 3.0))
    assert outside <= stats.poisson.ppf(0.999, 2.0 * stats.norm.sf(3.0) * n)


def test_six_or_more_curved_sites_break_the_mirror(trials: Trials) -> None:
    # Over a continent the Earth's curvature takes the sites out of one plane, so
    # with GPS clocks the mirror solution is rejected (design check).
    assert trials.ambiguous.sum() == 0


# --------------------------------------------------------------------------- (c) triples


TRIPLES = np.array(list(itertools.combinations(range(len(SITES)), 3)))


@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_triples_reproduce_a_noise_free_front(seed: int) -> None:
    rng = np.random.default_rng(seed)
    n_true = _unit(rng.normal(size=3))
    t = -(POS @ n_true) / C_M_PER_NS  # plane-front model, float ns relative to t0
    s, j, k = TRIPLES.T
    m = len(s)
    sol = solve_triples(
        seed_baselines(POS, s, j), seed_baselines(POS, s, k), t[j] - t[s], t[k] - t[s]
    )
    assert sol.valid.all()
    dist = np.linalg.norm(sol.n - n_true, axis=2)  # (2, M)
    assert float(dist.min(axis=0).max()) < 1e-9
    # both mirror solutions are unit vectors solving the two delay equations
    np.testing.assert_allclose(np.linalg.norm(sol.n, axis=2), 1.0, atol=1e-12)
    for b, tt in (
        (seed_baselines(POS, s, j), t[j] - t[s]),
        (seed_baselines(POS, s, k), t[k] - t[s]),
    ):
        np.testing.assert_allclose(
            np.einsum("pmc,mc->pm", sol.n, b) / C_M_PER_NS, [tt, tt], atol=1e-6
        )
    others = np.broadcast_to(np.arange(len(SITES)), (m, len(SITES)))
    pred = sol.predict(seed_baselines(POS, s, others), SIGMA[s], SIGMA[j], SIGMA[k])
    which = dist.argmin(axis=0)
    delays = pred.delay_ns[which, np.arange(m)]
    np.testing.assert_allclose(delays, t[None, :] - t[s][:, None], atol=1e-5)
    # the (L, 3) form of further baselines (same further sites for every triple) agrees
    # when the seed is the same site
    same_seed = s == 0
    b_l = POS[0] - POS
    pred2 = solve_triples(
        seed_baselines(POS, s[same_seed], j[same_seed]),
        seed_baselines(POS, s[same_seed], k[same_seed]),
        (t[j] - t[s])[same_seed],
        (t[k] - t[s])[same_seed],
    ).predict(b_l, SIGMA[0], SIGMA[j[same_seed]], SIGMA[k[same_seed]])
    np.testing.assert_allclose(pred2.delay_ns, pred.delay_ns[:, same_seed], atol=1e-9)
    # a subset of the solutions predicts the same as the full set
    sub = sol.take(np.flatnonzero(same_seed)).predict(
        b_l, SIGMA[0], SIGMA[j[same_seed]], SIGMA[k[same_seed]]
    )
    np.testing.assert_array_equal(sub.delay_ns, pred2.delay_ns)
    np.testing.assert_array_equal(sub.sigma_ns, pred2.sigma_ns)


def test_triple_solve_rejects_mismatched_shapes_naming_them() -> None:
    b = np.zeros((4, 3))
    with pytest.raises(ValueError, match=r"\(3,\)"):
        solve_triples(b, b, np.zeros(3), np.zeros(4))


def _monte_carlo_arrivals(
    s: I64Array, j: I64Array, k: I64Array, t: F64Array, which: I64Array, draws: int, tol: float
) -> F64Array:
    """Predicted arrival times t_s + Δt_l of every site for noisy clocks, (draws, M, N)."""
    rng = np.random.default_rng(99)
    m, n_sites = len(s), len(SITES)
    eps = rng.normal(size=(draws, n_sites)) * SIGMA
    tn = t[None, :] + eps  # (draws, N)
    ss, jj, kk = (np.tile(a, draws) for a in (s, j, k))
    rows = np.repeat(np.arange(draws), m)
    sol = solve_triples(
        seed_baselines(POS, ss, jj),
        seed_baselines(POS, ss, kk),
        tn[rows, jj] - tn[rows, ss],
        tn[rows, kk] - tn[rows, ss],
        tol_ns=tol,
    )
    others = np.broadcast_to(np.arange(n_sites), (len(ss), n_sites))
    pred = sol.predict(seed_baselines(POS, ss, others), 1.0, 1.0, 1.0)
    delay = pred.delay_ns[np.tile(which, draws), np.arange(len(ss))]
    out: F64Array = (delay + tn[rows, ss][:, None]).reshape(draws, m, n_sites)
    return out


def test_prediction_errors_match_monte_carlo() -> None:
    # First-order propagation vs the spread of predictions over simulated clock
    # errors (Monte Carlo, numpy Generator): the σ_s term is common to both delays
    # and to the prediction, so a wrong covariance shows up here.
    rng = np.random.default_rng(5)
    n_true = _unit(UP[[0, 2, 4, 8]].mean(axis=0) + 0.3 * rng.normal(size=3))
    t = -(POS @ n_true) / C_M_PER_NS
    s, j, k = TRIPLES.T
    sol = solve_triples(
        seed_baselines(POS, s, j), seed_baselines(POS, s, k), t[j] - t[s], t[k] - t[s]
    )
    # well-conditioned: fat triangles, front well out of the triangle's plane
    fat = triangle_min_angle_deg(seed_baselines(POS, s, j), seed_baselines(POS, s, k)) > 10.0
    good = sol.valid & fat & (sol.alpha2 > 0.05)
    assert good.sum() >= 20
    s, j, k = s[good], j[good], k[good]
    which = np.linalg.norm(sol.n[:, good] - n_true, axis=2).argmin(axis=0)
    others = np.broadcast_to(np.arange(len(SITES)), (len(s), len(SITES)))
    sub = solve_triples(
        seed_baselines(POS, s, j), seed_baselines(POS, s, k), t[j] - t[s], t[k] - t[s]
    )
    pred = sub.predict(seed_baselines(POS, s, others), SIGMA[s], SIGMA[j], SIGMA[k])
    sigma = pred.sigma_ns[which, np.arange(len(s))]
    arrivals = _monte_carlo_arrivals(s, j, k, t, which, draws=4000, tol=0.0)
    spread = np.nanstd(arrivals, axis=0)
    ratio = spread / sigma
    assert float(np.abs(ratio - 1.0).max()) < 0.10
    # the seed itself and partner j are predicted with their own clock errors exactly
    np.testing.assert_allclose(sigma[np.arange(len(s)), s], SIGMA[s], rtol=1e-9)
    np.testing.assert_allclose(sigma[np.arange(len(s)), j], SIGMA[j], rtol=1e-9)


@pytest.mark.parametrize("elevation", [0.0, 1e-4, 1e-2])
def test_regularised_errors_near_the_triangle_plane(elevation: float) -> None:
    # Documented cap: near α = 0 the propagated error stays finite and within a
    # factor 1.5 of the Monte-Carlo rms spread (design check of the cap).
    s, j, k = np.array([0]), np.array([2]), np.array([5])
    bj, bk = POS[0] - POS[2], POS[0] - POS[5]
    e3 = _unit(np.cross(bj, bk))
    along = _unit(bj - (bj @ e3) * e3)
    n_true = np.cos(elevation) * along + np.sin(elevation) * e3
    t = -(POS @ n_true) / C_M_PER_NS
    tol = 300.0
    sol = solve_triples(bj[None], bk[None], t[[2]] - t[[0]], t[[5]] - t[[0]], tol_ns=tol)
    assert sol.valid[0]
    which = np.linalg.norm(sol.n[:, 0] - n_true, axis=1).argmin(keepdims=True)
    pred = sol.predict((POS[0] - POS)[None], SIGMA[0], SIGMA[2], SIGMA[5])
    sigma = pred.sigma_ns[which[0], 0]
    arrivals = _monte_carlo_arrivals(s, j, k, t, which, draws=3000, tol=tol)[:, 0, :]
    rms = np.sqrt(np.nanmean((arrivals - t) ** 2, axis=0))
    assert np.all(np.isfinite(sigma))
    assert np.all((rms / sigma > 1 / 1.5) & (rms / sigma < 1.5))


def test_clamping_tolerance() -> None:
    # A front exactly along the triangle's plane (|n0| = 1); lengthen one delay by
    # 20 ns so that |n0| > 1: invalid without tolerance, clamped within it.
    bj, bk = POS[0] - POS[2], POS[0] - POS[5]
    e3 = _unit(np.cross(bj, bk))
    n_true = _unit(bj - (bj @ e3) * e3)
    t = -(POS @ n_true) / C_M_PER_NS
    dtj = np.array([t[2] - t[0] + 20.0 * np.sign(t[2] - t[0])])
    dtk = np.array([t[5] - t[0]])
    strict = solve_triples(bj[None], bk[None], dtj, dtk)
    assert not strict.valid[0] and not strict.clamped[0]
    assert np.isnan(strict.n).all()
    loose = solve_triples(bj[None], bk[None], dtj, dtk, tol_ns=40.0)
    assert loose.valid[0] and loose.clamped[0]
    np.testing.assert_allclose(loose.n[0, 0], loose.n[1, 0])
    assert np.linalg.norm(loose.n[0, 0]) == pytest.approx(1.0, abs=1e-12)
    assert float(np.arccos(min(1.0, float(loose.n[0, 0] @ n_true)))) < 1e-4
    tight = solve_triples(bj[None], bk[None], dtj, dtk, tol_ns=5.0)
    assert not tight.valid[0]


# --------------------------------------------------------------------------- (d) geometry


def test_collinear_triples_are_invalid() -> None:
    line = np.array([[6.4e6, 0.0, 0.0], [6.4e6, 1e5, 1e5], [6.4e6, 3e5, 3e5]])
    bj, bk = (line[0] - line[1])[None], (line[0] - line[2])[None]
    sol = solve_triples(bj, bk, np.array([100.0]), np.array([300.0]))
    assert not sol.valid[0]
    pred = sol.predict((line[0] - POS)[None], 50.0, 50.0, 50.0)
    assert np.isnan(pred.delay_ns).all() and np.isnan(pred.sigma_ns).all()


def test_fit_returns_none_for_degenerate_geometry() -> None:
    n = _unit(UP[2] + 0.2 * UP[0])
    t2 = _hits(n, T_BASE, POS[:2], SIGMA[:2], None)
    assert fit_front(POS[:2], t2, SIGMA[:2]) is None
    line = np.array([[6.4e6, 0.0, 0.0], [6.4e6, 1e5, 1e5], [6.4e6, 3e5, 3e5], [6.4e6, 4e5, 4e5]])
    sig = np.full(4, 50.0)
    assert fit_front(line, _hits(n, T_BASE, line, sig, None), sig) is None
    road = _ecef(np.array([46.0, 46.045, 46.09]), np.full(3, 7.0), np.zeros(3))  # 10 km
    assert fit_front(road, _hits(n, T_BASE, road, sig[:3], None), sig[:3]) is None


def test_fit_rejects_float_times_naming_the_dtype() -> None:
    t = _hits(UP[2], T_BASE, POS[:4], SIGMA[:4], None).astype(np.float64)
    with pytest.raises(ValueError, match="float64"):
        fit_front(POS[:4], t, SIGMA[:4])  # type: ignore[arg-type]


def test_three_sites_are_ambiguous_and_prefer_the_sky_above() -> None:
    # Three sites always lie in one plane: both mirrors fit exactly (χ² = 0). The
    # fit must report the ambiguity and choose the one above the sites' horizon.
    idx = [0, 3, 6]
    pos, sig = POS[idx], SIGMA[idx]
    n_true = _unit(UP[idx].mean(axis=0) + np.array([0.1, -0.2, 0.05]))
    assert np.all(UP[idx] @ n_true > 0.0)
    hits = _hits(n_true, T_BASE, pos, sig, None)
    fit = fit_front(pos, hits, sig)
    assert isinstance(fit, FrontFit)
    assert fit.ambiguous and fit.mirror_n is not None
    assert fit.ndof == 0 and fit.chi2 < 1e-6
    assert float(np.arccos(min(1.0, float(fit.n @ n_true)))) < 1e-6
    assert np.all(UP[idx] @ fit.n > 0.0) and np.all(UP[idx] @ fit.mirror_n < 0.0)
    # the mirror reproduces the measured delays as exactly as the chosen solution
    measured = (hits - hits[0]).astype(np.float64)
    for n in (fit.n, fit.mirror_n):
        model = -(pos @ n - pos[0] @ n) / C_M_PER_NS
        np.testing.assert_allclose(model, measured, atol=1e-3)


def test_fit_noise_free_recovers_direction_and_t0() -> None:
    n_true = _unit(UP[[1, 2, 4]].sum(axis=0))
    t0 = T_BASE + 123_456_789
    fit = fit_front(POS, _hits(n_true, t0, POS, SIGMA, None), SIGMA)
    assert fit is not None
    # only the rounding of hit times to 1 ns (uniform, rms 1/sqrt(12) = 0.29 ns)
    # perturbs the fit: errors scale down from the stated ones by ≤ 0.29 / min(σ)
    shrink = 3.0 * (1.0 / np.sqrt(12.0)) / float(SIGMA.min())
    assert np.degrees(np.arccos(min(1.0, float(fit.n @ n_true)))) < shrink * fit.err_deg
    assert abs(fit.t0_ns - t0) <= shrink * fit.t0_sigma_ns + 1.0
    assert fit.t_ref_ns == int(_hits(n_true, t0, POS, SIGMA, None).min())
    assert fit.ndof == len(SITES) - 3
    assert float(np.abs(fit.residuals_ns).max()) < 1.0
    # starting from a guess gives the same answer
    again = fit_front(POS, _hits(n_true, t0, POS, SIGMA, None), SIGMA, guess=-n_true)
    assert again is not None and float(np.linalg.norm(again.n - fit.n)) < 1e-9


# --------------------------------------------------------------------------- error ellipse


def test_position_angle_matches_astropy() -> None:
    """Source: astropy's SkyCoord.position_angle (east of north)."""
    rng = np.random.default_rng(3)
    for _ in range(50):
        ra0, ra1 = rng.uniform(0, 360, 2)
        dec0, dec1 = rng.uniform(-89, 89, 2)
        ref = SkyCoord(ra0 * u.deg, dec0 * u.deg).position_angle(
            SkyCoord(ra1 * u.deg, dec1 * u.deg)
        )
        got = position_angle_deg(ra0, dec0, ra1, dec1)
        diff = (got - ref.deg + 180.0) % 360.0 - 180.0
        assert abs(diff) < 1e-9


def test_error_ellipse_matches_the_scatter_of_sampled_directions() -> None:
    """Three far-apart sites and a fourth near their line give an elongated ellipse.
    Directions drawn from the fit's covariance (in its tangent basis), carried into
    ICRS by astropy and measured with SkyCoord.spherical_offsets_to (east, north),
    scatter with the ellipse's semi-axes and position angle."""
    idx = [0, 3, 5, 2]  # Iberia, Scandinavia, Greece, Germany
    n = _unit(np.array([0.3, -0.5, 0.8]))
    t = _hits(n, T_BASE, POS[idx], SIGMA[idx], None)
    fit = fit_front(POS[idx], t, SIGMA[idx])
    assert fit is not None
    ell = error_ellipse(fit)
    assert error_ellipse(fit, front_radec(fit)) == ell  # the caller's own direction
    vals = np.linalg.eigvalsh(fit.cov_rad2)
    assert ell.major_deg == pytest.approx(math.degrees(math.sqrt(vals[1])), rel=1e-12)
    assert ell.minor_deg == pytest.approx(math.degrees(math.sqrt(vals[0])), rel=1e-12)
    assert ell.major_deg > 1.5 * ell.minor_deg  # elongated, or the check says little
    assert fit.err_deg == pytest.approx(math.sqrt(ell.major_deg * ell.minor_deg), rel=1e-9)
    rng = np.random.default_rng(8)
    draws = rng.multivariate_normal(np.zeros(2), fit.cov_rad2, size=3000)
    vecs = _unit(fit.n + draws @ fit.tangent_basis)
    ra0, dec0 = front_radec(fit)
    obstime = Time(fit.t0_ns / 1e9, format="gps")
    itrs = ITRS(CartesianRepresentation(vecs.T, unit=u.one), obstime=obstime)
    icrs = SkyCoord(itrs).transform_to("icrs")
    centre = SkyCoord(ra0 * u.deg, dec0 * u.deg, frame="icrs")
    east, north = centre.spherical_offsets_to(SkyCoord(icrs.ra, icrs.dec, frame="icrs"))
    off = np.stack([east.deg, north.deg])
    s_vals, s_vecs = np.linalg.eigh(np.cov(off))
    assert math.sqrt(s_vals[1]) == pytest.approx(ell.major_deg, rel=0.06)
    assert math.sqrt(s_vals[0]) == pytest.approx(ell.minor_deg, rel=0.06)
    pa_mc = math.degrees(math.atan2(s_vecs[0, 1], s_vecs[1, 1])) % 180.0
    diff = (pa_mc - ell.pa_deg + 90.0) % 180.0 - 90.0
    assert abs(diff) < 3.0
