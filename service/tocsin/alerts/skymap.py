"""Localisation file: a multi-order HEALPix probability map of a fitted arrival direction.

The plane-front fit gives a direction and a 1-sigma error radius ``sigma`` (per
axis, as for a circular 2-D Gaussian). The map is the Fisher (von Mises-Fisher)
density on the sphere with concentration ``kappa = 1/sigma**2`` (sigma in radians),
which is that Gaussian for small sigma: the probability within angle ``r`` is
``1 - exp(-kappa (1 - cos r))``, i.e. the Rayleigh CDF ``1 - exp(-r**2 / (2 sigma**2))``
(Fisher 1953, Proc. R. Soc. A 217, 295).

With the fit's 1-sigma error ellipse (semi-axes ``a >= b``, position angle of the
major axis) the map is the Kent (FB5) density instead, the elliptical counterpart
of the Fisher density (Kent 1982, J. R. Stat. Soc. B 44, 71; see
:func:`kent_log_density`): the 2-D Gaussian of those semi-axes for small errors,
so the probability within the ellipse scaled by ``k`` is ``1 - exp(-k**2 / 2)``.
It is refined where the Mahalanobis distance is below ``REFINE_SIGMAS``, with
pixels a third of the minor axis, and normalised numerically.

A fit can be as sharp as 1e-4 deg (GPS-timed sites far apart), which no fixed-
resolution full-sky map holds, so the map is multi-order (``ORDERING = 'NUNIQ'``,
a ``UNIQ`` column of ``4 * 4**level + ipix`` in the NESTED scheme, and a
``PROBDENSITY`` column in sr^-1): fine pixels (resolution <= sigma/3) within 6 sigma of
the direction, coarser pixels elsewhere. Pixels are made with astropy-healpix.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy_healpix import (
    healpix_to_lonlat,
    level_ipix_to_uniq,
    level_to_nside,
    nside_to_pixel_area,
    nside_to_pixel_resolution,
)

from tocsin.types import BoolArray, F64Array, I64Array

MAX_LEVEL = 29
"""Deepest HEALPix level whose UNIQ fits an int64."""
REFINE_SIGMAS = 6.0
"""Fine pixels out to this many sigma (the density is below 1e-7 of its peak beyond)."""
PIXELS_PER_SIGMA = 3.0


def _unit(lon_rad: F64Array, lat_rad: F64Array) -> F64Array:
    c = np.cos(lat_rad)
    return np.stack([c * np.cos(lon_rad), c * np.sin(lon_rad), np.sin(lat_rad)], axis=-1)


def fisher_density(
    lon_rad: F64Array, lat_rad: F64Array, ra_deg: float, dec_deg: float, sigma_deg: float
) -> F64Array:
    """Fisher density (sr^-1) at the given points for mean direction (ra, dec), 1-sigma radius.

    ``1 - cos(theta)`` is taken as half the squared chord, exact at tiny angles.
    """
    kappa = 1.0 / math.radians(sigma_deg) ** 2
    u = _unit(lon_rad, lat_rad)
    m = _unit(np.array(math.radians(ra_deg)), np.array(math.radians(dec_deg)))
    one_minus_cos = 0.5 * np.sum((u - m) ** 2, axis=-1)
    norm = kappa / (2.0 * math.pi * -math.expm1(-2.0 * kappa))
    return np.asarray(norm * np.exp(-kappa * one_minus_cos), dtype=np.float64)


def _axes(ra_deg: float, dec_deg: float, pa_deg: float) -> tuple[F64Array, F64Array, F64Array]:
    """Unit vectors (ICRS Cartesian) of the centre, of the major axis at position
    angle ``pa_deg`` (north through east) and of the minor axis."""
    a, d, p = (math.radians(x) for x in (ra_deg, dec_deg, pa_deg))
    centre = np.array([math.cos(d) * math.cos(a), math.cos(d) * math.sin(a), math.sin(d)])
    east = np.array([-math.sin(a), math.cos(a), 0.0])
    north = np.array([-math.sin(d) * math.cos(a), -math.sin(d) * math.sin(a), math.cos(d)])
    major = math.cos(p) * north + math.sin(p) * east
    minor = -math.sin(p) * north + math.cos(p) * east
    return centre, major, minor


def kent_log_density(
    lon_rad: F64Array, lat_rad: F64Array, ra_deg: float, dec_deg: float, ellipse: Ellipse
) -> F64Array:
    """Logarithm of the Kent (FB5) density, up to its constant, at the given points:
    ``kappa (g1 . x - 1) + beta ((g2 . x)**2 - (g3 . x)**2)`` with ``g1`` the centre,
    ``g2`` the major and ``g3`` the minor axis (Kent 1982, J. R. Stat. Soc. B 44,
    71), the elliptical counterpart of the Fisher density. ``kappa = (1/a**2 +
    1/b**2) / 2`` and ``beta = (1/b**2 - 1/a**2) / 4`` (``a >= b`` the 1-sigma
    semi-axes in radians) make it the 2-D Gaussian of those semi-axes near the
    centre; ``2 beta < kappa``, so its only peak is the centre. ``g1 . x - 1`` is
    taken as minus half the squared chord, exact at tiny angles."""
    major, minor, pa = ellipse
    sa, sb = math.radians(major), math.radians(minor)
    kappa = 0.5 * (1.0 / sa**2 + 1.0 / sb**2)
    beta = 0.25 * (1.0 / sb**2 - 1.0 / sa**2)
    g1, g2, g3 = _axes(ra_deg, dec_deg, pa)
    x = _unit(lon_rad, lat_rad)
    half_chord2 = 0.5 * np.sum((x - g1) ** 2, axis=-1)
    out: F64Array = -kappa * half_chord2 + beta * ((x @ g2) ** 2 - (x @ g3) ** 2)
    return out


Ellipse = tuple[float, float, float]
"""(semi-major, semi-minor, position angle of the major axis from north through
east), degrees: a 1-sigma error ellipse."""

MAX_AXIS_RATIO = 20.0
"""A thinner ellipse is mapped with its minor axis widened to major / this: the map
needs ~5000 x major/minor pixels (about 95 000, 1.5 MB, at this ratio), and a
wider map only makes its credible regions larger than the fit's, never smaller."""


