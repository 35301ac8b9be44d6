"""Efficiency by injection: simulated signals added to a recording, and whether they came back.

Two kinds of signal, made by the simulator's own injection code
(:mod:`tocsin.sim.inject`):

* **plane fronts** from isotropic random directions, one hit at each of
  ``n`` GPS-timed sites that are live and see the source above 10 deg, stamped
  with their clock error; the class is the multiplicity ``n``;
* **bursts** spread in time: extra Poisson hits at ``boost x`` each chosen
  site's mean rate (measured from the recording) for ``dur`` seconds; the class
  is the strength ``boost``.

Injections of one set are spaced so that no window of the engine holds two of
them (fronts: twice the longest coincidence slot; bursts: the burst plus
1.1 x the longest excess window), start after the rate estimate's warm-up, and are
placed at a random phase so that they do not line up with the excess grid.

A front is *found* at threshold F if a coincidence candidate with
``far_per_year <= F`` contains at least two of its injected hit times (exact ns);
a burst if an excess candidate with ``far_per_year <= F`` overlaps it in time
(a per-site one only on a site of the burst).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from tocsin.sim.background import SiteStream
from tocsin.sim.inject import inject_burst, inject_front
from tocsin.sim.injspec import BurstSpec, FrontSpec
from tocsin.sim.scenario import GPS_CLOCK_MAX_NS, Scenario, derive_site_sim
from tocsin.tune.recorded import RecordedNetwork
from tocsin.types import NS_PER_S, I64Array

MAX_DIRECTION_DRAWS = 200
"""Random directions tried for one front before it is counted as not injectable."""


@dataclass(frozen=True, slots=True)
class InjectionSettings:
    """What to inject: front multiplicities, burst strengths, and how many of each."""

    front_sites: tuple[int, ...] = (3, 4, 5, 6, 8)
    fronts_per_class: int = 20
    burst_boosts: tuple[float, ...] = (0.003, 0.01, 0.03, 0.1, 0.3, 1.0)
    bursts_per_class: int = 10
    burst_sites: int = 10
    burst_dur_s: float = 30.0

    def __post_init__(self) -> None:
        if any(n < 2 for n in self.front_sites):
            raise ValueError(f"front multiplicities {self.front_sites} must each be >= 2")
        if any(not b > 0 for b in self.burst_boosts):
            raise ValueError(f"burst strengths {self.burst_boosts} must each be > 0")
        if self.fronts_per_class < 0 or self.bursts_per_class < 0:
            raise ValueError("injections per class must be >= 0")
        if self.burst_sites < 1 or not self.burst_dur_s > 0:
            raise ValueError(
                f"burst sites {self.burst_sites} must be >= 1 and duration {self.burst_dur_s} s > 0"
            )


@dataclass(frozen=True, slots=True)
class PlannedInjection:
    """One signal to inject: kind, class value, time (s after the recording's start)."""

    kind: str  # "front" | "burst"
    value: float
    """Multiplicity (front) or strength (burst)."""
    at_s: float
    seed: int


@dataclass(frozen=True, slots=True)
class InjectionSetPlan:
    """Injections replayed together in one run of the engine."""

    index: int
    items: tuple[PlannedInjection, ...]


@dataclass(frozen=True, slots=True)
class Outcome:
    """What became of one injection: ``best_far`` is the lowest FAR (per year) of a
    candidate that found it (``inf`` when none did; NaN when it could not be injected)."""

    kind: str
    value: float
    at_s: float
    best_far: float
    sites: tuple[str, ...]
    detail: dict[str, Any]


def plan_injections(
    net: RecordedNetwork,
    settings: InjectionSettings,
    *,
    warmup_s: float,
    coincidence_window_s: float,
    excess_window_s: float,
    seed: int,
) -> list[InjectionSetPlan]:
    """Spread every requested injection over as few replays of the recording as fit."""
    span_s = (net.end_ns - net.start_ns) / NS_PER_S
    rng = np.random.default_rng(np.random.SeedSequence([seed, 0x1A7]))
    sets: list[InjectionSetPlan] = []
    kinds = (
        (
            "front",
            [float(n) for n in settings.front_sites],
            settings.fronts_per_class,
            max(2.0 * coincidence_window_s, 10.0),
            0.0,
        ),
        (
            "burst",
            list(settings.burst_boosts),
            settings.bursts_per_class,
            settings.burst_dur_s + 1.1 * max(excess_window_s, coincidence_window_s),
            settings.burst_dur_s,
        ),
    )
    for kind, values, per_class, spacing, dur in kinds:
        todo = [v for _ in range(per_class) for v in values]
        if not todo:
            continue
        first = warmup_s + spacing / 2
        last = span_s - spacing / 2 - dur
        slots = int((last - first) // spacing) + 1 if last > first else 0
        if slots < 1:
            raise ValueError(
                f"recording of {span_s:g} s is too short to inject a {kind} "
                f"({spacing:g} s apart after {warmup_s:g} s of warm-up)"
            )
        order = rng.permutation(len(todo))
        todo = [todo[k] for k in order]
        for c in range(0, len(todo), slots):
            chunk = todo[c : c + slots]
            items = tuple(
                PlannedInjection(
                    kind,
                    v,
                    float(first + k * spacing + rng.uniform(0.0, spacing / 4)),
                    int(rng.integers(0, 2**62)),
                )
                for k, v in enumerate(chunk)
            )
            sets.append(InjectionSetPlan(len(sets), items))
    return sets


def injection_scenario(net: RecordedNetwork, seed: int) -> tuple[Scenario, list[SiteStream]]:
    """The recording seen as the simulator's scenario: each site at its measured mean
    rate (no drift), its accepted batches as live time."""
    reg = net.registry
    rates = net.mean_rates_hz()
    sims = tuple(
        dataclasses.replace(
            derive_site_sim(s, seed, rate_hz=r), drift_amp=(0.0, 0.0), trend_per_h=0.0
        )
        for s, r in zip(reg, rates, strict=True)
    )
    start = net.start_ns
    sc = Scenario(reg, sims, seed, start, net.end_ns - start, late_fraction=0.0)
    streams = []
    for i, s in enumerate(net.sites):
        a, b = s.merged()
        gap_lo, gap_hi = b[:-1], a[1:]
        streams.append(SiteStream(i, s.start, s.end, s.t, gap_lo, gap_hi))
    return sc, streams


def apply_injections(
    net: RecordedNetwork,
    plan: InjectionSetPlan,
    settings: InjectionSettings,
) -> tuple[list[I64Array], list[dict[str, Any]]]:
    """Per-site hits with the set's signals added, and one truth record per injection
    (``injected: False`` for one that found no suitable sites)."""
    sc, streams = injection_scenario(net, seed=plan.items[0].seed if plan.items else 0)
    extra: list[list[I64Array]] = [[] for _ in net.sites]
    truths: list[dict[str, Any]] = []
    n_gps = int(np.sum(net.registry.clock_sigma_ns <= GPS_CLOCK_MAX_NS))
    for item in plan.items:
        rng = np.random.default_rng(item.seed)
        truth: dict[str, Any] | None = None
        if item.kind == "front":
            n = int(item.value)
            if n <= n_gps:
                for _ in range(MAX_DIRECTION_DRAWS):
                    ra = float(rng.uniform(0.0, 360.0))
                    dec = float(np.degrees(np.arcsin(rng.uniform(-1.0, 1.0))))
                    spec = FrontSpec(
                        f"front:at={item.at_s:.3f},ra={ra:.4f},dec={dec:.4f},sites={n}",
                        item.at_s,
                        ra,
                        dec,
                        n_sites=n,
                    )
                    try:
                        done = inject_front(spec, sc, streams, rng)
                    except ValueError:
                        continue
                    truth = done.truth
                    break
        else:
            n_live = min(settings.burst_sites, len(net.sites))
            spec_b = BurstSpec(
                f"burst:at={item.at_s:.3f},dur={settings.burst_dur_s:g},boost={item.value:g},"
                f"sites={n_live},pick=random",
                item.at_s,
                settings.burst_dur_s,
                item.value,
                n_sites=n_live,
                pick="random",
            )
            try:
                done = inject_burst(spec_b, sc, streams, rng)
                truth = done.truth
            except ValueError:
                truth = None
        if truth is None:
            truths.append(
                {"kind": item.kind, "value": item.value, "at_s": item.at_s, "injected": False}
            )
            continue
        for i, h in done.hits.items():
            extra[i].append(h)
        truth = dict(truth, kind=item.kind, value=item.value, at_s=item.at_s, injected=True)
        if item.kind == "front":
            truth["hit_times_ns"] = sorted(int(h["t_ns"]) for h in truth["hits"])
        truths.append(truth)
    hits = [
        np.sort(np.concatenate([s.t, *ex])) if ex else s.t
        for s, ex in zip(net.sites, extra, strict=True)
    ]
    return hits, truths


@dataclass(frozen=True, slots=True)
class CandRow:
    """The parts of a candidate that tuning needs (times GPS ns, FAR per year)."""

    trigger: str
    statistic: str
    window_s: float
    far: float
    time_ns: int
    sites: tuple[str, ...]
    hit_times_ns: tuple[int, ...]


def outcomes(truths: Sequence[dict[str, Any]], cands: Sequence[CandRow]) -> list[Outcome]:
    """Match candidates to injections (see the module docstring)."""
    coinc = [c for c in cands if c.trigger == "coincidence"]
    excess = [c for c in cands if c.trigger == "excess"]
    out: list[Outcome] = []
    for tr in truths:
        kind, value, at_s = str(tr["kind"]), float(tr["value"]), float(tr["at_s"])
        if not tr["injected"]:
            out.append(Outcome(kind, value, at_s, math.nan, (), {"injected": False}))
            continue
        best = math.inf
        sites = tuple(str(s) for s in tr["sites"])
        if kind == "front":
            mine = set(tr["hit_times_ns"])
            for c in coinc:
                if len(mine.intersection(c.hit_times_ns)) >= 2:
                    best = min(best, c.far)
            detail = {"ra_deg": tr["params"]["ra_deg"], "dec_deg": tr["params"]["dec_deg"]}
        else:
            ta, tb = int(tr["t0_gps_ns"]), int(tr["t1_gps_ns"])
            site_set = set(sites)
            for c in excess:
                c_end = c.time_ns + round(c.window_s * NS_PER_S)
                if (
                    c.time_ns < tb
                    and c_end > ta
                    and (c.statistic != "site" or site_set.intersection(c.sites))
                ):
                    best = min(best, c.far)
            detail = {"extra_hits": int(sum(h["count"] for h in tr["hits"]))}
        out.append(Outcome(kind, value, at_s, best, sites, detail))
    return out
