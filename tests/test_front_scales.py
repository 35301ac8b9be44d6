"""Front scales wider than every light time from a seed site are neither evaluated
nor counted as trials (engine/front.py, "Scales").

The rule is decided from geometry alone, so the null distribution of what *is*
evaluated is untouched (calibration: tests/test_calibration.py). What must hold is
consistency: a (seed site, scale) is evaluated exactly when it is counted in the
false alarm rate's trial weight. Checked here on an invented compact array
(~3 km across, so light times are at most ~11 us) with the default front scales
1, 10 and 100 us: distances from astropy's WGS84 geodetic-to-geocentric transform,
the P(K >= 3) trial weight from an independent Poisson-binomial convolution.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import EarthLocation

from tocsin.engine.front import FrontSearch
from tocsin.model.config import CoincidenceConfig
from tocsin.model.registry import Site, SiteRegistry
from tocsin.types import C_M_PER_NS

T0 = 1_450_000_080_000_000_000
"""An arbitrary GPS time (ns)."""
C_M_PER_S = 299_792_458.0
"""Speed of light, exact by the SI definition of the metre."""


def compact_array(n: int = 12, seed: int = 4) -> SiteRegistry:
    """``n`` GPS-timed sites scattered over ~3 km x 3 km of an invented valley floor."""
    rng = np.random.default_rng(seed)
    lat0, lon0 = 46.21, 9.02
    dlat = rng.uniform(-0.0135, 0.0135, n)  # ~1.5 km each way
    dlon = rng.uniform(-0.0195, 0.0195, n)
    return SiteRegistry(
        [
            Site(
                id=f"vallone-{k:02d}",
                lat_deg=lat0 + float(dlat[k]),
                lon_deg=lon0 + float(dlon[k]),
                height_m=400.0 + float(rng.uniform(-20, 20)),
                clock_sigma_ns=float(rng.uniform(10, 30)),
                kind="scintillator",
            )
            for k in range(n)
        ]
    )


def astropy_reach_ns(reg: SiteRegistry) -> np.ndarray:
    """Longest light time (ns) from each site to another, positions from astropy."""
    loc = EarthLocation.from_geodetic(
        [s.lon_deg for s in reg.sites] * u.deg,
        [s.lat_deg for s in reg.sites] * u.deg,
        [s.height_m for s in reg.sites] * u.m,
    )
    xyz = np.stack([loc.x.to_value(u.m), loc.y.to_value(u.m), loc.z.to_value(u.m)], axis=1)
    dist = np.linalg.norm(xyz[:, None, :] - xyz[None, :, :], axis=2)
    out: np.ndarray = dist.max(axis=1) / C_M_PER_S * 1e9
    return out


def pb_at_least_3(q: np.ndarray) -> float:
    """P(K >= 3) for independent Bernoulli(q_j), by direct convolution of the pmf."""
    pmf = np.array([1.0])
    for qj in q:
        pmf = np.convolve(pmf, [1.0 - qj, qj])
    return float(pmf[3:].sum())


def test_scales_wider_than_the_reach_are_inactive() -> None:
    reg = compact_array()
    cfg = CoincidenceConfig()
    assert cfg.front_scales_s == [1e-6, 1e-5, 1e-4]
    fs = FrontSearch(reg, cfg)
    reach = astropy_reach_ns(reg)
    # ~3 km: every reach between 1 and 100 us (the test's premise)
    assert reach.min() > 1e3 and reach.max() < 1e5
    np.testing.assert_allclose(fs.reach_ns, reach, atol=1e-3)  # 1 ps
    for k, w in enumerate(cfg.front_scales_s):
        np.testing.assert_array_equal(fs.scale_active[k], w * 1e9 < reach)
    assert fs.scale_active[0].all() and not fs.scale_active[2].any()


def test_trial_weight_counts_only_active_scales() -> None:
    reg = compact_array()
    cfg = CoincidenceConfig()
    fs = FrontSearch(reg, cfg)
    rates_hz = np.linspace(800.0, 2000.0, len(reg))  # busy sites: P(K >= 3) not tiny
    lam = rates_hz * 1e-9
    got = fs.seed_weight(lam)
    n = len(reg)
    for s in range(n):
        want = 0.0
        for w in cfg.front_scales_s:
            if w * 1e9 >= fs.reach_ns[s]:
                continue
            # slot width: light time + clock_sigmas * combined sigma on both sides + W
            q = []
            for j in range(n):
                if j == s:
                    continue
                light = np.linalg.norm(reg.ecef_m[s] - reg.ecef_m[j]) / C_M_PER_NS
                comb = math.hypot(reg.clock_sigma_ns[s], reg.clock_sigma_ns[j])
                width = (
                    math.ceil(light + cfg.clock_sigmas * comb)
                    + round(w * 1e9)
                    + math.ceil(cfg.clock_sigmas * comb)
                )
                q.append(-math.expm1(-lam[j] * width))
            want += pb_at_least_3(np.array(q))
        assert got[s] == pytest.approx(want, rel=1e-9, abs=1e-15), (s, got[s], want)
    # and the widest scale, inactive everywhere, adds nothing: same weight without it
    narrow = FrontSearch(reg, cfg.model_copy(update={"front_scales_s": [1e-6, 1e-5]}))
    np.testing.assert_allclose(narrow.seed_weight(lam), got, rtol=1e-12)


def test_inactive_scales_are_not_evaluated() -> None:
    """An injected front over all sites is found at the active scales, never at 100 us,
    even with every p-value kept (p_max = 1)."""
    reg = compact_array()
    cfg = CoincidenceConfig()
    fs = FrontSearch(reg, cfg)
    n = len(reg)
    rng = np.random.default_rng(8)
    # the zenith: a plane front from straight up reaches every site within ~0.1 us
    up = reg.ecef_m.mean(axis=0)
    up /= np.linalg.norm(up)
    delay = -(reg.ecef_m @ up) / C_M_PER_NS
    t_front = T0 + np.round(delay - delay.min()).astype(np.int64)
    # some background around it
    t_bg = T0 + rng.integers(-2_000_000, 2_000_000, 200)
    s_bg = rng.integers(0, n, 200).astype(np.int32)
    t = np.concatenate([t_front, t_bg])
    site = np.concatenate([np.arange(n, dtype=np.int32), s_bg])
    order = np.argsort(t, kind="stable")
    t, site = t[order], site[order]
    rates = np.full(n, 50.0 * 1e-9)
    res = fs.evaluate(t, site, 0, t.size, rates, p_max=1.0)
    assert [r.scale_index for r in res] == [0, 1, 2]
    assert res[0].seed_idx.size > 0 and int(res[0].multiplicity.max()) == n
    assert res[2].seed_idx.size == 0
