"""The shipped scenario: an invented network of 40 detector sites on five continents.

Every name is invented; the places are plausible (farmland, coasts, hills, a
high desert plateau, cities for the phone-camera devices). Three kinds of site:

* 16 GPS-timed scintillator stations (clock sigma 20-100 ns, 0.15-1 m², 6-38 Hz),
  eight of them in a central-European cluster (baselines ~300-1300 km) and the
  rest on other continents;
* 16 counters timed by NTP over the internet (clock sigma 1-9 ms, 50-200 cm²,
  0.7-3 Hz, kind ``"counter"``);
* 8 camera-sensor devices in phones (clock sigma 60-300 ms, 2-6 hits per hour).

Rates: a bare horizontal detector sees about 1 muon per cm² per minute at sea
level (Particle Data Group, Review of Particle Physics, "Cosmic rays"; from
memory), i.e. ~167 Hz/m². The scintillator stations here count a two-layer
coincidence above a threshold, which keeps roughly a quarter of that (an
invented, plausible efficiency), more at the high sites; the small counters count
single layers, close to the full flux. These base rates are simulation
parameters, not registry fields: they live in :data:`SHIPPED_RATES_HZ`, and
``replay_data/network.toml`` is :func:`shipped_registry` written out with
:meth:`SiteRegistry.to_toml`.
"""

from __future__ import annotations

from typing import Final

from tocsin.model.registry import Site, SiteRegistry

_PER_HOUR: Final = 1.0 / 3600.0
_CAM: Final = "camera-sensor"
_CAM_M2: Final = 2.4e-5
"""A phone camera sensor of about 6 mm x 4 mm (common practice, from memory)."""

