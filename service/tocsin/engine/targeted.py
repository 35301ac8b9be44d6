"""Targeted search: our own data around an outside event time. Pure, synchronous, numpy.

Given a stretch of final data (a :class:`~tocsin.engine.block.Block`, usually
hours from the ring buffer) and an external event time ``t``, the *on-source*
window is ``[t - before, t + after)``. Inside it every statistic the engine uses
is evaluated at every scale:

* ``sites`` — the coincidence statistic of :mod:`tocsin.engine.coincidence`
  (distinct sites in geometry-aware slots; every hit a seed; every scale of
  ``CoincidenceConfig.scales_s``), rates and live fractions from the stretch;
* ``front`` — the plane-front statistic of :mod:`tocsin.engine.front` (three sites
  fix a front, further sites must fit it) at every ``front_scales_s``;
* ``directed`` — only when the outside packet gives a direction: each visible
  site's hits are shifted by its plane-front delay ``+ (n . r_j) / c`` for the
  ECEF unit vector ``n`` towards the source at ``t`` (:mod:`tocsin.engine.sky`,
  astropy), so that a front from that direction lines up in time; the same
  ``sites`` statistic then runs with zero light time between sites (slots of
  ``k`` combined clock sigmas plus the scale). Only sites with the source above
  their horizon take part, so hits out of the expected arrival order do not count;
* ``count`` — hits of the whole network and of each site in consecutive windows of
  each ``count_scales_s`` laid from the window's start, against ``rate x live
  time``, with a randomised Poisson p-value ``P(N > n) + u P(N = n)`` (exactly
  uniform under the null; Lehmann & Romano, section 3.2).

The most significant evaluation has the smallest local p. Its p-value corrected
for the searched interval, every scale and every statistic comes from the same
search repeated in *off-source* windows of the same length tiling the rest of the
stretch (the same direction in Earth-fixed axes, so the same visible sites and
delays): with ``n`` off-source windows of which ``m_lt`` have a smaller minimum
and ``m_eq`` an equal one, ``p = (m_lt + u (m_eq + 1)) / (n + 1)`` is exactly
uniform when the on- and off-source windows are exchangeable (background only,
stationary over the stretch). An off-source window holding a significant event of
its own (its Sidak bound below ``SIGNAL_P / (n + 1)``) is left out: off-source
trials must be background (common practice). When no off-source window is as extreme the
analytic bound ``1 - (1 - p_min)^E`` (Sidak over the ``E`` evaluations in the
on-source window; common practice) is reported if smaller, since the off-source
set cannot resolve below ``1 / (n + 1)``.

With nothing significant the answer is a 90 % upper limit on extra hits in the
on-source window, per site and network-wide, with the background known:
R. P. Kraft, D. N. Burrows & J. A. Nousek 1991, ApJ 374, 344 (see
:mod:`tocsin.engine.upper_limit`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import stats as sps

from tocsin.engine.block import Block
from tocsin.engine.coincidence import CoincidenceTrigger, SeedResult, Tables
from tocsin.engine.front import FrontSearch
from tocsin.engine.stats import randomised_p, sidak
from tocsin.engine.upper_limit import kbn_upper_limit
from tocsin.model.config import CoincidenceConfig
from tocsin.model.registry import SiteRegistry
from tocsin.types import C_M_PER_NS, NS_PER_S, BoolArray, F64Array, GpsNs, I32Array, I64Array

SEED_CHUNK = 200_000
"""Seeds evaluated per call of the ``sites`` statistic (bounds the memory of the pair search)."""
FRONT_CHUNK = 10_000
"""Seeds per call of the ``front`` statistic (its triples take far more memory per seed)."""
GUARD_NS = NS_PER_S
"""Windows keep this far (ns) from the ends of the stretch, plus the slots' reach."""
KEEP_FACTOR = 50.0
"""With a known window length, an evaluation is kept only if its p is below
KEEP_FACTOR / (evaluations of its kind and scale per window): a window's minimum is
then above that cap with probability about exp(-50), i.e. never."""
SIGNAL_P = 0.01
"""Off-source windows whose own trials-corrected bound is below SIGNAL_P / (windows + 1)
are taken to hold a real event and left out of the calibration (see :meth:`search`)."""
MIN_LIVE_RATIO = 0.8
"""An off-source window needs at least this fraction of the on-source window's live time."""

