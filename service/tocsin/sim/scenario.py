"""Scenario description: per-site simulation parameters that the registry does not hold.

The site registry (contract §2) fixes only place, clock and area. A simulation
also needs, for every site, a :class:`SiteSim`:

* ``rate_hz`` — base hit rate (Hz). Shipped sites take it from
  :data:`tocsin.sim.network.SHIPPED_RATES_HZ`; any other site gets it from its
  kind and area: camera sensors :data:`CAMERA_RATE_HZ` (4 per hour), every other
  kind ``area_m2 x 1e4 cm²/m² x 1/60 s`` — about 1 muon per cm² per minute at sea
  level (Particle Data Group, Review of Particle Physics, "Cosmic rays"; from
  memory) — and :data:`DEFAULT_RATE_HZ` when the area is unknown.
* slow drift — the rate at GPS time ``t`` is
  ``rate_hz * (1 + a1 sin(2 pi t/P1 + f1) + a2 sin(2 pi t/P2 + f2) + k (t - start)/1 h)``
  with ``a1`` in [1 %, 3 %], ``a2`` in [0, 1.5 %], periods 6-24 h and a trend ``k``
  of at most ±0.2 % per hour: at most ~4 % per hour in all;
* dead time — outages arrive as a Poisson process (``outages_per_day``), each
  lasting a log-normal time (``outage_median_s``, shape ``outage_sigma``, clipped
  to [``outage_min_s``, ``outage_max_s``]);
* batching — batches of ``batch_s`` seconds, their edges at a per-site phase;
* arrival delay — ``recv_ns - live_end`` is log-normal (``delay_median_s``,
  shape ``delay_sigma``), capped so that ``recv_ns - live_start`` stays below the
  engine's default lateness allowance; a fraction ``late_fraction`` of batches
  (a scenario-wide setting) is delayed past it on purpose.

Every random choice above is drawn from a generator seeded with the scenario seed
and a hash of the site id, so the same registry and seed give the same scenario,
and adding a site does not change the others. Sites fall into three timing
classes by clock sigma: ``gps`` (at most :data:`GPS_CLOCK_MAX_NS`), ``ntp`` (at most
:data:`NTP_CLOCK_MAX_NS`) and ``unsynced``; dead time and delays follow the class.

Camera-sensor devices batch by 1 s like the others: the engine counts lateness
from the *start* of a batch's live interval (``EngineConfig.lateness_s``), so a
10-60 s batch would always arrive late.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Final, Literal

import numpy as np

from tocsin.model.config import EngineConfig
from tocsin.model.registry import Site, SiteRegistry
from tocsin.sim.network import shipped_rate_hz
from tocsin.types import NS_PER_S, F64Array, GpsNs, I64Array

TimingClass = Literal["gps", "ntp", "unsynced"]

GPS_CLOCK_MAX_NS: Final = 1e4
"""Sites with a clock sigma up to this (ns) are GPS-timed (as the engine's front fits)."""
NTP_CLOCK_MAX_NS: Final = 3e7
"""Sites with a clock sigma up to this (ns) and above the GPS limit are NTP-timed."""
MUON_FLUX_HZ_PER_M2: Final = 1e4 / 60.0
"""~1 muon per cm² per minute at sea level (PDG "Cosmic rays", from memory), in Hz/m²."""
CAMERA_RATE_HZ: Final = 4.0 / 3600.0
"""A phone camera sensor sees a few hits per hour (common practice, from memory)."""
DEFAULT_RATE_HZ: Final = 1.0
"""Rate given to a non-camera site whose registry entry has no area."""
LATENESS_S: Final = EngineConfig().lateness_s
"""The engine's default lateness allowance (s), counted from a batch's live start."""
DEFAULT_LATE_FRACTION: Final = 1e-4
"""Default fraction of batches delayed past :data:`LATENESS_S`."""
LATENESS_MARGIN_S: Final = 0.2
"""On-time batches arrive at least this long (s) before the lateness allowance runs out."""
MIN_DELAY_S: Final = 0.002
"""Shortest arrival delay (s) after a batch's live end."""

# Stream tags of the per-site random generators (never reorder: they fix the output).
TAG_PARAMS: Final = 0
TAG_BACKGROUND: Final = 1
TAG_ARRIVAL: Final = 2
TAG_INJECT: Final = 3


@dataclass(frozen=True, slots=True)
class SiteSim:
    """Simulation parameters of one site. Rates in Hz, times in seconds, phases in radians."""

    site_id: str
    timing: TimingClass
    rate_hz: float
    drift_amp: tuple[float, float]
    """Fractional amplitudes of the two sinusoids of the rate."""
    drift_period_s: tuple[float, float]
    drift_phase_rad: tuple[float, float]
    trend_per_h: float
    """Fractional change of the rate per hour after the scenario start."""
    batch_s: float
    batch_phase_s: float
    """Batch edges fall at GPS times ``batch_phase_s + k * batch_s`` (s)."""
    outages_per_day: float
    outage_median_s: float
    outage_sigma: float
    outage_min_s: float
    outage_max_s: float
    delay_median_s: float
    delay_sigma: float

    def __post_init__(self) -> None:
        if not self.rate_hz >= 0.0:
            raise ValueError(f"site {self.site_id!r}: rate_hz={self.rate_hz} must be >= 0")
        if not 0.0 < self.batch_s <= 3600.0:
            raise ValueError(f"site {self.site_id!r}: batch_s={self.batch_s} not in (0, 3600]")
        if self.outages_per_day < 0.0:
            raise ValueError(
                f"site {self.site_id!r}: outages_per_day={self.outages_per_day} must be >= 0"
            )
        if not 0.0 < self.outage_min_s <= self.outage_max_s:
            raise ValueError(
                f"site {self.site_id!r}: outage limits [{self.outage_min_s}, "
                f"{self.outage_max_s}] s are not increasing and positive"
            )
        if self.delay_median_s <= 0.0:
            raise ValueError(
                f"site {self.site_id!r}: delay_median_s={self.delay_median_s} must be > 0"
            )

    def rate_at(self, t_ns: I64Array, start_ns: GpsNs) -> F64Array:
        """Rate (Hz) at GPS times ``t_ns``; the trend counts hours from ``start_ns``."""
        t_s = np.asarray(t_ns, dtype=np.int64) / NS_PER_S  # phase only: float s is fine
        f = np.ones(t_s.shape)
        for a, p, ph in zip(self.drift_amp, self.drift_period_s, self.drift_phase_rad, strict=True):
            f += a * np.sin(2.0 * np.pi * (t_s / p) + ph)
        f += self.trend_per_h * (np.asarray(t_ns, dtype=np.int64) - start_ns) / (3600.0 * NS_PER_S)
        out: F64Array = self.rate_hz * np.clip(f, 0.0, None)
        return out


@dataclass(frozen=True, slots=True)
class Scenario:
    """A registry, one :class:`SiteSim` per site (same order) and the time span (GPS ns)."""

    registry: SiteRegistry
    sims: tuple[SiteSim, ...]
    seed: int
    start_ns: GpsNs
    duration_ns: int
    late_fraction: float = DEFAULT_LATE_FRACTION
    lateness_ns: int = round(LATENESS_S * NS_PER_S)

    def __post_init__(self) -> None:
        if len(self.sims) != len(self.registry):
            raise ValueError(f"{len(self.sims)} site parameter sets for {len(self.registry)} sites")
        for sim, sid in zip(self.sims, self.registry.ids, strict=True):
            if sim.site_id != sid:
                raise ValueError(f"parameters of {sim.site_id!r} stand in the place of {sid!r}")
        if not 0 <= self.seed < 2**63:
            raise ValueError(f"seed {self.seed} is not in [0, 2**63)")
        if self.start_ns < 0 or self.duration_ns <= 0:
            raise ValueError(
                f"start {self.start_ns} ns and duration {self.duration_ns} ns must be "
                "non-negative and positive"
            )
        if not 0.0 <= self.late_fraction <= 0.5:
            raise ValueError(f"late fraction {self.late_fraction} is not in [0, 0.5]")

    @property
    def end_ns(self) -> GpsNs:
        return self.start_ns + self.duration_ns

    def rng(self, site_id: str, tag: int) -> np.random.Generator:
        """The generator of stream ``tag`` of ``site_id`` (independent of other sites)."""
        return site_rng(self.seed, site_id, tag)


def site_key(site_id: str) -> int:
    """A stable 64-bit integer from a site id (BLAKE2b), used to seed its streams."""
    return int.from_bytes(hashlib.blake2b(site_id.encode(), digest_size=8).digest(), "little")


def site_rng(seed: int, site_id: str, tag: int) -> np.random.Generator:
    """Generator seeded by (seed, site id, stream tag)."""
    return np.random.default_rng(np.random.SeedSequence([seed, site_key(site_id), tag]))


def timing_class(site: Site) -> TimingClass:
    """``gps``, ``ntp`` or ``unsynced``, by the site's clock sigma."""
    if site.clock_sigma_ns <= GPS_CLOCK_MAX_NS:
        return "gps"
    if site.clock_sigma_ns <= NTP_CLOCK_MAX_NS:
        return "ntp"
    return "unsynced"


def derived_rate_hz(site: Site) -> float:
    """Base rate (Hz) of a site that is not in the shipped scenario (see module doc)."""
    if "camera" in site.kind.lower():
        return CAMERA_RATE_HZ
    if site.area_m2 is None:
        return DEFAULT_RATE_HZ
    return site.area_m2 * MUON_FLUX_HZ_PER_M2


def derive_site_sim(site: Site, seed: int, *, rate_hz: float | None = None) -> SiteSim:
    """Parameters of ``site`` drawn from (seed, site id); ``rate_hz`` overrides the base rate."""
    rng = site_rng(seed, site.id, TAG_PARAMS)
    timing = timing_class(site)
    if rate_hz is None:
        shipped = shipped_rate_hz(site)
        rate_hz = derived_rate_hz(site) if shipped is None else shipped
    a1 = float(rng.uniform(0.01, 0.03))
    a2 = float(rng.uniform(0.0, 0.015))
    periods = rng.uniform(6.0, 24.0, size=2) * 3600.0
    phases = rng.uniform(0.0, 2.0 * np.pi, size=2)
    trend = float(rng.uniform(-0.002, 0.002))
    batch_s = 1.0
    batch_phase = float(rng.uniform(0.0, batch_s))
    if timing == "gps":
        outages = float(rng.uniform(1.0, 4.0))
        o_med, o_sig, o_min, o_max = 90.0, 1.4, 2.0, 3600.0
        d_med, d_sig = float(rng.uniform(0.04, 0.09)), 0.6
    elif timing == "ntp":
        outages = float(rng.uniform(2.0, 6.0))
        o_med, o_sig, o_min, o_max = 90.0, 1.4, 2.0, 3600.0
        d_med, d_sig = float(rng.uniform(0.10, 0.30)), 0.7
    else:  # phones: off for long stretches (charging, in use), slower uplinks
        outages = float(rng.uniform(1.0, 3.0))
        o_med, o_sig, o_min, o_max = 1800.0, 0.8, 60.0, 6 * 3600.0
        d_med, d_sig = float(rng.uniform(0.3, 0.7)), 0.5
    return SiteSim(
        site_id=site.id,
        timing=timing,
        rate_hz=float(rate_hz),
        drift_amp=(a1, a2),
        drift_period_s=(float(periods[0]), float(periods[1])),
        drift_phase_rad=(float(phases[0]), float(phases[1])),
        trend_per_h=trend,
        batch_s=batch_s,
        batch_phase_s=batch_phase,
        outages_per_day=outages,
        outage_median_s=o_med,
        outage_sigma=o_sig,
        outage_min_s=o_min,
        outage_max_s=o_max,
        delay_median_s=d_med,
        delay_sigma=d_sig,
    )


def build_scenario(
    registry: SiteRegistry,
    *,
    seed: int,
    start_ns: GpsNs,
    duration_ns: int,
    late_fraction: float = DEFAULT_LATE_FRACTION,
    rates_hz: Mapping[str, float] | None = None,
) -> Scenario:
    """A :class:`Scenario` of every registry site; ``rates_hz`` overrides base rates by id."""
    overrides = dict(rates_hz or {})
    unknown = sorted(set(overrides) - set(registry.ids))
    if unknown:
        raise ValueError(f"rates given for site(s) {unknown} not in the registry")
    sims = tuple(derive_site_sim(s, seed, rate_hz=overrides.get(s.id)) for s in registry)
    return Scenario(
        registry=registry,
        sims=sims,
        seed=seed,
        start_ns=start_ns,
        duration_ns=duration_ns,
        late_fraction=late_fraction,
    )