# id, lat_deg, lon_deg, height_m, clock_sigma_ns, area_m2, kind, base rate (Hz)
_TABLE: Final[tuple[tuple[str, float, float, float, float, float, str, float], ...]] = (
    # GPS-timed scintillator stations: central-European cluster
    ("hollow-creek-2", 46.12, 7.44, 1320.0, 60.0, 0.25, "scintillator", 11.0),
    ("kestrel-ridge", 48.35, 11.90, 520.0, 35.0, 0.5, "scintillator", 19.5),
    ("saltmarsh-obs", 53.41, 8.62, 42.0, 25.0, 1.0, "scintillator", 36.0),
    ("birchwood-lab", 52.08, 16.84, 130.0, 80.0, 0.2, "scintillator", 8.2),
    ("vine-terrace", 45.21, 4.93, 260.0, 45.0, 0.4, "scintillator", 15.0),
    ("lindenhof-3", 49.62, 15.21, 510.0, 50.0, 0.3, "scintillator", 12.0),
    ("marten-hill", 47.53, 19.62, 230.0, 70.0, 0.15, "scintillator", 6.1),
    ("dune-station", 52.63, 4.71, 47.0, 30.0, 0.8, "scintillator", 29.0),
    # GPS-timed scintillator stations elsewhere
    ("ironbark-flat", -31.94, 141.47, 320.0, 40.0, 0.6, "scintillator", 22.0),
    ("tussock-plain", -43.58, 171.21, 300.0, 55.0, 0.35, "scintillator", 13.0),
    ("condor-pass", -23.71, -67.83, 4150.0, 20.0, 0.5, "scintillator", 38.0),
    ("prairie-mill", 41.23, -98.42, 610.0, 30.0, 0.7, "scintillator", 25.0),
    ("cedar-bluff", 45.37, -75.12, 95.0, 65.0, 0.25, "scintillator", 9.5),
    ("acacia-camp", -2.11, 36.93, 1560.0, 90.0, 0.2, "scintillator", 8.8),
    ("karoo-well", -32.27, 22.58, 1050.0, 45.0, 0.45, "scintillator", 17.5),
    ("pine-hollow", 36.18, 138.24, 1120.0, 25.0, 0.9, "scintillator", 33.0),
    # NTP-timed counters
    ("quarry-lane", 51.48, -2.61, 60.0, 4.0e6, 0.01, "counter", 1.6),
    ("harbour-view-school", 57.62, 11.88, 30.0, 2.5e6, 0.015, "counter", 2.4),
    ("mossy-gate", 60.35, 5.45, 80.0, 6.0e6, 0.008, "counter", 1.2),
    ("orchard-5", 44.48, 11.30, 90.0, 1.5e6, 0.012, "counter", 1.9),
    ("olive-grove-7", 37.62, 22.73, 140.0, 8.0e6, 0.006, "counter", 0.9),
    ("tern-point", 38.70, -9.42, 40.0, 3.0e6, 0.01, "counter", 1.5),
    ("fjord-end", 64.05, -21.95, 60.0, 9.0e6, 0.005, "counter", 0.7),
    ("baobab-yard", -12.97, 28.63, 1250.0, 7.0e6, 0.01, "counter", 1.8),
    ("sandpiper-bay", -34.05, 18.80, 70.0, 5.0e6, 0.02, "counter", 3.0),
    ("teahouse-ridge", 26.90, 88.00, 1900.0, 6.0e6, 0.01, "counter", 2.1),
    ("lantern-street", 22.40, 114.10, 50.0, 3.5e6, 0.008, "counter", 1.3),
    ("monsoon-terrace", 13.35, 77.20, 900.0, 9.0e6, 0.012, "counter", 2.0),
    ("reef-flat", -19.30, 146.75, 20.0, 2.0e6, 0.01, "counter", 1.6),
    ("glacier-foot", -50.34, -72.26, 230.0, 8.5e6, 0.006, "counter", 1.0),
    ("cactus-mesa", 32.40, -110.70, 900.0, 1.2e6, 0.015, "counter", 2.6),
    ("willow-bend", 42.95, -89.55, 290.0, 4.5e6, 0.01, "counter", 1.6),
    # camera-sensor devices (phones, unsynchronised clocks)
    ("attic-cam-1", 48.80, 2.25, 90.0, 1.2e8, _CAM_M2, _CAM, 4.0 * _PER_HOUR),
    ("balcony-lens", 40.45, -3.75, 660.0, 2.0e8, _CAM_M2, _CAM, 3.0 * _PER_HOUR),
    ("rooftop-pixel", -23.60, -46.70, 780.0, 8.0e7, _CAM_M2, _CAM, 5.0 * _PER_HOUR),
    ("kitchen-sensor-4", 6.55, 3.35, 40.0, 3.0e8, _CAM_M2, _CAM, 2.0 * _PER_HOUR),
    ("dorm-cam-12", 35.70, 139.55, 60.0, 1.5e8, _CAM_M2, _CAM, 6.0 * _PER_HOUR),
    ("studio-pixel", -37.85, 145.05, 70.0, 6.0e7, _CAM_M2, _CAM, 4.5 * _PER_HOUR),
    ("porch-lens-3", 19.40, -99.20, 2300.0, 2.5e8, _CAM_M2, _CAM, 5.5 * _PER_HOUR),
    ("garage-cam-9", 30.00, 31.20, 60.0, 1.0e8, _CAM_M2, _CAM, 2.5 * _PER_HOUR),
)

SHIPPED_SITES: Final[tuple[Site, ...]] = tuple(
    Site(
        id=sid,
        lat_deg=lat,
        lon_deg=lon,
        height_m=h,
        clock_sigma_ns=sigma,
        area_m2=area,
        kind=kind,
    )
    for sid, lat, lon, h, sigma, area, kind, _ in _TABLE
)
"""The 40 sites of the shipped scenario, in registry order."""

SHIPPED_RATES_HZ: Final[dict[str, float]] = {row[0]: row[7] for row in _TABLE}
"""Base hit rate (Hz) of each shipped site, before the slow drift."""


def shipped_registry() -> SiteRegistry:
    """The shipped scenario's registry (what ``replay_data/network.toml`` holds)."""
    return SiteRegistry(SHIPPED_SITES)


def shipped_rate_hz(site: Site) -> float | None:
    """The shipped base rate (Hz) of ``site``, or None unless it is a shipped site unchanged.

    A registry entry that shares a shipped id but differs in any field (area,
    clock, place) is treated as a different detector and gets derived parameters.
    """
    for s in SHIPPED_SITES:
        if s.id == site.id:
            return SHIPPED_RATES_HZ[s.id] if s == site else None
    return None