KIND_SITES, KIND_FRONT, KIND_DIRECTED, KIND_NETWORK, KIND_SITE = 0, 1, 2, 3, 4
KIND_NAMES = ("sites", "front", "directed", "count_network", "count_site")


@dataclass(frozen=True, slots=True)
class Direction:
    """A source direction fixed in Earth-fixed axes: ``n_ecef`` (unit vector to the
    source) and ``visible`` (per site: the source is above its horizon)."""

    n_ecef: F64Array
    visible: BoolArray


@dataclass(frozen=True, slots=True)
class Evaluations:
    """Every evaluation of a statistic: time (GPS ns), local p, kind, scale (s), site (or -1)."""

    t: I64Array
    p: F64Array
    kind: I64Array
    scale_s: F64Array
    site: I64Array
    multiplicity: I64Array

    @staticmethod
    def of_seeds(
        res: SeedResult, t: I64Array, site: I32Array, kind: int, scale_s: float
    ) -> Evaluations:
        """The seeds of one coincidence or front result (stream ``t``, ``site``)."""
        m = res.seed_idx.size
        return Evaluations(
            t[res.seed_idx],
            res.p,
            np.full(m, kind, np.int64),
            np.full(m, scale_s),
            site[res.seed_idx].astype(np.int64),
            res.multiplicity,
        )

    @staticmethod
    def concat(parts: list[Evaluations]) -> Evaluations:
        if not parts:
            z = np.zeros(0, np.int64)
            return Evaluations(z, np.zeros(0), z, np.zeros(0), z, z)
        return Evaluations(*(np.concatenate([getattr(e, f) for e in parts]) for f in _FIELDS))


_FIELDS = ("t", "p", "kind", "scale_s", "site", "multiplicity")


@dataclass(frozen=True, slots=True)
class Best:
    """The most significant evaluation in the on-source window."""

    kind: str
    scale_s: float
    time_gps_ns: GpsNs
    local_p: float
    site: str | None
    multiplicity: int
    observed: int | None = None


@dataclass(slots=True)
class TargetedResult:
    """Outcome of one targeted search (times GPS ns, counts in hits)."""

    t_event: GpsNs
    window_start: GpsNs
    window_end: GpsNs
    p_value: float
    """Chance probability of an on-source minimum this small, every scale and statistic
    and the whole window included."""
    calibration: str
    """``offsource`` (rank among off-source windows) or ``analytic`` (Sidak bound)."""
    p_offsource: float
    p_analytic: float
    n_offsource: int
    n_offsource_excluded: int
    """Off-source windows left out because they hold a significant event of their own."""
    n_evaluations: int
    best: Best | None
    live_fraction: float
    """Network live time in the window over (sites x window length)."""
    observed: dict[str, int]
    expected: dict[str, float]
    upper_limit_90: dict[str, float]
    """KBN 90 % upper limit on extra hits in the window, per site and ``"network"``."""
    visible_sites: list[str] | None = None
    statistics: list[str] = field(default_factory=list)


