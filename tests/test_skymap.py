"""Localisation map: normalised, peaked at the fit, and spread as the Fisher distribution.

Source: Fisher (1953), Proc. R. Soc. A 217, 295: P(theta < r) =
(1 - exp(-kappa (1 - cos r))) / (1 - exp(-2 kappa)); for small sigma this is the
Rayleigh CDF, checked against scipy.stats.rayleigh. Pixel geometry from astropy-healpix;
separations from astropy.coordinates.
"""

from __future__ import annotations

import math
from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy_healpix import healpix_to_lonlat, level_to_nside, uniq_to_level_ipix
from scipy import stats

from tocsin.alerts.skymap import MAX_AXIS_RATIO, pixel_area_sr, write_skymap


def _centres(uniq: np.ndarray) -> SkyCoord:
    level, ipix = uniq_to_level_ipix(uniq)
    lon = np.empty(uniq.size)
    lat = np.empty(uniq.size)
    for lv in np.unique(level):
        m = level == lv
        lo, la = healpix_to_lonlat(ipix[m], level_to_nside(int(lv)), order="nested")
        lon[m], lat[m] = lo.rad, la.rad
    return SkyCoord(lon * u.rad, lat * u.rad)


@pytest.mark.parametrize("sigma", [8e-5, 0.7, 12.0])
def test_map_matches_fisher_distribution(tmp_path: Path, sigma: float) -> None:
    ra, dec = 150.0, 35.0
    path = write_skymap(tmp_path / "m.fits", ra, dec, sigma, object_id="x", date_obs="t")
    with fits.open(path) as hdul:
        h = hdul[1].header
        assert (h["ORDERING"], h["COORDSYS"]) == ("NUNIQ", "C")
        uniq = np.asarray(hdul[1].data["UNIQ"], dtype=np.int64)
        dens = np.asarray(hdul[1].data["PROBDENSITY"], dtype=np.float64)
    area = pixel_area_sr(uniq)
    assert float(np.sum(area)) == pytest.approx(4 * math.pi, rel=1e-9)  # whole sky once
    prob = dens * area
    assert float(prob.sum()) == pytest.approx(1.0, rel=1e-9)
    sep = _centres(uniq).separation(SkyCoord(ra * u.deg, dec * u.deg)).deg
    assert sep[np.argmax(dens)] < sigma  # peak at the fitted direction
    kappa = 1 / math.radians(sigma) ** 2
    for k in (1.0, 2.0):
        r = math.radians(k * sigma)
        fisher = -math.expm1(-kappa * (1 - math.cos(r))) / -math.expm1(-2 * kappa)
        inside = float(prob[sep < k * sigma].sum())
        # pixel-centre counting: edge pixels go wholly in or out (tolerance: common practice)
        assert inside == pytest.approx(fisher, abs=0.02)
        if sigma < 1:
            assert fisher == pytest.approx(float(stats.rayleigh.cdf(k)), abs=1e-4)


@pytest.mark.parametrize(
    ("major", "minor", "pa"), [(3e-4, 1e-4, 30.0), (0.6, 0.15, 120.0), (2.0, 1.9, 75.0)]
)
def test_elliptical_map_holds_the_ellipses_probability(
    tmp_path: Path, major: float, minor: float, pa: float
) -> None:
    """Within the 1-sigma ellipse scaled by k lies a chi-square(2 dof) probability,
    1 - exp(-k**2/2) (scipy.stats.chi2), for small ellipses; offsets of the pixel
    centres from astropy's SkyCoord.spherical_offsets_to (east, north), turned to the
    major axis at position angle ``pa`` (north through east)."""
    ra, dec = 210.0, -20.0
    path = write_skymap(
        tmp_path / "e.fits",
        ra,
        dec,
        math.sqrt(major * minor),
        object_id="x",
        date_obs="t",
        ellipse=(major, minor, pa),
    )
    with fits.open(path) as hdul:
        h = hdul[1].header
        assert (h["ERR_MAJ"], h["ERR_MIN"], h["ERR_PA"]) == (major, minor, pa)
        assert "MAP_MIN" not in h
        uniq = np.asarray(hdul[1].data["UNIQ"], dtype=np.int64)
        dens = np.asarray(hdul[1].data["PROBDENSITY"], dtype=np.float64)
    area = pixel_area_sr(uniq)
    assert float(np.sum(area)) == pytest.approx(4 * math.pi, rel=1e-9)
    prob = dens * area
    assert float(prob.sum()) == pytest.approx(1.0, rel=1e-9)
    centre = SkyCoord(ra * u.deg, dec * u.deg)
    east, north = centre.spherical_offsets_to(_centres(uniq))
    p = math.radians(pa)
    along = north.deg * math.cos(p) + east.deg * math.sin(p)
    across = -north.deg * math.sin(p) + east.deg * math.cos(p)
    d2 = (along / major) ** 2 + (across / minor) ** 2
    for k in (1.0, 2.0):
        inside = float(prob[d2 < k * k].sum())
        # pixel-centre counting: edge pixels go wholly in or out (common practice)
        assert inside == pytest.approx(float(stats.chi2.cdf(k * k, 2)), abs=0.02)
    # the same probability in a circle of the geometric-mean radius is less along
    # the major axis: the ellipse is what the map follows
    circle = float(prob[(along**2 + across**2) < major * minor].sum())
    if major > 2 * minor:
        assert circle < float(stats.chi2.cdf(1.0, 2)) - 0.03


def test_a_very_thin_ellipse_is_mapped_widened(tmp_path: Path) -> None:
    """Minor axes below major / MAX_AXIS_RATIO are widened: a bounded map (about
    5000 pixels per unit of axis ratio), still normalised, peaked at the fit."""
    major, minor = 1.0, 1e-4
    path = write_skymap(
        tmp_path / "t.fits",
        10.0,
        5.0,
        0.01,
        object_id="x",
        date_obs="t",
        ellipse=(major, minor, 0.0),
    )
    with fits.open(path) as hdul:
        assert hdul[1].header["MAP_MIN"] == major / MAX_AXIS_RATIO  # said in the header
        uniq = np.asarray(hdul[1].data["UNIQ"], dtype=np.int64)
        dens = np.asarray(hdul[1].data["PROBDENSITY"], dtype=np.float64)
    assert uniq.size < 120_000
    assert float(np.sum(dens * pixel_area_sr(uniq))) == pytest.approx(1.0, rel=1e-9)
    sep = _centres(uniq).separation(SkyCoord(10.0 * u.deg, 5.0 * u.deg)).deg
    assert sep[np.argmax(dens)] < major / MAX_AXIS_RATIO
    with pytest.raises(ValueError, match="minor <= major"):
        write_skymap(
            tmp_path / "bad.fits",
            10.0,
            5.0,
            0.01,
            object_id="x",
            date_obs="t",
            ellipse=(0.1, 0.2, 0.0),
        )
