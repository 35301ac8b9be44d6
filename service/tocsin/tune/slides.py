"""Time slides: each site moved by its own multiple of a step, within its own live time.

Method (CHECKS.md, "Calibration"). A site's accepted live intervals, laid end to
end, form a ring of length ``L_i`` (its live time). A hit at live-time position
``u`` moves to ``(u + delta_i) mod L_i`` and back to GPS time through the same
intervals, so shifted hits stay inside the site's own live intervals and its
dead time stays dead. In slide ``s`` site ``i`` gets ``delta_i = m_i(s) x step``,
the multiples ``m_i(s)`` being distinct slots drawn at random (seeded) from
``0 .. M - 1``, ``M = floor(L / step)`` (``L`` the longest live time): every
pair of sites is displaced by a different multiple of the step.

Dead time makes the real displacement of site ``i``, ``E_i(tau) = new - old``
for a hit at original time ``tau``, piecewise constant rather than exactly
``delta_i``. A signal at ``tau`` lands at ``tau + E_i(tau)`` on site ``i``; it
cannot make a coincidence in the slid data if ``|E_i(tau) - E_j(tau)|`` exceeds
the longest window for every pair and every ``tau`` at which both are live.
:func:`pair_separation_ns` computes that minimum exactly from the pieces; sites
are placed one by one into slots that pass it against those already placed.
Whatever coincidences the engine then finds are accidental by construction.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry
from tocsin.tune.recorded import RecordedNetwork, SiteLive
from tocsin.types import C_M_PER_NS, NS_PER_S, I64Array

MAX_DRAWS_PER_SLIDE = 20
"""Placements tried for one slide before giving up (each checked exactly)."""


@dataclass(frozen=True, slots=True)
class Windows:
    """The longest windows of the engine's triggers (ns)."""

    coincidence_ns: int
    """Longest coincidence slot: largest scale + longest light time between two sites
    + the widest clock allowance of a pair."""
    excess_ns: int
    """Longest excess window (0 when no excess trigger is on)."""

    @property
    def longest_ns(self) -> int:
        return max(self.coincidence_ns, self.excess_ns)


def trigger_windows(registry: SiteRegistry, cfg: EngineConfig) -> Windows:
    """Longest windows of ``cfg`` on the network of ``registry`` (ns, rounded up)."""
    r = registry.ecef_m
    light_ns = np.sqrt(((r[:, None, :] - r[None, :, :]) ** 2).sum(-1)) / C_M_PER_NS
    sig = registry.clock_sigma_ns
    clock_ns = cfg.coincidence.clock_sigmas * np.sqrt(sig[:, None] ** 2 + sig[None, :] ** 2)
    reach = float(np.max(light_ns + clock_ns)) + max(cfg.coincidence.scales_s) * NS_PER_S
    ex = cfg.excess
    excess = max(ex.scales_s, default=0.0) if (ex.per_site or ex.network) else 0.0
    return Windows(math.ceil(reach), math.ceil(excess * NS_PER_S))


@dataclass(frozen=True, slots=True)
class SlidePlan:
    """One time slide: the shift of every site (ns of live time) and its checked margin."""

    index: int
    shift_ns: tuple[int, ...]
    min_separation_ns: int
    """Smallest displacement between two sites anywhere both are live (ns)."""
    redraws: int


def shift_hits(site: SiteLive, shift_ns: int) -> I64Array:
    """The site's hits moved by ``shift_ns`` of live time, wrapping within its live time.

    Returns sorted GPS ns, each inside one of the site's live intervals.
    """
    if site.t.size == 0 or site.start.size == 0:
        return site.t.copy()
    cum = np.concatenate([[0], np.cumsum(site.end - site.start)]).astype(np.int64)
    total = int(cum[-1])
    k = np.searchsorted(site.start, site.t, side="right") - 1
    u = cum[k] + (site.t - site.start[k])
    u2 = (u + shift_ns % total) % total
    out = _time_of(cum, site.start, u2)
    out.sort(kind="stable")
    return out


def _time_of(cum: I64Array, start: I64Array, u: I64Array) -> I64Array:
    """GPS time of live-time positions ``u`` (``cum`` = live time before each interval)."""
    k = np.searchsorted(cum[:-1], u, side="right") - 1
    t: I64Array = start[k] + (u - cum[k])
    return t


def displacement_pieces(site: SiteLive, shift_ns: int) -> tuple[I64Array, I64Array, I64Array]:
    """``(tau_lo, tau_hi, E)``: over each original stretch ``[tau_lo, tau_hi)`` (all live)
    a hit moves by exactly ``E`` ns."""
    a, b = site.merged()
    if a.size == 0:
        z = np.zeros(0, dtype=np.int64)
        return z, z, z
    cum = np.concatenate([[0], np.cumsum(b - a)]).astype(np.int64)
    total = int(cum[-1])
    d = shift_ns % total
    brk = np.unique(np.concatenate([cum[:-1], (cum[:-1] - d) % total]))
    ends = np.append(brk[1:], total)
    lo = _time_of(cum, a, brk)
    e = _time_of(cum, a, (brk + d) % total) - lo
    return lo, lo + (ends - brk), e