class TargetedSearch:
    """Prepared once for a stretch of data; :meth:`search` is then cheap per event time."""

    def __init__(
        self,
        registry: SiteRegistry,
        block: Block,
        coinc: CoincidenceConfig,
        *,
        count_scales_s: tuple[float, ...] = (1.0, 4.0, 16.0, 64.0, 256.0),
        min_expected: float = 2.0,
        window_ns: int | None = None,
    ) -> None:
        """``block``: the stretch searched (on- and off-source). ``min_expected``: a site's
        count window is tested alone only if it expects at least this many hits.
        ``window_ns``: the length of the windows that will be searched, when known: then
        only evaluations that could be a window's minimum are kept (memory; see
        :data:`KEEP_FACTOR`), otherwise all are."""
        self.registry = registry
        self.window_ns = window_ns
        self._nbins = int((block.t_end - block.t_start) // NS_PER_S) + 2
        self.base_hist = np.zeros(self._nbins, np.int64)
        """Evaluations of the fixed statistics per second of the stretch (all, kept or not)."""
        self.block = block
        self.coinc_cfg = coinc
        self.count_scales_ns = tuple(round(w * NS_PER_S) for w in sorted(count_scales_s))
        self.min_expected = min_expected
        n = len(registry)
        span = max(int(block.t_end - block.t_start), 1)
        self.live_ns = np.bincount(
            block.live_site, weights=(block.live_end - block.live_start).astype(float), minlength=n
        )
        self.counts = np.bincount(block.site, minlength=n)
        self.ok = self.live_ns > 0
        self.rate_hz = np.where(self.ok, self.counts / np.maximum(self.live_ns, 1) * NS_PER_S, 0.0)
        self.live_frac = self.live_ns / span
        self.trigger = CoincidenceTrigger(registry, coinc)
        self.tables = self.trigger.tables(self.rate_hz, self.live_frac, self.ok)
        self.reach_ns = int(self.trigger.max_ahead_ns) + GUARD_NS
        # per site: sorted hit times and cumulative live time at each interval's end
        self._site_t = [block.t[block.site == j] for j in range(n)]
        self._live = []
        for j in range(n):
            m = block.live_site == j
            a, b = block.live_start[m], block.live_end[m]
            o = np.argsort(a, kind="stable")
            a, b = a[o], b[o]
            self._live.append((a, b, np.concatenate([[0], np.cumsum(b - a)])))
        self.base = Evaluations.concat(
            [
                self._coincidences(
                    self.trigger, self.tables, block.t, block.site, KIND_SITES, self.base_hist
                ),
                self._fronts(self.base_hist),
            ]
        )

    def _keep(self, ev: Evaluations, hist: I64Array) -> Evaluations:
        """Count ``ev`` per second in ``hist``; keep those that could be a window's minimum."""
        if ev.t.size == 0:
            return ev
        self._tally(ev.t, hist)
        if self.window_ns is None:
            return ev
        dur = max(int(ev.t.max() - ev.t.min()), NS_PER_S)
        per_window = ev.t.size / dur * self.window_ns
        cap = min(1.0, KEEP_FACTOR / max(per_window, 1.0))
        m = ev.p <= cap
        return Evaluations(*(getattr(ev, f)[m] for f in _FIELDS))

    # -- helpers ----------------------------------------------------------------
    def _tally(self, t: I64Array, hist: I64Array) -> None:
        """Add evaluations at times ``t`` to the per-second counts ``hist``."""
        if t.size:
            b = np.clip((t - self.block.t_start) // NS_PER_S, 0, self._nbins - 1)
            hist += np.bincount(b, minlength=self._nbins)

    def live_before(self, j: int, x: I64Array) -> I64Array:
        """Live ns of site ``j`` in ``[-inf, x)`` for each x (vectorised)."""
        a, b, cum = self._live[j]
        k = np.searchsorted(a, x, side="right")  # intervals starting at or before x
        prev_end = np.where(k > 0, b[np.maximum(k - 1, 0)], 0)
        prev_start = np.where(k > 0, a[np.maximum(k - 1, 0)], 0)
        partial = np.where(k > 0, np.minimum(x, prev_end) - prev_start, 0)
        full = cum[np.maximum(k - 1, 0)] * (k > 0)
        return (full + np.maximum(partial, 0)).astype(np.int64)

    def _coincidences(
        self,
        trig: CoincidenceTrigger,
        tab: Tables,
        t: I64Array,
        site: np.ndarray,
        kind: int,
        hist: I64Array,
    ) -> Evaluations:
        parts: list[Evaluations] = []
        s32 = np.asarray(site, dtype=np.int32)
        for k, w in enumerate(self.coinc_cfg.scales_s):
            if not np.any(tab.scales[k].active):
                continue
            for i0 in range(0, t.size, SEED_CHUNK):
                i1 = min(t.size, i0 + SEED_CHUNK)
                res = trig.evaluate(t, s32, i0, i1, tab, k, p_max=1.0)
                ev = Evaluations.of_seeds(res, t, s32, kind, w)
                parts.append(ev if kind == KIND_DIRECTED else self._keep(ev, hist))
        return Evaluations.concat(parts)

    def directed(self, direction: Direction, hist: I64Array | None = None) -> Evaluations:
        """The ``directed`` statistic over the whole stretch for one Earth-fixed direction.

        Only sites that see the source and whose clocks resolve plane-front delays
        (``clock_sigma_ns <= front_max_clock_ns``, as for the ``front`` statistic) take part.
        """
        reg = self.registry
        use = (
            direction.visible & self.ok & (reg.clock_sigma_ns <= self.coinc_cfg.front_max_clock_ns)
        )
        idx = np.flatnonzero(use)
        empty = Evaluations.concat([])
        if idx.size < 2:
            return empty
        delay = np.rint(reg.ecef_m @ direction.n_ecef / C_M_PER_NS).astype(np.int64)
        sub_of = np.full(len(reg), -1, np.int64)
        sub_of[idx] = np.arange(idx.size)
        m = use[self.block.site]
        t = self.block.t[m] + delay[self.block.site[m]]
        s = sub_of[self.block.site[m]]
        o = np.argsort(t, kind="stable")
        t, s = t[o], s[o]
        colocated = reg.subset([reg.ids[j] for j in idx])
        colocated.ecef_m = np.zeros_like(colocated.ecef_m)  # delays removed: no light time
        trig = CoincidenceTrigger(colocated, self.coinc_cfg)
        tab = trig.tables(self.rate_hz[idx], self.live_frac[idx], self.ok[idx])
        ev = self._coincidences(trig, tab, t, s, KIND_DIRECTED, np.zeros(0, np.int64))
        site = idx[ev.site]
        # report the time back on the un-shifted axis of the seed's site
        o = np.argsort(ev.t - delay[site], kind="stable")
        back = Evaluations(
            (ev.t - delay[site])[o],
            ev.p[o],
            ev.kind[o],
            ev.scale_s[o],
            site[o],
            ev.multiplicity[o],
        )
        return self._keep(back, hist if hist is not None else np.zeros(self._nbins, np.int64))

    def _fronts(self, hist: I64Array) -> Evaluations:
        """The ``front`` statistic of :mod:`tocsin.engine.front` at its scales, every seed."""
        fs = FrontSearch(self.registry, self.coinc_cfg)
        t, s32 = self.block.t, np.asarray(self.block.site, dtype=np.int32)
        rates = self.tables.rates_per_ns
        parts: list[Evaluations] = []
        for i0 in range(0, t.size, FRONT_CHUNK):
            i1 = min(t.size, i0 + FRONT_CHUNK)
            for res in fs.evaluate(t, s32, i0, i1, rates, p_max=1.0):
                if res.seed_idx.size == 0:
                    continue
                w = self.coinc_cfg.front_scales_s[res.scale_index]
                ev = Evaluations.of_seeds(res, t, s32, KIND_FRONT, w)
                parts.append(self._keep(ev, hist))
        return Evaluations.concat(parts)

    def _counts(self, starts: I64Array, length_ns: int, rng: np.random.Generator) -> Evaluations:
        """Count windows in every tile starting at ``starts`` (one row per tile)."""
        n = len(self.registry)
        parts: list[Evaluations] = []
        for w in self.count_scales_ns:
            m = length_ns // w
            if m < 1:
                continue
            edges = starts[:, None] + np.arange(m + 1, dtype=np.int64)[None, :] * w  # (T, m+1)
            obs = np.zeros((starts.size, m), np.int64)
            exp = np.zeros((starts.size, m))
            for j in range(n):
                if not self.ok[j]:
                    continue
                c = np.searchsorted(self._site_t[j], edges, side="left")
                lv = self.live_before(j, edges.ravel()).reshape(edges.shape)
                oj = np.diff(c, axis=1)
                ej = np.diff(lv, axis=1) * (self.rate_hz[j] / NS_PER_S)
                obs += oj
                exp += ej
                big = ej >= self.min_expected
                if np.any(big):
                    p = _rand_poisson_p(oj[big], ej[big], rng.random(int(big.sum())))
                    tt = edges[:, :-1][big]
                    parts.append(_ev(tt, p, KIND_SITE, w, j, oj[big]))
            p = _rand_poisson_p(obs.ravel(), exp.ravel(), rng.random(obs.size))
            parts.append(_ev(edges[:, :-1].ravel(), p, KIND_NETWORK, w, -1, obs.ravel()))
        return Evaluations.concat(parts)

    # -- the search ---------------------------------------------------------------
    def search(
        self,
        t_event: GpsNs,
        *,
        before_ns: int,
        after_ns: int,
        direction: Direction | None = None,
        seed: int = 0,
        max_offsource: int | None = None,
    ) -> TargetedResult:
        """Search ``[t_event - before_ns, t_event + after_ns)``; see the module docstring.

        ``seed`` fixes the randomisation (u of the count p-values and of the rank).
        Raises ``ValueError`` if the on-source window is not inside the stretch.
        """
        length = before_ns + after_ns
        if length <= 0:
            raise ValueError(f"window length {length} ns must be > 0")
        on0 = t_event - before_ns
        lo = self.block.t_start + self.reach_ns
        hi = self.block.t_end - self.reach_ns
        if on0 < lo or on0 + length > hi:
            raise ValueError(
                f"window [{on0}, {on0 + length}) is not inside the searchable stretch "
                f"[{lo}, {hi}) (GPS ns)"
            )
        rng = np.random.default_rng([seed & 0xFFFFFFFF, 0x7A9])
        j_lo = -((on0 - lo) // length)
        j_hi = (hi - on0) // length - 1
        js = np.array([j for j in range(j_lo, j_hi + 1) if j != 0], dtype=np.int64)
        if max_offsource is not None and js.size > max_offsource:
            js = js[np.argsort(np.abs(js), kind="stable")[:max_offsource]]
            js.sort()
        starts = np.concatenate([[on0], on0 + js * length]).astype(np.int64)
        # live time per tile, network-wide
        tile_live = np.zeros(starts.size)
        for j in range(len(self.registry)):
            if self.ok[j]:
                tile_live += self.live_before(j, starts + length) - self.live_before(j, starts)
        keep = tile_live >= MIN_LIVE_RATIO * tile_live[0]
        keep[0] = True
        starts = starts[keep]
        tile_live = tile_live[keep]
        hist = self.base_hist.copy()
        counts = self._counts(starts, length, rng)
        self._tally(counts.t, hist)  # all kept: they are few
        parts = [self.base, counts]
        stats_used = ["sites", "front", "count_network", "count_site"]
        vis_ids: list[str] | None = None
        if direction is not None:
            parts.append(self.directed(direction, hist))
            stats_used.insert(2, "directed")
            vis_ids = [s for s, v in zip(self.registry.ids, direction.visible, strict=True) if v]
        ev = Evaluations.concat(parts)
        # minimum p per tile (tiles do not overlap; sort them by start)
        order = np.argsort(starts, kind="stable")
        st_sorted = starts[order]
        tile = np.searchsorted(st_sorted, ev.t, side="right") - 1
        inside = (tile >= 0) & (ev.t < st_sorted[np.maximum(tile, 0)] + length)
        tile_min = np.ones(starts.size)
        np.minimum.at(tile_min, tile[inside], ev.p[inside])
        mins = np.empty(starts.size)
        mins[order] = tile_min
        # evaluations per window, dropped ones included, from the per-second counts
        # (whole seconds: a window's count may include up to 2 s of its neighbours',
        # which only makes the Sidak bounds below more conservative)
        cum = np.concatenate([[0], np.cumsum(hist)])
        first = np.clip((starts - self.block.t_start) // NS_PER_S, 0, self._nbins)
        last = np.clip(-(-(starts + length - self.block.t_start) // NS_PER_S), 0, self._nbins)
        n_in = cum[last] - cum[first]
        on_min = float(mins[0])
        # Off-source windows must hold background only: one whose own Sidak bound is
        # below SIGNAL_P / (windows + 1) holds an event and is left out (under the null
        # that removes on average SIGNAL_P windows per search).
        off_an = sidak(mins[1:], np.maximum(n_in[1:], 1))
        clean = off_an >= SIGNAL_P / starts.size
        off = mins[1:][clean]
        n_off = int(off.size)
        n_excluded = int(np.sum(~clean))
        u = float(rng.random())
        m_lt = int(np.sum(off < on_min))
        m_eq = int(np.sum(off == on_min))
        p_off = (m_lt + u * (m_eq + 1)) / (n_off + 1)
        on_tile = int(np.flatnonzero(order == 0)[0])
        on_sel = inside & (tile == on_tile)
        n_eval = int(n_in[0])
        p_an = float(sidak(on_min, max(n_eval, 1)))
        if n_off == 0 or (m_lt == 0 and p_an < p_off):
            p_final, how = p_an, "analytic"
        else:
            p_final, how = p_off, "offsource"
        best = self._best(ev, on_sel, on_min)
        obs, exp, ul = self._limits(on0, length)
        n_sites = len(self.registry)
        return TargetedResult(
            t_event=GpsNs(t_event),
            window_start=GpsNs(on0),
            window_end=GpsNs(on0 + length),
            p_value=float(p_final),
            calibration=how,
            p_offsource=float(p_off),
            p_analytic=p_an,
            n_offsource=n_off,
            n_offsource_excluded=n_excluded,
            n_evaluations=n_eval,
            best=best,
            live_fraction=float(tile_live[0] / (n_sites * length)),
            observed=obs,
            expected=exp,
            upper_limit_90=ul,
            visible_sites=vis_ids,
            statistics=stats_used,
        )

    def _best(self, ev: Evaluations, on_sel: BoolArray, on_min: float) -> Best | None:
        idx = np.flatnonzero(on_sel)
        if idx.size == 0:
            return None
        i = int(idx[np.argmin(ev.p[idx])])
        kind = int(ev.kind[i])
        site = int(ev.site[i])
        obs = int(ev.multiplicity[i]) if kind >= KIND_NETWORK else None
        return Best(
            kind=KIND_NAMES[kind],
            scale_s=float(ev.scale_s[i]),
            time_gps_ns=GpsNs(int(ev.t[i])),
            local_p=on_min,
            site=self.registry.ids[site] if site >= 0 else None,
            multiplicity=int(ev.multiplicity[i]) if kind < KIND_NETWORK else 0,
            observed=obs,
        )

    def _limits(
        self, on0: int, length: int
    ) -> tuple[dict[str, int], dict[str, float], dict[str, float]]:
        obs: dict[str, int] = {}
        exp: dict[str, float] = {}
        edges = np.array([on0, on0 + length], dtype=np.int64)
        for j, sid in enumerate(self.registry.ids):
            if not self.ok[j]:
                continue
            c = np.searchsorted(self._site_t[j], edges, side="left")
            lv = self.live_before(j, edges)
            obs[sid] = int(c[1] - c[0])
            exp[sid] = float((lv[1] - lv[0]) * self.rate_hz[j] / NS_PER_S)
        obs["network"] = sum(obs.values())
        exp["network"] = float(sum(exp.values()))
        ul = {k: kbn_upper_limit(obs[k], exp[k]) for k in obs}
        return obs, exp, ul


def _rand_poisson_p(n: I64Array, mu: F64Array, u: F64Array) -> F64Array:
    """``P(N > n) + u P(N = n)`` for ``N ~ Poisson(mu)``: uniform under the null."""
    mu_s = np.maximum(mu, 0.0)
    return randomised_p(sps.poisson.sf(n, mu_s), sps.poisson.pmf(n, mu_s), u)


def _ev(t: I64Array, p: F64Array, kind: int, w_ns: int, site: int, n: I64Array) -> Evaluations:
    m = t.size
    return Evaluations(
        np.asarray(t, np.int64),
        np.asarray(p, np.float64),
        np.full(m, kind, np.int64),
        np.full(m, w_ns / NS_PER_S),
        np.full(m, site, np.int64),
        np.asarray(n, np.int64),
    )
