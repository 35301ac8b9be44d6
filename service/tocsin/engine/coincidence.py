"""Coincidence trigger: distinct sites firing within a geometry-aware window.

Every hit is a *seed*. For a seed at site ``s`` and a window scale ``W``, site
``j`` counts if it has a hit in its **forward slot**

    [t_s - k sigma_sj,  t_s + |r_s - r_j| / c + k sigma_sj + W]

(``sigma_sj`` the two clocks' combined 1-sigma error, ``k`` = ``clock_sigmas``): a
plane front that reaches ``s`` first reaches ``j`` at most one light-time later,
and clocks can shift either hit. Forward-only slots mean each chance cluster is
counted once, from its earliest hit.

Statistic ``sites`` (every scale). Under the null (independent Poisson sites with
rates lambda_j from :mod:`tocsin.engine.rates`) a site ``j`` live over the whole
slot occupies it with probability ``q_sj = 1 - exp(-lambda_j |slot|)``, so the
number of other sites K is Poisson-binomial(q). Ties in K are broken by how early
in its slot each site fired: for the first hit at offset ``x`` into a slot of
width ``w``, ``u = (1 - e^{-lambda x}) / (1 - e^{-lambda w})`` is uniform under
the null, and ``-sum ln u`` is Gamma(K, 1) (Fisher's method). The p-value

    p = P(K > k) + P(K = k) * P(Gamma(k) >= -sum ln u)

is then exactly uniform under the null (a lexicographic ordering on (K, compactness)).

Dead time. Which sites count is decided per exposure bin from live time alone
(never from hits, so any such rule keeps the null): a site counts for the seeds
of a bin when it is live somewhere in that bin, and then always with the
occupancy of a *fully live* slot. The offset ``x`` is measured on the site's
live clock (:mod:`tocsin.engine.livetime`). A site dead for part of a slot is
then a fully live site whose hits in the dead part were thrown away: its true
probability of every (occupied, offset) outcome is at most the one the tables
assume, so P(p <= x) <= x -- exact for fully live slots, conservative at the
edges of live intervals. (Scaling ``q`` by the bin's live fraction instead, as
an earlier version did, is wrong: a seed exists only where its site is live,
and when many sites start or stop together the others are live at the seed's
time far more often than their bin-average fraction says -- hundreds of false
candidates at ``far ~ 1e-8`` per year in ``tests/test_partial_live.py``.)

Statistic ``front`` (short scales, sites with good clocks): see :mod:`tocsin.engine.front`.

False alarm rate. By linearity of expectation, if every evaluated (seed, scale,
statistic) has a uniform p-value, the expected number with p <= x per second is
x * R, where R sums the seed rate of every evaluated (scale, statistic, seed
site). So ``far = p * R``, whatever the correlations between scales. A scale
that would only repeat a smaller one for a seed site (expected neighbour count
changed by less than ``redundancy_ratio``) is not evaluated and not counted.
Rates are per second of *network live time*: in a bin where the counted sites
are live for fractions ``f_s``, R is ``sum_s lambda_s f_s (trials of s) / max_s f_s``
(:meth:`Tables.trial_rates_hz`). The expected false alarms of the bin are then F
times its network live time ``max_s f_s`` x bin, whether or not the sites share
their dead time; a calibration must count its time the same way (``tocsin tune``:
:meth:`tocsin.tune.recorded.RecordedNetwork.network_live_ns`). Against the union
of the sites' live time (larger when they do not share it) they are fewer.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from tocsin.engine.geometry import combined_sigma_ns, pair_light_time_ns
from tocsin.engine.livetime import LiveClock
from tocsin.engine.pairs import window_pairs
from tocsin.engine.slot_counts import (
    SlotTables,
    previous_in_time_order,
    slot_counts,
    slot_tables,
)
from tocsin.engine.slot_counts import warm_up as warm_slot_counts
from tocsin.engine.stats import fisher_combined_sf, poisson_binomial_pmf_top
from tocsin.model.config import CoincidenceConfig
from tocsin.model.registry import SiteRegistry
from tocsin.types import BoolArray, F64Array, I32Array, I64Array


@dataclass(frozen=True, slots=True)
class ScaleTables:
    """Null-hypothesis tables for one scale, valid while rates and live fractions hold."""

    active: BoolArray
    """(N,) seed sites for which this scale is evaluated."""
    tail_gt: F64Array
    """(N, C): P(K > k) for seed site s, k = 0 .. C - 1; counts above C - 1 read
    column C - 1 (:meth:`column`), which then holds a bound (see ``_null_tables``)."""
    point: F64Array
    """(N, C): P(K = k) for seed site s, as ``tail_gt`` (0 in the bounding column)."""
    slots: SlotTables | None
    """Slot edges per (seed site, site) pair, the upper one folding in ``q > 0`` (a
    pair that does not count gets one below every lower edge); None: no seed site
    is active at this scale."""

    def column(self, k: I64Array) -> I64Array:
        """Column of :attr:`tail_gt` and :attr:`point` that holds count(s) ``k >= 0``."""
        out: I64Array = np.minimum(k, self.tail_gt.shape[1] - 1)
        return out

    def need(self, p_max: float, min_multiplicity: int) -> I64Array:
        """(N,) per seed site, the smallest count of other sites ``k`` that passes
        ``P(K > k) <= p_max`` and ``k + 1 >= min_multiplicity`` (a huge number
        where none does): a seed with fewer cannot pass."""
        cols = self.tail_gt.shape[1]
        m0 = max(min_multiplicity - 1, 0)
        start = min(m0, cols - 1)
        ok = self.tail_gt[:, start:] <= p_max
        first = np.where(ok.any(axis=1), ok.argmax(axis=1) + start, np.iinfo(np.int64).max)
        out: I64Array = np.maximum(first, m0).astype(np.int64)
        return out


@dataclass(frozen=True, slots=True)
class Tables:
    """Everything the null hypothesis needs for a stretch of constant rates and
    constant set of counted (live) sites."""

    rates_per_ns: F64Array
    """(N,) background rate per ns of each counted site, 0 for the others."""
    scales: tuple[ScaleTables, ...]
    seed_weight: F64Array
    """(N,) evaluations each seed hit of a site makes, all scales and statistics
    (front seeds weighted by their chance of being testable)."""
    trial_rate_hz: float
    """Seed evaluations per second with every counted site live all the time."""

    def trial_rates_hz(self, live_frac: F64Array) -> F64Array:
        """Evaluations per second of network live time (the FAR multiplier, Hz) in
        bins where site ``s`` is live for the fraction ``live_frac[s, j]`` of bin j
        (shape (N, bins); one value per bin)."""
        f = np.where(self.rates_per_ns[:, None] > 0, np.clip(live_frac, 0.0, 1.0), 0.0)
        f_net = f.max(axis=0) if f.shape[0] else np.zeros(f.shape[1])
        # each bin's sum on its own contiguous row, so its rounding is the same whichever
        # bins it is computed with (a matrix product's can depend on how many there are)
        terms = np.ascontiguousarray((f * (self.rates_per_ns * self.seed_weight)[:, None]).T)
        num = terms.sum(axis=1) * 1e9
        out: F64Array = np.where(f_net > 0.0, num / np.where(f_net > 0.0, f_net, 1.0), 0.0)
        return out


@dataclass(frozen=True, slots=True)
class SeedResult:
    """Decisions of one scale and statistic: seeds that passed, with their other hits."""

    scale_index: int
    seed_idx: I64Array
    """Stream index of each passing seed."""
    p: F64Array
    multiplicity: I64Array
    nb_seed: I64Array
    """Group number (0 .. len(seed_idx)-1) of each neighbour hit below."""
    nb_idx: I64Array
    """Stream index of each other hit of the decision (``sites``: the earliest in-slot
    hit of each counted site; ``front``: the partners and consistent hits)."""


def concat_results(scale_index: int, parts: list[SeedResult]) -> SeedResult:
    """One scale's results of several seed groups (disjoint), ordered by seed as one call
    over all of them gives."""
    empty = np.zeros(0, dtype=np.int64)
    parts = [r for r in parts if r.seed_idx.size]
    if not parts:
        return SeedResult(scale_index, empty, np.zeros(0), empty, empty, empty)
    if len(parts) == 1:
        return parts[0]
    seeds = np.concatenate([r.seed_idx for r in parts])
    offs = np.cumsum([0] + [r.seed_idx.size for r in parts[:-1]])
    nb_seed = np.concatenate([r.nb_seed + o for r, o in zip(parts, offs, strict=True)])
    nb_idx = np.concatenate([r.nb_idx for r in parts])
    order = np.argsort(seeds, kind="stable")
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    nb_order = np.argsort(rank[nb_seed], kind="stable")
    return SeedResult(
        scale_index,
        seeds[order],
        np.concatenate([r.p for r in parts])[order],
        np.concatenate([r.multiplicity for r in parts])[order],
        rank[nb_seed][nb_order],
        nb_idx[nb_order],
    )


class SlotGeometry:
    """Forward slot bounds (ns, relative to the seed) per scale and site pair:
    ``lo`` (N, N) = -k sigma_sj and ``hi`` (S, N, N) = light time + k sigma_sj + W."""

    def __init__(
        self, registry: SiteRegistry, *, clock_sigmas: float, scales_s: Sequence[float]
    ) -> None:
        light = pair_light_time_ns(registry.ecef_m)
        comb = combined_sigma_ns(registry.clock_sigma_ns)
        self.n_sites = len(registry)
        self.scales_ns = np.array([round(w * 1e9) for w in scales_s], dtype=np.int64)
        self.lo = -np.ceil(clock_sigmas * comb)  # (N, N), <= 0
        self.base_hi = np.ceil(light + clock_sigmas * comb)
        """(N, N) upper slot edges without the scale (ns): ``hi[s] - W_s`` at any scale,
        and still there when no scale is configured."""
        self.hi = self.base_hi[None, :, :] + self.scales_ns[:, None, None]  # (S, N, N)
        self.width = self.hi - self.lo[None, :, :]
        # flat copies, indexed by seed site * N + site (one index for several tables)
        self.lo_flat = self.lo.reshape(-1)
        self.lo_flat_i = self.lo_flat.astype(np.int64)
        self.hi_flat = [h.reshape(-1) for h in self.hi]
        self.width_flat = [x.reshape(-1) for x in self.width]
        self.back_ns = int(-self.lo.min())
        self.ahead_ns = [int(h.max()) for h in self.hi]


TAIL_SD = 12.0
"""Poisson-binomial tables are kept exactly up to mean + 12 sd + 12 sites; beyond,
chance is below ~1e-17 and the p-value is reported as that tail (a bound)."""


def _inactive_scale(n: int) -> ScaleTables:
    """Tables of a scale at which no seed site is evaluated (read-only placeholders)."""
    return ScaleTables(
        np.zeros(n, dtype=bool), np.broadcast_to(1.0, (n, 1)), np.broadcast_to(0.0, (n, 1)), None
    )


def _null_tables(q: F64Array, active: BoolArray, e: F64Array) -> tuple[F64Array, F64Array]:
    """``P(K > k)`` and ``P(K = k)`` per seed site (rows), exact for the counts that
    matter: computed for active rows only, truncated at ``k_top`` = mean + TAIL_SD sd
    + 12. Shape (N, k_top + 1): the last column holds ``P(K >= k_top)`` as the tail
    and 0 as the point probability of every count from ``k_top`` on (exact tables,
    (N, N + 1), when ``k_top`` reaches N)."""
    n = q.shape[0]
    rows = np.flatnonzero(active)
    if rows.size == 0:  # nothing is evaluated at this scale: read-only placeholders
        return np.broadcast_to(1.0, (n, 1)), np.broadcast_to(0.0, (n, 1))
    mu = float(e[rows].max())
    k_top = min(n, int(np.ceil(mu + TAIL_SD * np.sqrt(mu) + 12)))
    tail_gt = np.ones((n, k_top + 1))
    point = np.zeros((n, k_top + 1))
    if k_top >= n:  # small network: the full, exact distribution
        pmf = poisson_binomial_pmf_top(q[rows], n)
        ge = np.cumsum(pmf[:, ::-1], axis=1)[:, ::-1]
        tail_gt[rows] = np.clip(np.concatenate([ge[:, 1:], np.zeros((rows.size, 1))], 1), 0, 1)
        point[rows] = pmf
    else:
        pmf = poisson_binomial_pmf_top(q[rows], k_top)  # (R, k_top + 1), last = P(>= k_top)
        # exact below k_top; at and above it, P(K > k) is bounded by P(K >= k_top)
        ge = np.cumsum(pmf[:, ::-1], axis=1)[:, ::-1]  # P(K >= k), k = 0 .. k_top
        gt = np.empty((rows.size, k_top + 1))
        gt[:, :k_top] = ge[:, 1:]
        gt[:, k_top] = pmf[:, k_top]
        tail_gt[rows] = np.clip(gt, 0.0, 1.0)
        point[rows, :k_top] = pmf[:, :k_top]
    return tail_gt, point


_BOUND_REL = 1e-9
"""Relative margin of the decisions :meth:`CoincidenceTrigger._surely_inactive` takes
from bounds (rounding of the exact sums is ~1e-15 relative)."""

NO_PREVIOUS_NS = -(2**62)
"""Stands for "no previous hit": far below any GPS time, and differences stay in int64."""


def previous_same_site(t: I64Array, site: I32Array, before: I64Array | None = None) -> I64Array:
    """For each hit, the time (GPS ns) of the previous hit of the same site; for a
    site's first hit here, ``before[site]`` (each site's latest hit before these, when
    the caller keeps it) or :data:`NO_PREVIOUS_NS`. Hits in time order (as the
    engine keeps them) take one compiled pass; others are sorted by site first."""
    if t.size < 2 or bool(np.all(t[1:] >= t[:-1])):
        n = before.size if before is not None else (int(site.max()) + 1 if site.size else 0)
        last = np.full(n, NO_PREVIOUS_NS, dtype=np.int64) if before is None else before.copy()
        return previous_in_time_order(t, site, last)
    order = np.lexsort((t, site))
    ts, ss = t[order], site[order]
    first = np.r_[True, ss[1:] != ss[:-1]] if ss.size else np.zeros(0, dtype=bool)
    prev_sorted = np.empty(t.size, dtype=np.int64)
    prev_sorted[1:] = ts[:-1]
    prev_sorted[first] = NO_PREVIOUS_NS if before is None else before[ss[first]]
    out = np.empty(t.size, dtype=np.int64)
    out[order] = prev_sorted
    return out


class CoincidenceTrigger:
    """The ``sites`` statistic at every scale; the ``front`` statistic is added by
    :class:`tocsin.engine.front.FrontSearch`, whose trials enter through the
    ``extra_seed_weight`` of :meth:`tables`."""

    def __init__(self, registry: SiteRegistry, cfg: CoincidenceConfig) -> None:
        self.cfg = cfg
        self.geom = SlotGeometry(registry, clock_sigmas=cfg.clock_sigmas, scales_s=cfg.scales_s)
        self.n_sites = len(registry)
        n = self.n_sites
        not_self = ~np.eye(n, dtype=bool)
        self._not_self = not_self
        """(N, N): False on the diagonal (a seed's own site is not its neighbour)."""
        self._mean_w = [(w * not_self).sum(axis=1) / max(n - 1, 1) for w in self.geom.width]
        """Per scale, each seed site's mean slot width (ns) over the other sites."""
        self._max_w = [float((w * not_self).max()) if n > 1 else 0.0 for w in self.geom.width]
        """Per scale, the widest slot (ns) between two different sites."""
        self._slot_cache: dict[int, tuple[bytes, SlotTables]] = {}
        """Per scale, the pattern of counted pairs and the slot tables last built."""
        self.skip_by_bounds = True
        """Skip a scale's N x N tables when bounds show no seed site is active there;
        the tables are the same either way (tested)."""
        warm_slot_counts()

    def _surely_inactive(self, k: int, lam: F64Array, may: BoolArray, prev_e: F64Array) -> bool:
        """True when bounds on the expected neighbour count ``e`` show that no seed
        site in ``may`` is active at scale ``k`` (each either not :attr:`sparse
        <CoincidenceConfig.max_expected_neighbours>` or not fresh against the
        previous scale's ``prev_e``), without the N x N occupancies.

        With ``x = lam_j w_sj``, an occupancy ``1 - exp(-x)`` lies between
        ``x (1 - x_max / 2)`` and ``x``; when every pair is below the occupancy cap
        (``x_max`` below ``-log(1 - cap)``) every pair counts, so ``e`` lies between
        ``(1 - x_max / 2) E`` and ``E``, ``E = sum_j x``: one matrix-vector
        product. Decisions keep a relative margin of 1e-9 (the exact ``e`` is a
        sum of rounded terms), so they are those the exact ``e`` gives."""
        width = self.geom.width[k]
        lam_max = float(lam.max())
        x_max = lam_max * float(self._max_w[k])
        x_cap = -np.log1p(-self.cfg.occupancy_cap)
        if not x_max <= x_cap * (1.0 - _BOUND_REL):
            return False  # some pair may be over the cap: no lower bound this way
        own = np.diagonal(width) * lam
        upper = width @ lam - own  # E, the seed's own site left out
        if np.any(own > upper):  # cancellation could spoil the margin: decide exactly
            return False
        lower = upper * (1.0 - x_max / 2.0)
        margin = 1.0 + _BOUND_REL
        not_sparse = lower > self.cfg.max_expected_neighbours * margin
        ratio = self.cfg.redundancy_ratio
        stale = ~np.isnan(prev_e)
        stale &= upper * margin < ratio * prev_e
        stale &= lower * ratio > prev_e * margin
        return bool(np.all(not_sparse[may] | stale[may]))

    def _slots(self, k: int, q: F64Array) -> SlotTables:
        """Slot tables of scale ``k`` for occupancies ``q`` (N, N): they depend only on
        which pairs have an occupancy above 0, which seldom changes from one rate
        epoch to the next, so the last ones built for the scale are kept and reused
        while that pattern holds (building them is an N x N pass)."""
        pattern = np.packbits(q > 0.0).tobytes()
        kept = self._slot_cache.get(k)
        if kept is not None and kept[0] == pattern:
            return kept[1]
        slots = slot_tables(
            self.geom.lo_flat_i, self.geom.hi_flat[k], self.n_sites, occupancy=q.reshape(-1)
        )
        self._slot_cache[k] = (pattern, slots)
        return slots

    @property
    def max_ahead_ns(self) -> int:
        return max(self.geom.ahead_ns)

    def tables(
        self,
        rates_hz: F64Array,
        live: BoolArray | F64Array,
        ok: BoolArray,
        *,
        extra_seed_weight: F64Array | None = None,
    ) -> Tables:
        """Build the null tables for per-site ``rates_hz`` (Hz), the sites counted
        (``live``: live somewhere in the bin; nonzero = yes) and the usable mask ``ok``.
        ``extra_seed_weight`` (N,): further evaluations per seed hit (the front's)."""
        n = self.n_sites
        ok = np.asarray(ok, dtype=bool) & (np.asarray(live) != 0)
        lam = np.where(ok, rates_hz, 0.0) * 1e-9  # per ns
        weight: F64Array = (
            np.zeros(n) if extra_seed_weight is None else extra_seed_weight.astype(np.float64)
        )
        not_self = self._not_self
        scales: list[ScaleTables] = []
        prev_e = np.full(n, np.nan)
        for k in range(self.geom.scales_ns.size):
            # A site too busy to count as a neighbour at this scale does not seed
            # either: its hits would re-find every cluster of quieter sites.
            quiet = -np.expm1(-lam * self._mean_w[k]) <= self.cfg.occupancy_cap
            may = ok & quiet & (lam > 0)
            if not may.any() or (
                self.skip_by_bounds and self._surely_inactive(k, lam, may, prev_e)
            ):  # no seed site can be active: no N x N tables
                scales.append(_inactive_scale(n))
                continue
            occ = -np.expm1(-lam[None, :] * self.geom.width[k])
            allowed = not_self & (occ <= self.cfg.occupancy_cap) & ok[None, :] & ok[:, None]
            q = np.where(allowed, occ, 0.0)
            e = q.sum(axis=1)
            ratio = self.cfg.redundancy_ratio
            fresh = np.isnan(prev_e) | (e >= ratio * prev_e) | (e * ratio <= prev_e)
            enough = allowed.sum(axis=1) >= self.cfg.min_multiplicity - 1
            # A multiplicity test where chance alone fills many slots has no power
            # (that is the excess trigger's ground): not evaluated, not a trial.
            sparse = e <= self.cfg.max_expected_neighbours
            active = may & fresh & enough & sparse
            prev_e = np.where(active, e, prev_e)
            tail_gt, point = _null_tables(q, active, e)
            slots = None  # nothing is evaluated at this scale
            if active.any():
                slots = self._slots(k, q)
            scales.append(ScaleTables(active, tail_gt, point, slots))
            weight = weight + active.astype(np.float64)
        weight = np.where(lam > 0, weight, 0.0)
        return Tables(lam, tuple(scales), weight, float(np.dot(lam, weight)) * 1e9)

    def evaluate(
        self,
        t: I64Array,
        site: I32Array,
        seed_lo: int,
        seed_hi: int,
        tables: Tables,
        scale_index: int,
        *,
        p_max: float,
        clock: LiveClock | None = None,
        prev: I64Array | None = None,
    ) -> SeedResult:
        """Evaluate seeds ``t[seed_lo:seed_hi]`` at one scale; keep those with p <= p_max
        and multiplicity >= ``min_multiplicity``. ``t`` must hold every hit within the
        slots of those seeds. ``clock`` gives the sites' live time (offsets in slots
        with dead time are measured on the live clock); None: every site is live
        throughout. ``prev``: for every hit of ``t``, the time (GPS ns) of the previous
        hit of the same site (:func:`previous_same_site`; any time before ``t[0]`` may
        stand for "none"), when the caller keeps it; None: computed here."""
        st = tables.scales[scale_index]
        k = scale_index
        seed_pos = np.arange(seed_lo, seed_hi, dtype=np.int64)
        seed_pos = seed_pos[st.active[site[seed_pos]]]
        empty = np.zeros(0, dtype=np.int64)
        if seed_pos.size == 0:
            return SeedResult(k, empty, np.zeros(0), empty, empty, empty)
        slots = st.slots
        if slots is None:  # seeds are only evaluated where some seed site is active
            raise RuntimeError(f"scale {k} has active seeds but no slot tables")
        t_seed = t[seed_pos]
        # Only the stretch these seeds' slots can reach: a previous hit before it is
        # before every slot start, so "no previous hit" decides the same.
        i_lo = int(np.searchsorted(t, int(t_seed[0]) - self.geom.back_ns, side="left"))
        i_hi = int(np.searchsorted(t, int(t_seed[-1]) + self.geom.ahead_ns[k], side="right"))
        # Restrict the stream to sites that can count at this scale.
        sub = i_lo + np.flatnonzero(slots.as_neighbour[site[i_lo:i_hi]])
        t_sub, s_sub = t[sub], site[sub]
        prev_sub = previous_same_site(t_sub, s_sub) if prev is None else prev[sub]
        n_seed = seed_pos.size
        ss = site[seed_pos]
        # the number of other sites in each seed's slots (compiled, no pair arrays);
        # -1 where the seed's search span holds too few hits to pass
        kk = slot_counts(
            t_sub,
            s_sub.astype(np.int64),
            prev_sub,
            t_seed,
            ss.astype(np.int64),
            slots.edges,
            slots.counted,
            slots.rows,
            self.n_sites,
            self.geom.back_ns,
            self.geom.ahead_ns[k],
            st.need(p_max, self.cfg.min_multiplicity),
        )
        # p = P(K > k) + P(K = k) * (Fisher term in [0, 1]) >= P(K > k): only seeds
        # whose bound can pass need their offsets (most cannot).
        maybe = (kk >= 0) & (st.tail_gt[ss, st.column(np.maximum(kk, 0))] <= p_max)
        maybe &= kk + 1 >= self.cfg.min_multiplicity
        idx_m = np.flatnonzero(maybe)
        if idx_m.size == 0:
            return SeedResult(k, empty, np.zeros(0), empty, empty, empty)
        pr = window_pairs(
            t_sub, t_seed[idx_m], back_ns=self.geom.back_ns, ahead_ns=self.geom.ahead_ns[k]
        )
        s_nb = s_sub[pr.nb]
        tp_seed = np.repeat(t_seed[idx_m], pr.counts)
        d = t_sub[pr.nb] - tp_seed  # int64 ns
        pair = np.repeat(ss[idx_m].astype(np.int64) * self.n_sites, pr.counts)
        pair += s_nb  # flat (seed site, site) index
        edges = slots.edges[pair]
        lo = edges[:, 0]
        # In the slot of a counted site (the upper edge folds in q > 0) ...
        keep = d <= edges[:, 1]
        keep &= d >= lo
        # ... and only the earliest hit of a site in the slot counts: a hit whose
        # site's previous hit is already inside the slot is not the earliest.
        keep &= prev_sub[pr.nb] - tp_seed < lo
        ix = np.flatnonzero(keep)
        g_seed = idx_m[pr.seed[ix]]
        g_nb = pr.nb[ix]
        s_nb = s_nb[ix]
        lo_m = lo[ix]
        pair = pair[ix]
        d = d[ix]
        lam = tables.rates_per_ns[s_nb]
        w = self.geom.width_flat[k].take(pair)
        off = (d - lo_m).astype(np.float64)  # offset into the slot (ns)
        if clock is not None:
            part = clock.partial_sites(
                int(t_seed[0]) - self.geom.back_ns,
                int(t_seed[-1]) + self.geom.ahead_ns[k] + 1,
            )
            pix = np.flatnonzero(part[s_nb])
            if pix.size:  # on the live clock where the site was dead for a while
                slot0 = t_seed[g_seed[pix]] + lo_m[pix]
                live = clock.live_ns(s_nb[pix].astype(np.int64), slot0, t_sub[g_nb[pix]])
                off[pix] = live
        u = -np.expm1(-lam * off) / -np.expm1(-lam * w)
        log_u = np.log(np.clip(u, 1e-300, 1.0))
        x = -np.bincount(g_seed, weights=log_u, minlength=n_seed)[idx_m]
        km, sm = kk[idx_m], ss[idx_m]
        col = st.column(km)
        p = st.tail_gt[sm, col] + st.point[sm, col] * fisher_combined_sf(-x, km)
        p = np.clip(p, 0.0, 1.0)
        idx = idx_m[p <= p_max]
        p = p[p <= p_max]
        sel = np.isin(g_seed, idx)
        remap = np.full(n_seed, -1, dtype=np.int64)
        remap[idx] = np.arange(idx.size)
        return SeedResult(
            k,
            seed_pos[idx],
            p,
            (kk[idx] + 1).astype(np.int64),
            remap[g_seed[sel]],
            sub[g_nb[sel]].astype(np.int64),
        )