Pieces = tuple[I64Array, I64Array, I64Array]


def pair_separation_ns(a: Pieces, b: Pieces) -> int:
    """Smallest ``|E_a(tau) - E_b(tau)|`` over every ``tau`` where both sites are live (ns);
    the largest int64 when they never are."""
    lo_i, hi_i, e_i = a
    lo_j, hi_j, e_j = b
    pts = np.unique(np.concatenate([lo_i, lo_j]))
    ki = np.searchsorted(lo_i, pts, side="right") - 1
    kj = np.searchsorted(lo_j, pts, side="right") - 1
    ok = (ki >= 0) & (kj >= 0)
    ki, kj, p = ki[ok], kj[ok], pts[ok]
    both = (p < hi_i[ki]) & (p < hi_j[kj])
    if not both.any():
        return int(np.iinfo(np.int64).max)
    return int(np.abs(e_i[ki[both]] - e_j[kj[both]]).min())


def min_separation_ns(pieces: list[Pieces]) -> int:
    """Smallest pair separation (:func:`pair_separation_ns`) over all pairs of sites (ns)."""
    best = int(np.iinfo(np.int64).max)
    for x in range(len(pieces)):
        for y in range(x + 1, len(pieces)):
            best = min(best, pair_separation_ns(pieces[x], pieces[y]))
    return best


def slot_count(net: RecordedNetwork, step_ns: int) -> int:
    """How many distinct shifts of ``step_ns`` fit in the longest live time."""
    return int(int(net.live_ns.max()) // step_ns)


def active_sites(net: RecordedNetwork) -> list[int]:
    """Sites with live time and at least one hit: the ones a slide moves."""
    return [i for i, s in enumerate(net.sites) if s.live_ns > 0 and s.t.size > 0]


def plan_slides(
    net: RecordedNetwork,
    *,
    n_slides: int,
    step_ns: int,
    guard_ns: int,
    seed: int,
) -> list[SlidePlan]:
    """``n_slides`` checked slides; ``guard_ns`` is the separation every pair must exceed.

    Sites take slots one at a time, in random order, each the first of its free
    slots (in random order) that keeps it more than ``guard_ns`` from every site
    already placed. Raises ``ValueError`` (naming the numbers) when the live time
    is too short for the sites to take distinct slots, or no placement passes.
    """
    if step_ns <= guard_ns:
        raise ValueError(
            f"slide step {step_ns / NS_PER_S:g} s must be longer than the longest window "
            f"({guard_ns / NS_PER_S:g} s)"
        )
    live = net.live_ns
    active = active_sites(net)
    m = slot_count(net, step_ns)
    if m < len(active) + 1:
        need_s = (len(active) + 1) * step_ns / NS_PER_S
        raise ValueError(
            f"recording too short for time slides: {len(active)} sites with hits need "
            f"{len(active) + 1} slots of {step_ns / NS_PER_S:g} s = {need_s:g} s of live time, "
            f"the longest site live time is {int(live.max()) / NS_PER_S:g} s "
            "(use a longer recording, or a config with shorter windows)"
        )
    cache: dict[tuple[int, int], Pieces] = {}

    def pieces(i: int, k: int) -> Pieces:
        p = cache.get((i, k))
        if p is None:
            p = cache[(i, k)] = displacement_pieces(net.sites[i], k * step_ns)
        return p

    plans: list[SlidePlan] = []
    for s in range(n_slides):
        rng = np.random.default_rng(np.random.SeedSequence([seed, 0x51DE, s]))
        for draw in range(MAX_DRAWS_PER_SLIDE):
            placed: list[tuple[int, int]] = []
            free = set(range(m))
            for i in rng.permutation(active).tolist():
                for k in rng.permutation(sorted(free)).tolist():
                    p = pieces(i, k)
                    if all(pair_separation_ns(p, pieces(j, kj)) > guard_ns for j, kj in placed):
                        placed.append((i, k))
                        free.discard(k)
                        break
                else:
                    break
            if len(placed) == len(active):
                shift = [0] * len(net.sites)
                for i, k in placed:
                    shift[i] = k * step_ns
                sep = min_separation_ns([pieces(i, k) for i, k in placed])
                plans.append(SlidePlan(s, tuple(shift), sep, draw))
                break
        else:
            raise ValueError(
                f"slide {s}: no placement in {MAX_DRAWS_PER_SLIDE} tries kept every pair of "
                f"sites more than {guard_ns / NS_PER_S:g} s apart (dead time moves the sites "
                "against each other); use a longer recording or a longer --step"
            )
    return plans


def slid_hits(net: RecordedNetwork, plan: SlidePlan) -> list[I64Array]:
    """Every site's hits shifted as ``plan`` says."""
    return [shift_hits(s, d) for s, d in zip(net.sites, plan.shift_ns, strict=True)]