def multiorder_pixels(
    ra_deg: float, dec_deg: float, sigma_deg: float, ellipse: Ellipse | None = None
) -> tuple[I64Array, F64Array]:
    """(UNIQ, PROBDENSITY sr^-1) covering the whole sky once, refined around the direction.

    Without ``ellipse`` the Fisher density of 1-sigma radius ``sigma_deg``; with it,
    the Kent density of that ellipse (minor axis at least major / ``MAX_AXIS_RATIO``),
    refined where the Mahalanobis distance is below ``REFINE_SIGMAS``."""
    if not (sigma_deg > 0 and math.isfinite(sigma_deg)):
        raise ValueError(f"error radius {sigma_deg!r} deg must be positive and finite")
    if ellipse is not None:
        major, minor, pa = ellipse
        if not (0 < minor <= major and math.isfinite(major) and math.isfinite(pa)):
            raise ValueError(f"error ellipse {ellipse!r} needs 0 < minor <= major, finite")
        ellipse = (major, max(minor, major / MAX_AXIS_RATIO), pa)
    sigma = math.radians(sigma_deg if ellipse is None else ellipse[1])
    target = 0
    while target < MAX_LEVEL and (
        float(nside_to_pixel_resolution(level_to_nside(target)).to_value("rad"))
        > sigma / PIXELS_PER_SIGMA
    ):
        target += 1
    centre = _unit(np.array(math.radians(ra_deg)), np.array(math.radians(dec_deg)))
    near = _refine_test(ra_deg, dec_deg, sigma_deg, ellipse)
    uniq_parts: list[I64Array] = []
    dens_parts: list[F64Array] = []
    ipix = np.arange(12, dtype=np.int64)
    for level in range(target + 1):
        nside = level_to_nside(level)
        lon, lat = healpix_to_lonlat(ipix, nside, order="nested")
        lon_r = np.asarray(lon.to_value("rad"), dtype=np.float64)
        lat_r = np.asarray(lat.to_value("rad"), dtype=np.float64)
        if level < target:
            res = float(nside_to_pixel_resolution(nside).to_value("rad"))
            split = near(_unit(lon_r, lat_r), centre, res)
        else:
            split = np.zeros(ipix.size, dtype=bool)
        keep = ipix[~split]
        if keep.size:
            uniq_parts.append(np.asarray(level_ipix_to_uniq(level, keep), dtype=np.int64))
            lo, la = lon_r[~split], lat_r[~split]
            if ellipse is None:
                dens_parts.append(fisher_density(lo, la, ra_deg, dec_deg, sigma_deg))
            else:  # relative density; normalised below
                dens_parts.append(np.exp(kent_log_density(lo, la, ra_deg, dec_deg, ellipse)))
        ipix = (ipix[split][:, None] * 4 + np.arange(4, dtype=np.int64)).ravel()
    uniq = np.concatenate(uniq_parts)
    dens = np.concatenate(dens_parts)
    # normalise the pixel sum (pixel-centre sampling is off by <1e-3 at 3 pixels/sigma)
    area = pixel_area_sr(uniq)
    dens = dens / float(np.sum(dens * area))
    return uniq, dens


