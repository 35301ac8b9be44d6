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

from tocsin.alerts.skymap import pixel_area_sr, write_skymap


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
