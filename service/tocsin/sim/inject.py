"""Injected signals: plane fronts and rate bursts, added on top of the background.

A plane front from the unit ECEF direction ``n`` (towards the source, at the
front's time ``t0`` at the Earth's centre) reaches the site at ECEF position
``r_i`` at ``t_i = t0 - (n . r_i) / c``; the site stamps it with its own clock
error, ``N(0, clock_sigma_ns)``. The source is above a site's horizon when
``n . up_i > sin(min elevation)``, ``up_i`` the local geodetic zenith.

A burst adds Poisson hits at ``boost x rate(t)`` to each chosen site over the
part of ``[at, at + dur)`` where it is live.

Each function returns the extra hit times per site index (GPS ns) and a truth
record (plain JSON types) for the truth file.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from tocsin.engine.sky import local_up_ecef, radec_to_ecef_unit
from tocsin.gpstime import gps_ns_to_utc_iso
from tocsin.sim.background import SiteStream, poisson_hits
from tocsin.sim.injspec import BurstSpec, FrontSpec, InjectionSpec
from tocsin.sim.scenario import GPS_CLOCK_MAX_NS, Scenario
from tocsin.types import C_M_PER_NS, NS_PER_S, I64Array


@dataclass(frozen=True, slots=True)
class Injected:
    """Extra hits per site index (sorted GPS ns) and the truth record of one injection."""

    hits: dict[int, I64Array]
    truth: dict[str, Any]


def inject(
    spec: InjectionSpec,
    scenario: Scenario,
    streams: Sequence[SiteStream],
    rng: np.random.Generator,
) -> Injected:
    """Apply one injection to the (background) ``streams`` of ``scenario``."""
    if isinstance(spec, FrontSpec):
        return inject_front(spec, scenario, streams, rng)
    return inject_burst(spec, scenario, streams, rng)


def _time_ns(scenario: Scenario, at_s: float, text: str) -> int:
    t = scenario.start_ns + round(at_s * NS_PER_S)
    if t >= scenario.end_ns:
        raise ValueError(
            f"injection {text!r}: at={at_s:g} s is past the end of the recording "
            f"({scenario.duration_ns / NS_PER_S:g} s)"
        )
    return t


def inject_front(
    spec: FrontSpec,
    scenario: Scenario,
    streams: Sequence[SiteStream],
    rng: np.random.Generator,
) -> Injected:
    """One hit at each of ``spec.n_sites`` sites on the plane front of ``spec``."""
    reg = scenario.registry
    t0 = _time_ns(scenario, spec.at_s, spec.text)
    n = radec_to_ecef_unit(spec.ra_deg, spec.dec_deg, t0)
    up = np.stack([local_up_ecef(s.lat_deg, s.lon_deg) for s in reg])
    elev_deg = np.degrees(np.arcsin(np.clip(up @ n, -1.0, 1.0)))
    geom_ns = -(reg.ecef_m @ n) / C_M_PER_NS  # arrival after t0 (ns), |.| < 21.3 ms
    jitter_ns = rng.normal(0.0, 1.0, size=len(reg)) * reg.clock_sigma_ns
    t_hit = t0 + np.round(geom_ns + jitter_ns).astype(np.int64)
    live = np.array([streams[i].batch_of(t_hit[i : i + 1])[0] >= 0 for i in range(len(reg))])
    visible = elev_deg > spec.min_elev_deg
    if spec.names is not None:
        chosen = [_site_index(scenario, name, spec.text) for name in spec.names]
        for i in chosen:
            if not visible[i]:
                raise ValueError(
                    f"injection {spec.text!r}: the source is {elev_deg[i]:.1f} deg high at "
                    f"{reg.ids[i]!r}, below minel={spec.min_elev_deg:g}"
                )
            if not live[i]:
                raise ValueError(
                    f"injection {spec.text!r}: site {reg.ids[i]!r} is dead at the front's time"
                )
    else:
        gps = reg.clock_sigma_ns <= GPS_CLOCK_MAX_NS
        ok = np.flatnonzero(gps & visible & live)
        if ok.size < spec.n_sites:
            raise ValueError(
                f"injection {spec.text!r}: only {ok.size} GPS-timed site(s) are live and see "
                f"the source above {spec.min_elev_deg:g} deg "
                f"({', '.join(reg.ids[i] for i in ok) or 'none'}); {spec.n_sites} asked"
            )
        chosen = [int(i) for i in rng.choice(ok, size=spec.n_sites, replace=False)]
    chosen.sort()
    hits = {i: t_hit[i : i + 1].copy() for i in chosen}
    truth: dict[str, Any] = {
        "kind": "front",
        "spec": spec.text,
        "params": {
            "at_s": spec.at_s,
            "ra_deg": spec.ra_deg,
            "dec_deg": spec.dec_deg,
            "sites": spec.n_sites,
            "names": list(spec.names) if spec.names else None,
            "min_elev_deg": spec.min_elev_deg,
        },
        "t0_gps_ns": t0,
        "t0_utc": gps_ns_to_utc_iso(t0),
        "n_ecef": [float(x) for x in n],
        "sites": [reg.ids[i] for i in chosen],
        "hits": [
            {
                "site": reg.ids[i],
                "t_ns": int(t_hit[i]),
                "geometric_delay_ns": float(geom_ns[i]),
                "clock_error_ns": float(jitter_ns[i]),
                "elevation_deg": float(elev_deg[i]),
            }
            for i in chosen
        ],
    }
    return Injected(hits, truth)


def inject_burst(
    spec: BurstSpec,
    scenario: Scenario,
    streams: Sequence[SiteStream],
    rng: np.random.Generator,
) -> Injected:
    """Extra Poisson hits at ``boost x rate`` on ``spec.n_sites`` sites for ``dur_s``."""
    reg = scenario.registry
    ta = _time_ns(scenario, spec.at_s, spec.text)
    tb = ta + round(spec.dur_s * NS_PER_S)
    if tb > scenario.end_ns:
        raise ValueError(
            f"injection {spec.text!r}: the burst ends at {spec.at_s + spec.dur_s:g} s, past "
            f"the end of the recording ({scenario.duration_ns / NS_PER_S:g} s)"
        )
    clipped = [_clip(st, ta, tb) for st in streams]
    live_ns = np.array([int((hi - lo).sum()) for lo, hi in clipped], dtype=np.int64)
    if spec.names is not None:
        chosen = [_site_index(scenario, name, spec.text) for name in spec.names]
        for i in chosen:
            if live_ns[i] == 0:
                raise ValueError(
                    f"injection {spec.text!r}: site {reg.ids[i]!r} is dead for the whole burst"
                )
    else:
        ok = np.flatnonzero(live_ns > 0)
        if ok.size < spec.n_sites:
            raise ValueError(
                f"injection {spec.text!r}: only {ok.size} site(s) are live during the "
                f"burst; {spec.n_sites} asked"
            )
        if spec.pick == "rate":
            rates = np.array([scenario.sims[i].rate_hz for i in ok])
            chosen = [int(i) for i in ok[np.argsort(-rates, kind="stable")[: spec.n_sites]]]
        else:
            chosen = [int(i) for i in rng.choice(ok, size=spec.n_sites, replace=False)]
    chosen.sort()
    hits: dict[int, I64Array] = {}
    per_site: list[dict[str, Any]] = []
    for i in chosen:
        lo, hi = clipped[i]
        rate = spec.boost * scenario.sims[i].rate_at(lo + (hi - lo) // 2, scenario.start_ns)
        hits[i] = poisson_hits(rate, lo, hi, rng)
        per_site.append(
            {
                "site": reg.ids[i],
                "count": int(hits[i].size),
                "expected": float((rate * (hi - lo)).sum() / NS_PER_S),
                "live_s": float(live_ns[i] / NS_PER_S),
            }
        )
    truth: dict[str, Any] = {
        "kind": "burst",
        "spec": spec.text,
        "params": {
            "at_s": spec.at_s,
            "dur_s": spec.dur_s,
            "boost": spec.boost,
            "sites": spec.n_sites,
            "names": list(spec.names) if spec.names else None,
            "pick": spec.pick,
        },
        "t0_gps_ns": ta,
        "t0_utc": gps_ns_to_utc_iso(ta),
        "t1_gps_ns": tb,
        "sites": [reg.ids[i] for i in chosen],
        "hits": per_site,
    }
    return Injected(hits, truth)


def _site_index(scenario: Scenario, name: str, text: str) -> int:
    try:
        return scenario.registry.index(name)
    except KeyError as exc:
        raise ValueError(f"injection {text!r}: {exc.args[0]}") from None


def _clip(stream: SiteStream, ta: int, tb: int) -> tuple[I64Array, I64Array]:
    """The site's live intervals clipped to ``[ta, tb)``, empty ones dropped."""
    lo = np.maximum(stream.live_start, ta)
    hi = np.minimum(stream.live_end, tb)
    keep = hi > lo
    return lo[keep], hi[keep]