def _refine_test(
    ra_deg: float, dec_deg: float, sigma_deg: float, ellipse: Ellipse | None
) -> Callable[[F64Array, F64Array, float], BoolArray]:
    """Which pixels (unit vectors ``x``, resolution ``res`` rad) to split: those whose
    centre may lie within ``REFINE_SIGMAS`` of the direction, allowing 1.5 pixel
    resolutions for the pixel's extent (in angle for a circle; in the tangent plane,
    scaled by the minor axis, for an ellipse, on the near hemisphere)."""
    if ellipse is None:
        sigma = math.radians(sigma_deg)

        def circle(x: F64Array, centre: F64Array, res: float) -> BoolArray:
            chord = np.linalg.norm(x - centre, axis=-1)
            ang = 2.0 * np.arcsin(np.clip(chord / 2.0, 0.0, 1.0))
            out: BoolArray = ang < REFINE_SIGMAS * sigma + 1.5 * res
            return out

        return circle
    sa, sb = math.radians(ellipse[0]), math.radians(ellipse[1])
    _, g2, g3 = _axes(ra_deg, dec_deg, ellipse[2])

    def ellipse_near(x: F64Array, centre: F64Array, res: float) -> BoolArray:
        d = np.sqrt((x @ g2) ** 2 / sa**2 + (x @ g3) ** 2 / sb**2)
        out: BoolArray = (x @ centre > 0.0) & (d < REFINE_SIGMAS + 1.5 * res / sb)
        return out

    return ellipse_near


def pixel_area_sr(uniq: I64Array) -> F64Array:
    """Area (sr) of each NUNIQ pixel."""
    level = (np.floor(np.log2(uniq // 4)) // 2).astype(np.int64)
    return np.asarray(nside_to_pixel_area(level_to_nside(level)).to_value("sr"), dtype=np.float64)


def write_skymap(
    path: Path,
    ra_deg: float,
    dec_deg: float,
    sigma_deg: float,
    *,
    object_id: str,
    date_obs: str,
    ellipse: Ellipse | None = None,
) -> Path:
    """Write the multi-order map as FITS (atomically) and return ``path``; with
    ``ellipse``, the map of that 1-sigma error ellipse (:func:`multiorder_pixels`)."""
    uniq, dens = multiorder_pixels(ra_deg, dec_deg, sigma_deg, ellipse)
    cols = [
        fits.Column(name="UNIQ", format="K", array=uniq),
        fits.Column(name="PROBDENSITY", format="D", unit="sr-1", array=dens),
    ]
    hdu = fits.BinTableHDU.from_columns(cols)
    h = hdu.header
    h["PIXTYPE"] = ("HEALPIX", "HEALPix pixelisation")
    h["ORDERING"] = ("NUNIQ", "multi-order: UNIQ = 4*4**level + ipix (NESTED)")
    h["COORDSYS"] = ("C", "celestial (ICRS)")
    h["MOCORDER"] = (int((np.log2(uniq.max() // 4)) // 2), "deepest level")
    h["INDXSCHM"] = ("EXPLICIT", "pixel indices given explicitly")
    h["OBJECT"] = object_id[:68]
    h["DATE-OBS"] = date_obs
    h["RA_FIT"] = (ra_deg, "[deg] fitted right ascension")
    h["DEC_FIT"] = (dec_deg, "[deg] fitted declination")
    h["ERR_FIT"] = (sigma_deg, "[deg] 1-sigma error radius")
    if ellipse is not None:
        h["ERR_MAJ"] = (ellipse[0], "[deg] 1-sigma semi-major axis")
        h["ERR_MIN"] = (ellipse[1], "[deg] 1-sigma semi-minor axis")
        h["ERR_PA"] = (ellipse[2], "[deg] major axis position angle, N through E")
        if ellipse[1] < ellipse[0] / MAX_AXIS_RATIO:
            h["MAP_MIN"] = (ellipse[0] / MAX_AXIS_RATIO, "[deg] minor axis the map uses (widened)")
    h["CREATOR"] = ("tocsin", "program that wrote this file")
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(path.suffix + ".tmp")
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(tmp, overwrite=True)
    tmp.replace(path)
    return path
