"""Localisation file: a multi-order HEALPix probability map of a fitted arrival direction.

The plane-front fit gives a direction and a 1-sigma error radius ``sigma`` (per
axis, as for a circular 2-D Gaussian). The map is the Fisher (von Mises-Fisher)
density on the sphere with concentration ``kappa = 1/sigma**2`` (sigma in radians),
which is that Gaussian for small sigma: the probability within angle ``r`` is
``1 - exp(-kappa (1 - cos r))``, i.e. the Rayleigh CDF ``1 - exp(-r**2 / (2 sigma**2))``
(Fisher 1953, Proc. R. Soc. A 217, 295).

A fit can be as sharp as 1e-4 deg (GPS-timed sites far apart), which no fixed-
resolution full-sky map holds, so the map is multi-order (``ORDERING = 'NUNIQ'``,
a ``UNIQ`` column of ``4 * 4**level + ipix`` in the NESTED scheme, and a
``PROBDENSITY`` column in sr^-1): fine pixels (resolution <= sigma/3) within 6 sigma of
the direction, coarser pixels elsewhere. Pixels are made with astropy-healpix.
"""

from __future__ import annotations

import math
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

from tocsin.types import F64Array, I64Array

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


def multiorder_pixels(ra_deg: float, dec_deg: float, sigma_deg: float) -> tuple[I64Array, F64Array]:
    """(UNIQ, PROBDENSITY sr^-1) covering the whole sky once, refined around the direction."""
    if not (sigma_deg > 0 and math.isfinite(sigma_deg)):
        raise ValueError(f"error radius {sigma_deg!r} deg must be positive and finite")
    sigma = math.radians(sigma_deg)
    target = 0
    while target < MAX_LEVEL and (
        float(nside_to_pixel_resolution(level_to_nside(target)).to_value("rad"))
        > sigma / PIXELS_PER_SIGMA
    ):
        target += 1
    centre = _unit(np.array(math.radians(ra_deg)), np.array(math.radians(dec_deg)))
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
            chord = np.linalg.norm(_unit(lon_r, lat_r) - centre, axis=-1)
            ang = 2.0 * np.arcsin(np.clip(chord / 2.0, 0.0, 1.0))
            split = ang < REFINE_SIGMAS * sigma + 1.5 * res
        else:
            split = np.zeros(ipix.size, dtype=bool)
        keep = ipix[~split]
        if keep.size:
            uniq_parts.append(np.asarray(level_ipix_to_uniq(level, keep), dtype=np.int64))
            dens_parts.append(
                fisher_density(lon_r[~split], lat_r[~split], ra_deg, dec_deg, sigma_deg)
            )
        ipix = (ipix[split][:, None] * 4 + np.arange(4, dtype=np.int64)).ravel()
    uniq = np.concatenate(uniq_parts)
    dens = np.concatenate(dens_parts)
    # normalise the pixel sum (pixel-centre sampling is off by <1e-3 at 3 pixels/sigma)
    area = pixel_area_sr(uniq)
    dens = dens / float(np.sum(dens * area))
    return uniq, dens


def pixel_area_sr(uniq: I64Array) -> F64Array:
    """Area (sr) of each NUNIQ pixel."""
    level = (np.floor(np.log2(uniq // 4)) // 2).astype(np.int64)
    return np.asarray(nside_to_pixel_area(level_to_nside(level)).to_value("sr"), dtype=np.float64)


def write_skymap(
    path: Path, ra_deg: float, dec_deg: float, sigma_deg: float, *, object_id: str, date_obs: str
) -> Path:
    """Write the multi-order map as FITS (atomically) and return ``path``."""
    uniq, dens = multiorder_pixels(ra_deg, dec_deg, sigma_deg)
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
    h["CREATOR"] = ("tocsin", "program that wrote this file")
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(path.suffix + ".tmp")
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(tmp, overwrite=True)
    tmp.replace(path)
    return path
