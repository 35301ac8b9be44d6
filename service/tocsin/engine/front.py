"""Plane-front statistic: how many sites fit one front through a seed and two partners.

At continental baselines a forward slot is milliseconds wide, so with sites
counting tens of Hz several sites fall into any seed's slots by chance. The
power comes from consistency with one plane front (see CHECKS.md): a seed and
two partner hits fix a direction (:func:`tocsin.engine.direction.solve_triples`,
two mirror solutions), which predicts every further site's arrival to within
its clock error and the prediction error; a chance hit falls into such a narrow
slot rarely.

For a seed with neighbour hits ``A`` in its forward slots (at most
:data:`K_MAX`, the earliest), every pair (a, b) of hits at distinct sites and
both mirror solutions are tried; a further hit ``l`` is *consistent* when
``|Δt_l - pred_l| <= k sqrt(σ_l² + σ_pred²) + W``. The front multiplicity ``m``
counts the seed, a, b and the consistent further sites.

Null probability, conditional on ``A``: under the null each neighbour hit lies
uniformly in its slot of width ``|G_l|``, so it falls into the narrow slot with
probability ``ρ_l = min(1, 2 δ_l / |G_l|)``. For one pair and solution the
number of consistent further hits is Poisson-binomial(ρ); summing its tail
over all pairs and solutions counts a chance m-front once for each of the
``C(m-1, 2)`` pairs inside it, so (first-moment / union bound, accurate in the
tail where it matters)

    E_m = sum_{pairs, solutions} P(PB >= m - 3) / C(m - 1, 2),   P(M >= m) = 1 - exp(-E_m).

Dead time: a neighbour site dead for part of its slot has its hit uniform over
the live part, so ``|G_l|`` is then the slot's live length (the narrow slot's
live part is at most ``2 δ_l``, so ``ρ_l`` stays an upper bound). The closeness
``u_l`` below assumes the narrow slot (nanoseconds to microseconds) fully live;
a live-interval edge inside it is a chance of ~1e-6 per hit and is ignored.

Scales: a front scale ``W`` is evaluated for a seed site only while ``W`` is below
the longest light time from it to another eligible site. A wider tolerance makes
every partner's narrow slot about as wide as its whole slot, so the front adds
nothing to the ``sites`` count at that scale (and with many chance hits in its
slots the search costs ~100x more); such (site, scale) are not trials.

Within a multiplicity, closer fits rank higher: ``u_l = |residual_l| / δ_l`` is
uniform under the null, and ``p = P(M >= m+1) + P(M = m) P(Gamma(m-3) >= -sum ln u)``.
Calibration is checked against simulated background (``tests/test_calibration.py``).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from tocsin.engine.coincidence import SeedResult, SlotGeometry, concat_results
from tocsin.engine.direction import TripleSolution, seed_baselines, solve_triples
from tocsin.engine.front_bound import BOUND_MARGIN, FrontGeometry, front_lower_bounds
from tocsin.engine.front_bound import warm_up as warm_front_bound
from tocsin.engine.geometry import MIN_TRIANGLE_ANGLE_DEG, ellipsoid_up, pair_light_time_ns
from tocsin.engine.livetime import LiveClock
from tocsin.engine.pairs import window_pairs
from tocsin.engine.stats import (
    fisher_combined_sf,
    pb_sf_table,
    poisson_binomial_pmf_rows,
    poisson_binomial_pmf_top,
)
from tocsin.model.config import CoincidenceConfig
from tocsin.model.registry import SiteRegistry
from tocsin.types import C_M_PER_NS, BoolArray, F64Array, I32Array, I64Array

K_MAX = 12
"""Most neighbour hits per seed tried for fronts (the earliest in time)."""
HORIZON_SLACK = 0.087
"""A front may come from at most ~5 deg (sin 5 deg = 0.087) below a site's horizon:
room for the direction error of a triple; from further below it would have crossed
the Earth."""


_BUCKETS = ((3, 4), (5, 7), (8, K_MAX))
"""Seeds are evaluated in groups by their number of neighbour hits (inclusive ranges)."""
SEEDS_PER_PASS = 1 << 16
"""Most seeds searched in one pass: bounds the (seed, neighbour) pair arrays."""
ROWS_PER_PASS = 1 << 18
"""Most (triple, mirror solution) rows held at once (each row has ``K_MAX`` float
columns in a dozen arrays: ~0.3 GB at this size). A dense network puts up to
``2 C(K_MAX, 2) = 132`` rows on every seed, so seeds go in slices of bounded rows;
seeds are independent, so the results do not depend on the slicing."""


def _merge(parts: list[list[SeedResult]], n_f: int) -> list[SeedResult]:
    """Per front scale, the results of disjoint groups of seeds as one call gives them."""
    return [concat_results(f, [pt[f] for pt in parts]) for f in range(n_f)]


def _row_slices(n_nb: I64Array) -> list[slice]:
    """Consecutive slices of seeds (with ``n_nb`` neighbour hits each) holding at most
    about :data:`ROWS_PER_PASS` rows (two per pair of neighbour hits)."""
    rows = np.cumsum(n_nb * (n_nb - 1))
    if rows.size == 0:
        return []
    cuts = np.searchsorted(rows, np.arange(1, int(rows[-1]) // ROWS_PER_PASS + 1) * ROWS_PER_PASS)
    edges = np.unique(np.r_[0, cuts, rows.size]).tolist()
    return [slice(a, b) for a, b in itertools.pairwise(edges)]


def _pair_table(lo: F64Array, base_hi: F64Array, pair_el: BoolArray) -> I32Array:
    """(N, N, 2) int32 ``lo`` and ``hi - W`` (integer-valued ns) per pair of eligible
    sites, 0 elsewhere (:class:`FrontGeometry`). Eligible sites have clocks good to
    ``front_max_clock_ns`` and no two points on Earth are 43 ms of light apart, so
    the values are far inside int32; checked, as the kernels rely on it."""
    both = np.stack([np.where(pair_el, lo, 0.0), np.where(pair_el, base_hi, 0.0)], axis=2)
    limit = float(np.iinfo(np.int32).max)
    if not (np.all(np.abs(both) <= limit) and np.all(both == np.round(both))):
        bad = float(np.abs(both).max())
        raise ValueError(f"front slot edges must be integer ns within int32, got up to {bad!r}")
    out: I32Array = np.ascontiguousarray(both.astype(np.int32))
    return out


def _predict_rows(
    sol: TripleSolution,
    rm: I64Array,
    rp: I64Array,
    b_l: list[F64Array],
    sigma_s: F64Array,
    sigma_j: F64Array,
    sigma_k: F64Array,
) -> tuple[F64Array, F64Array]:
    """Predicted delay (ns) of every neighbour hit and its 1-sigma error, for rows
    (triple ``rm``, mirror solution ``rp``): :meth:`TripleSolution.predict` computed
    only for the rows needed, with the baselines ``b_l`` (R, kk) per component
    (cheaper than gathering (R, kk, 3) blocks)."""
    bx, by, bz = b_l
    n = sol.n[rp, rm]
    delay = (n[:, 0, None] * bx + n[:, 1, None] * by + n[:, 2, None] * bz) / C_M_PER_NS
    x = np.einsum("mc,mc->m", sol.n0, sol.u_j)
    y = np.einsum("mc,mc->m", sol.n0, sol.u_k)
    s_alpha2 = (
        2.0
        * C_M_PER_NS
        * np.sqrt((x * sigma_j) ** 2 + (y * sigma_k) ** 2 + ((x + y) * sigma_s) ** 2)
    )
    alpha_r = np.sqrt(np.maximum(sol.alpha2, 0.0) + s_alpha2)
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_alpha = np.where(alpha_r > 0.0, 1.0 / alpha_r, 0.0)
    uj, uk, e3 = sol.u_j[rm], sol.u_k[rm], sol.e3[rm]
    ul_j = bx * uj[:, 0, None] + by * uj[:, 1, None] + bz * uj[:, 2, None]
    ul_k = bx * uk[:, 0, None] + by * uk[:, 1, None] + bz * uk[:, 2, None]
    el = (bx * e3[:, 0, None] + by * e3[:, 1, None] + bz * e3[:, 2, None]) * inv_alpha[rm, None]
    sign = np.where(rp == 0, 1.0, -1.0)[:, None]
    g_j = ul_j - sign * (x[rm, None] * el)
    g_k = ul_k - sign * (y[rm, None] * el)
    ss, sj, sk = sigma_s[rm, None], sigma_j[rm, None], sigma_k[rm, None]
    var = ((1.0 - g_j - g_k) * ss) ** 2 + (g_j * sj) ** 2 + (g_k * sk) ** 2
    return delay, np.sqrt(var)


def _dot3(x: F64Array, y: F64Array) -> F64Array:
    """Dot product over a last axis of length 3, broadcasting the others."""
    out: F64Array = x[..., 0] * y[..., 0] + x[..., 1] * y[..., 1] + x[..., 2] * y[..., 2]
    return out


class FrontSearch:
    """The ``front`` statistic at ``cfg.front_scales_s``."""

    def __init__(self, registry: SiteRegistry, cfg: CoincidenceConfig) -> None:
        self.cfg = cfg
        self.ecef = registry.ecef_m
        self.up = ellipsoid_up(registry.ecef_m)
        self.sigma = registry.clock_sigma_ns
        self.n_sites = len(registry)
        self.eligible: BoolArray = registry.clock_sigma_ns <= cfg.front_max_clock_ns
        geom = SlotGeometry(registry, clock_sigmas=cfg.clock_sigmas, scales_s=cfg.front_scales_s)
        self.scales_ns, self.lo, self.hi = geom.scales_ns, geom.lo, geom.hi
        el = self.eligible
        pair_el = el[:, None] & el[None, :]
        self.back_ns = int(-self.lo[pair_el].min()) if pair_el.any() else 0
        self.ahead_ns = [int(h[pair_el].max()) if pair_el.any() else 0 for h in self.hi]
        max_sig = float(self.sigma[el].max()) if el.any() else 0.0
        # A front scale no narrower than every light time from a seed site leaves
        # the front no constraint beyond the sites count (each partner's narrow slot
        # is then about as wide as its whole slot): such (seed site, scale) are not
        # evaluated and not trials. Decided from geometry alone, so the null holds.
        light = np.where(pair_el, pair_light_time_ns(registry.ecef_m), 0.0)
        self.reach_ns: F64Array = light.max(axis=1)
        """(N,) longest light time (ns) from each site to another front-eligible site."""
        self.scale_active: BoolArray = el[None, :] & (
            self.scales_ns[:, None].astype(np.float64) < self.reach_ns[None, :]
        )
        """(F, N): front scale f is evaluated for seeds of site s."""
        # scales are sorted, so a site's active scales are the first few
        self.widest: I64Array = self.scale_active.sum(axis=0).astype(np.int64) - 1
        """(N,) index of each site's widest active front scale (-1: none)."""
        self._up_soa = [np.ascontiguousarray(self.up[:, c]) for c in range(3)]
        self._tol_base = cfg.clock_sigmas * max_sig
        self.screen = True
        """Skip seeds whose compiled lower bound (:mod:`tocsin.engine.front_bound`)
        shows they cannot pass; the results are the same either way (tested)."""
        self._geo = FrontGeometry(
            np.ascontiguousarray(self.ecef, dtype=np.float64),
            np.ascontiguousarray(self.up, dtype=np.float64),
            np.ascontiguousarray(self.sigma, dtype=np.float64),
            _pair_table(self.lo, geom.base_hi, pair_el),
            np.ascontiguousarray(self.ecef / C_M_PER_NS, dtype=np.float64),
            np.ascontiguousarray(cfg.clock_sigmas * self.sigma, dtype=np.float64),
            self.scales_ns.astype(np.float64),
            float(self._tol_base),
            float(self.cfg.clock_sigmas),
            MIN_TRIANGLE_ANGLE_DEG,
            HORIZON_SLACK,
        )
        warm_front_bound()

    def seed_weight(self, rates_per_ns: F64Array) -> F64Array:
        """Front evaluations per seed hit that can yield a front, per seed site (added
        to the coincidence FAR multiplier through ``Tables.seed_weight``).

        The front p-value is conditional on the seed's neighbour hits and is 1
        when fewer than three other sites are in its slots, so only seeds with
        three or more count as trials: per front scale active for the seed site
        (:attr:`scale_active`), the Poisson-binomial probability of >= 3 occupied
        slots, with every counted site (rate > 0) live over its whole slot (an upper
        bound at the edges of live time).
        """
        out = np.zeros(self.n_sites)
        use = self.eligible & (rates_per_ns > 0)
        if use.sum() < 4:
            return out
        lam = np.where(use, rates_per_ns, 0.0)
        for k in range(self.scales_ns.size):
            rows = np.flatnonzero(use & self.scale_active[k])
            if not rows.size:
                continue
            # the seed sites' rows only; sites not counted and the seed's own site
            # occupy nothing
            q = -np.expm1(-lam[None, :] * (self.hi[k][rows] - self.lo[rows]))
            q[:, ~use] = 0.0
            q[np.arange(rows.size), rows] = 0.0
            out[rows] += poisson_binomial_pmf_top(q, 3)[:, 3]  # P(K >= 3)
        return out

    def evaluate(
        self,
        t: I64Array,
        site: I32Array,
        seed_lo: int,
        seed_hi: int,
        rates_per_ns: F64Array,
        *,
        p_max: float,
        clock: LiveClock | None = None,
    ) -> list[SeedResult]:
        """Evaluate seeds ``t[seed_lo:seed_hi]`` at every front scale (one result per
        scale); keep seeds with p <= p_max and m >= 4. Triples are solved once, at
        the widest scale's slots, and re-used for the narrower ones. ``clock`` gives
        the sites' live time: a neighbour hit is uniform over the live part of its
        slot, so ``rho`` uses that length (None: every site live throughout)."""
        n_f = self.scales_ns.size
        use = self.eligible & (rates_per_ns > 0)
        empty = np.zeros(0, dtype=np.int64)
        none = [SeedResult(f, empty, np.zeros(0), empty, empty, empty) for f in range(n_f)]
        seed_pos = np.arange(seed_lo, seed_hi, dtype=np.int64)
        seed_pos = seed_pos[use[site[seed_pos]] & (self.widest[site[seed_pos]] >= 0)]
        if seed_pos.size == 0 or use.sum() < 4 or n_f == 0:
            return none
        if seed_pos.size > SEEDS_PER_PASS:  # memory: passes over slices of the seeds
            passes = [
                self._evaluate_positions(
                    t, site, seed_pos[i : i + SEEDS_PER_PASS], use, p_max, clock
                )
                for i in range(0, seed_pos.size, SEEDS_PER_PASS)
            ]
            return _merge(passes, n_f)
        return self._evaluate_positions(t, site, seed_pos, use, p_max, clock)

    def _evaluate_positions(
        self,
        t: I64Array,
        site: I32Array,
        seed_pos: I64Array,
        use: BoolArray,
        p_max: float,
        clock: LiveClock | None,
    ) -> list[SeedResult]:
        """:meth:`evaluate` for the seeds at stream positions ``seed_pos`` (ascending)."""
        n_f = self.scales_ns.size
        # Seeds grouped by their site's widest active scale: triples are solved at
        # that scale's slots, and only the scales up to it are evaluated.
        wides = self.widest[site[seed_pos]]
        groups = np.unique(wides)
        if groups.size == 1:
            return self._evaluate_wide(t, site, seed_pos, int(groups[0]), use, p_max, clock)
        parts = [
            self._evaluate_wide(t, site, seed_pos[wides == w], int(w), use, p_max, clock)
            for w in groups
        ]
        return _merge(parts, n_f)

    def _evaluate_wide(
        self,
        t: I64Array,
        site: I32Array,
        seed_pos: I64Array,
        wide: int,
        use: BoolArray,
        p_max: float,
        clock: LiveClock | None,
    ) -> list[SeedResult]:
        """:meth:`evaluate` for seeds ``seed_pos`` whose widest active scale is ``wide``."""
        n_f = self.scales_ns.size
        empty = np.zeros(0, dtype=np.int64)
        none = [SeedResult(f, empty, np.zeros(0), empty, empty, empty) for f in range(n_f)]
        i_lo = int(np.searchsorted(t, int(t[seed_pos[0]]) - self.back_ns, side="left"))
        i_hi = int(np.searchsorted(t, int(t[seed_pos[-1]]) + self.ahead_ns[wide], side="right"))
        sub = i_lo + np.flatnonzero(use[site[i_lo:i_hi]])
        t_sub, s_sub = t[sub], site[sub]
        if self.screen:
            seed_pos = seed_pos[
                self._screen(t_sub, s_sub, t[seed_pos], site[seed_pos], wide, p_max)
            ]
            if seed_pos.size == 0:
                return none
        t_seed = t[seed_pos]
        s_seed_all = site[seed_pos]
        pr = window_pairs(t_sub, t_seed, back_ns=self.back_ns, ahead_ns=self.ahead_ns[wide])
        ss = s_seed_all[pr.seed]
        sn = s_sub[pr.nb]
        d = (t_sub[pr.nb] - t_seed[pr.seed]).astype(np.float64)
        keep = (sn != ss) & (d >= self.lo[ss, sn]) & (d <= self.hi[wide][ss, sn])
        g, nbi, sn, d = pr.seed[keep], pr.nb[keep], sn[keep], d[keep]
        if g.size == 0:
            return none
        # rank within each seed's group (groups are contiguous, in time order)
        starts = np.flatnonzero(np.r_[True, g[1:] != g[:-1]])
        gsize = np.diff(np.r_[starts, g.size])
        rank = np.arange(g.size) - np.repeat(starts, gsize)
        kmask = rank < K_MAX
        g, nbi, sn, d, rank = g[kmask], nbi[kmask], sn[kmask], d[kmask], rank[kmask]
        # seeds with >= 3 distinct neighbour sites (a sort: cheaper than np.unique's hash)
        key = np.sort(g * self.n_sites + sn)
        first_site = key[np.r_[True, key[1:] != key[:-1]]]
        n_sites_per = np.bincount(first_site // self.n_sites, minlength=seed_pos.size)
        cand = np.flatnonzero(n_sites_per >= 3)
        if cand.size == 0:
            return none
        # Seeds in buckets of similar neighbour counts: each bucket's tables are only
        # as wide as its seeds need (most seeds of a dense array have 3-4 hits, a few
        # many). Seeds are independent, so this changes nothing but the padding.
        n_nb = np.bincount(g, minlength=seed_pos.size)[cand]
        parts: list[list[SeedResult]] = []
        for lo_n, hi_n in _BUCKETS:
            in_b = (n_nb >= lo_n) & (n_nb <= hi_n)
            sel_b = cand[in_b]
            for sl in _row_slices(n_nb[in_b]):
                sel_c = sel_b[sl]
                parts.append(
                    self._evaluate_seeds(
                        sel_c,
                        g,
                        nbi,
                        sn,
                        d,
                        rank,
                        seed_pos,
                        t_seed,
                        s_seed_all,
                        sub,
                        p_max,
                        clock,
                        wide,
                    )
                )
        return _merge(parts, n_f)

    def _screen(
        self,
        t_sub: I64Array,
        s_sub: I32Array,
        t_seed: I64Array,
        s_seed: I32Array,
        wide: int,
        p_max: float,
    ) -> BoolArray:
        """Which seeds (times ``t_seed``, sites ``s_seed``) may pass: their compiled
        lower bound on the front p-value (:mod:`tocsin.engine.front_bound`) at some
        scale is within :data:`BOUND_MARGIN` of ``p_max``. The others cannot pass."""
        limit = p_max * (1.0 + BOUND_MARGIN)
        bounds = front_lower_bounds(
            t_sub,
            s_sub.astype(np.int64),
            t_seed,
            s_seed.astype(np.int64),
            self.back_ns,
            self.ahead_ns[wide],
            K_MAX,
            wide,
            self._geo,
            limit,
        )
        ok: BoolArray = np.asarray((bounds <= limit).any(axis=1))
        return ok

    def _evaluate_seeds(
        self,
        cand: I64Array,
        g: I64Array,
        nbi: I64Array,
        sn: I64Array,
        d: F64Array,
        rank: I64Array,
        seed_pos: I64Array,
        t_seed: I64Array,
        s_seed_all: I32Array,
        sub: I64Array,
        p_max: float,
        clock: LiveClock | None,
        wide: int,
    ) -> list[SeedResult]:
        """The front statistic at scales 0 .. ``wide`` for seeds ``cand`` (positions in
        ``seed_pos``) from their neighbour hits (flat ``g``, ``nbi``, ... as built by
        :meth:`evaluate`); the wider scales' results are empty."""
        n_f = self.scales_ns.size
        k_sig = self.cfg.clock_sigmas
        empty = np.zeros(0, dtype=np.int64)
        none = [SeedResult(f, empty, np.zeros(0), empty, empty, empty) for f in range(n_f)]
        remap = np.full(seed_pos.size, -1, dtype=np.int64)
        remap[cand] = np.arange(cand.size)
        sel = remap[g] >= 0
        gg, nbi, sn, d, rank = remap[g[sel]], nbi[sel], sn[sel], d[sel], rank[sel]
        n_c = cand.size
        kk = int(rank.max()) + 1
        valid = np.zeros((n_c, kk), dtype=bool)
        hit = np.zeros((n_c, kk), dtype=np.int64)
        nsite = np.zeros((n_c, kk), dtype=np.int64)
        dly = np.zeros((n_c, kk))
        valid[gg, rank] = True
        hit[gg, rank] = nbi
        nsite[gg, rank] = sn
        dly[gg, rank] = d
        seed_site = s_seed_all[cand].astype(np.int64)
        # neighbour hits of sites dead for part of the search stretch: their slots'
        # live length replaces the width (rho is then an upper bound, see module doc)
        pr_row = pr_col = empty
        if clock is not None:
            part = clock.partial_sites(
                int(t_seed[0]) - self.back_ns, int(t_seed[-1]) + self.ahead_ns[wide] + 1
            )
            pr_row, pr_col = np.nonzero(valid & part[nsite])
        b_l = seed_baselines(self.ecef, seed_site, nsite)  # (n_c, kk, 3)
        # one hit per site: only seeds with two hits of one site need de-duplication
        same_seed = (nsite[:, :, None] == nsite[:, None, :]) & np.triu(
            np.ones((kk, kk), dtype=bool), 1
        )
        same_seed &= valid[:, :, None] & valid[:, None, :]
        dup_seed = same_seed.any(axis=(1, 2))
        # all pairs (a, b) of neighbour hits at distinct sites (valid columns are the
        # first n of each row; only seeds with a repeated site need the site test)
        ia, ib = np.triu_indices(kk, 1)
        n_valid = valid.sum(axis=1)
        pm = ib[None, :] < n_valid[:, None]
        dup_c = np.flatnonzero(dup_seed)
        if dup_c.size:
            pm[dup_c] &= nsite[dup_c][:, ia] != nsite[dup_c][:, ib]
        mg, mp = np.nonzero(pm)
        if mg.size == 0:
            return none
        a, b = ia[mp], ib[mp]
        sol = solve_triples(
            b_l[mg, a],
            b_l[mg, b],
            dly[mg, a],
            dly[mg, b],
            tol_ns=self._tol_base + float(self.scales_ns[wide]),
        )
        # A front comes from above the seed's horizon (from below it would have
        # crossed the Earth); mirror solutions more than HORIZON_SLACK below are dropped.
        up_s = self.up[seed_site[mg]]
        above = _dot3(sol.n, up_s[None]) >= -HORIZON_SLACK  # (2, M); NaN (invalid) -> False
        ok_t = np.flatnonzero(above.any(axis=0))
        if ok_t.size == 0:
            return none
        mg, a, b = mg[ok_t], a[ok_t], b[ok_t]
        sol = sol.take(ok_t)
        above = above[:, ok_t]
        sa, sb = nsite[mg, a], nsite[mg, b]
        # one row per (triple, mirror solution) above the seed's horizon, triple-major
        # so that the rows of one seed are contiguous
        rm, rp = np.nonzero(above.T)
        n_r = sol.n[rp, rm]  # (R, 3)
        rseed = mg[rm]
        nrow = nsite[rseed]  # (R, kk)
        delay, sig_pred = _predict_rows(
            sol,
            rm,
            rp,
            [np.ascontiguousarray(b_l[:, :, c])[rseed] for c in range(3)],
            self.sigma[seed_site[mg]],
            self.sigma[sa],
            self.sigma[sb],
        )
        base_delta = k_sig * np.sqrt(self.sigma[nrow] ** 2 + sig_pred**2)
        abs_resid = np.abs(dly[rseed] - delay)
        # a further site counts only if the source is above its horizon too
        up = self._up_soa
        above_l = (
            n_r[:, 0, None] * up[0][nrow]
            + n_r[:, 1, None] * up[1][nrow]
            + n_r[:, 2, None] * up[2][nrow]
        ) >= -HORIZON_SLACK
        others = valid[rseed] & (nrow != sa[rm][:, None]) & (nrow != sb[rm][:, None])
        others &= above_l
        dup_rows = np.flatnonzero(dup_seed[rseed])
        # Triples valid only thanks to a wider scale's tolerance are not valid at a
        # narrower one (same first-order slack as solve_triples, per scale).
        norm0 = np.linalg.norm(sol.n0, axis=1)
        xy = np.abs(np.einsum("mc,mc->m", sol.n0, sol.u_j)) + np.abs(
            np.einsum("mc,mc->m", sol.n0, sol.u_k)
        )
        excess_norm = np.where(sol.alpha2 < 0.0, norm0 - 1.0, 0.0)
        ts = _Triples(
            n_c=n_c,
            kk=kk,
            mg=mg,
            a=a,
            b=b,
            rm=rm,
            hit=hit,
            members=sub,
            seeds=seed_pos[cand],
            others=others,
            base_delta=base_delta,
            abs_resid=abs_resid,
            dup_rows=dup_rows,
            same_before=same_seed[mg[rm[dup_rows]]].astype(np.int8),
        )
        out: list[SeedResult] = []
        for f in range(n_f):
            if f > wide:
                out.append(none[f])
                continue
            tol_f = self._tol_base + float(self.scales_ns[f])
            trip_ok = excess_norm <= C_M_PER_NS * tol_f * xy / np.maximum(norm0, 1e-300)
            hi_f = self.hi[f][seed_site[:, None], nsite]
            in_slot = valid & (dly <= hi_f)
            width = np.where(valid, hi_f - self.lo[seed_site[:, None], nsite], 1.0)
            if pr_row.size and clock is not None:
                t_c = t_seed[cand][pr_row]
                slot0 = t_c + self.lo[seed_site[pr_row], nsite[pr_row, pr_col]].astype(np.int64)
                slot1 = t_c + hi_f[pr_row, pr_col].astype(np.int64)
                live = clock.live_ns(nsite[pr_row, pr_col], slot0, slot1)
                width[pr_row, pr_col] = np.maximum(live, 1).astype(np.float64)
            out.append(self._at_scale(f, ts, in_slot, width, trip_ok, p_max))
        return out

    def _at_scale(
        self,
        f: int,
        ts: _Triples,
        in_slot: BoolArray,
        width: F64Array,
        trip_ok: BoolArray,
        p_max: float,
    ) -> SeedResult:
        """The front statistic at scale ``f`` from triples solved once (see module doc)."""
        w_ns = float(self.scales_ns[f])
        empty = np.zeros(0, dtype=np.int64)
        none = SeedResult(f, empty, np.zeros(0), empty, empty, empty)
        mg, a, b, rm, kk = ts.mg, ts.a, ts.b, ts.rm, ts.kk
        pair_ok = in_slot[mg, a] & in_slot[mg, b] & trip_ok  # per triple
        if not pair_ok.any():
            return none
        pair_in = pair_ok[rm]  # per row
        delta = ts.base_delta + w_ns
        oth = ts.others & in_slot[mg[rm]] & pair_in[:, None]
        cons = (ts.abs_resid <= delta) & oth
        n_cons = cons.sum(axis=-1)
        if ts.dup_rows.size:  # an earlier consistent hit of the same site wins
            sel = np.flatnonzero(n_cons[ts.dup_rows] >= 2)
            if sel.size:
                rows = ts.dup_rows[sel]
                dup = np.einsum("rj,rjk->rk", cons[rows].astype(np.int8), ts.same_before[sel])
                cons[rows] &= dup == 0
                n_cons[rows] = cons[rows].sum(axis=-1)
        mult = np.where(pair_in, 3 + n_cons, 0)  # (R,)
        log_u = np.zeros(mult.size)
        rc = np.flatnonzero(n_cons > 0)
        log_u[rc] = np.where(
            cons[rc], np.log(np.maximum(ts.abs_resid[rc] / delta[rc], 1e-300)), 0.0
        ).sum(axis=-1)
        row_seed = mg[rm]
        # Best row per seed: multiplicity first, then closeness of fit; ties go to the
        # first row. Only rows with m >= 4 can make a front, and a seed's rows are
        # contiguous (triple-major), so a segmented maximum does it without sorting.
        strong = np.flatnonzero(mult >= 4)
        if strong.size == 0:
            return none
        score = mult[strong] + 1e-6 * (-log_u[strong])
        rs = row_seed[strong]
        seg = np.flatnonzero(np.r_[True, rs[1:] != rs[:-1]])
        top = np.repeat(np.maximum.reduceat(score, seg), np.diff(np.r_[seg, rs.size]))
        at_top = np.flatnonzero(score == top)
        first = at_top[np.r_[True, rs[at_top][1:] != rs[at_top][:-1]]]
        best = strong[first]
        best_m = mult[best]

        def rho(rows: I64Array) -> F64Array:
            """P(a uniform hit in its slot falls in the narrow slot), per row and hit."""
            r: F64Array = np.where(
                oth[rows], np.clip(2.0 * delta[rows] / width[row_seed[rows]], 0.0, 1.0), 0.0
            )
            return r

        # Exact lower bound to skip seeds that cannot pass: the best row's own
        # consistent sites give P(PB >= m-3) >= prod(rho) for that row, so
        # E_m >= prod(rho) / C(m-1, 2) and p >= G * (1 - exp(-E_m)).
        prod_b = np.prod(np.where(cons[best], rho(best), 1.0), axis=1)
        c_m = (best_m - 1) * (best_m - 2) / 2.0
        g_b = fisher_combined_sf(log_u[best], best_m - 3)
        keep = g_b * -np.expm1(-prod_b / c_m) <= p_max
        if not keep.any():
            return none
        best, best_m, c_m, g_b = best[keep], best_m[keep], c_m[keep], g_b[keep]
        bs = row_seed[best]
        # null tail sums over every (solution, pair) row of the surviving seeds
        seed_m = np.zeros(ts.n_c, dtype=np.int64)
        seed_m[bs] = best_m
        rows_use = np.flatnonzero((seed_m[row_seed] >= 4) & pair_in)
        rseed = row_seed[rows_use]
        tail = pb_sf_table(poisson_binomial_pmf_rows(rho(rows_use)))
        m_r = seed_m[rseed]
        rix = np.arange(rseed.size)
        e_m = np.bincount(rseed, weights=tail[rix, np.minimum(m_r - 3, kk + 1)], minlength=ts.n_c)
        e_m1 = np.bincount(rseed, weights=tail[rix, np.minimum(m_r - 2, kk + 1)], minlength=ts.n_c)
        c_m1 = best_m * (best_m - 1) / 2.0
        p_ge = -np.expm1(-e_m[bs] / c_m)
        p_ge1 = -np.expm1(-e_m1[bs] / c_m1)
        p = np.clip(p_ge1 + np.maximum(p_ge - p_ge1, 0.0) * g_b, 0.0, 1.0)
        ok = p <= p_max
        if not ok.any():
            return none
        best, bs, best_m, p = best[ok], bs[ok], best_m[ok], p[ok]
        groups: list[I64Array] = []
        owners: list[I64Array] = []
        for j in range(bs.size):  # only passing seeds: few
            tr = int(rm[best[j]])
            row = ts.hit[mg[tr]]
            members = np.concatenate([[row[a[tr]], row[b[tr]]], row[cons[best[j]]]])
            groups.append(ts.members[members].astype(np.int64))
            owners.append(np.full(members.size, j, dtype=np.int64))
        return SeedResult(
            f,
            ts.seeds[bs],
            p,
            best_m.astype(np.int64),
            np.concatenate(owners),
            np.concatenate(groups),
        )


@dataclass(frozen=True, slots=True)
class _Triples:
    """Triples of one evaluation, solved once and shared by every front scale.

    ``mg``, ``a``, ``b`` (M,): seed row and the two partner columns of each triple;
    ``hit`` (n_c, kk): stream index (into ``members``) of each neighbour hit;
    ``rm`` (R,): the triple of each row (a mirror solution above the seed's horizon);
    ``others`` (R, kk): neighbour hits at sites other than the triple's, with the
    source above their horizon; ``base_delta``, ``abs_resid`` (R, kk): clock
    tolerance k*sqrt(sigma_l^2 + sigma_pred^2) and |measured - predicted| delay, ns.
    """

    n_c: int
    kk: int
    mg: I64Array
    a: I64Array
    b: I64Array
    rm: I64Array
    hit: I64Array
    members: I64Array
    seeds: I64Array
    others: BoolArray
    base_delta: F64Array
    abs_resid: F64Array
    dup_rows: I64Array
    same_before: NDArray[np.int8]
