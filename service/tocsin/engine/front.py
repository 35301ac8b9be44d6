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

Within a multiplicity, closer fits rank higher: ``u_l = |residual_l| / δ_l`` is
uniform under the null, and ``p = P(M >= m+1) + P(M = m) P(Gamma(m-3) >= -sum ln u)``.
Calibration is checked against simulated background (``tests/test_calibration.py``).
"""

from __future__ import annotations

from dataclasses import dataclass
from math import comb

import numpy as np
from numpy.typing import NDArray

from tocsin.engine.direction import TripleSolution, seed_baselines, solve_triples
from tocsin.engine.pairs import window_pairs
from tocsin.engine.stats import fisher_combined_sf, pb_sf_table, poisson_binomial_pmf_rows
from tocsin.model.config import CoincidenceConfig
from tocsin.model.registry import SiteRegistry
from tocsin.types import C_M_PER_NS, BoolArray, F64Array, I32Array, I64Array

K_MAX = 12
"""Most neighbour hits per seed tried for fronts (the earliest in time)."""


@dataclass(frozen=True, slots=True)
class FrontResult:
    """Seeds whose best front passed ``p_max``, with the hits on the front."""

    scale_index: int
    seed_idx: I64Array
    p: F64Array
    multiplicity: I64Array
    nb_seed: I64Array
    """Group number of each hit in ``nb_idx``."""
    nb_idx: I64Array
    """Stream index of each partner and consistent hit (seed excluded)."""


class FrontSearch:
    """The ``front`` statistic at ``cfg.front_scales_s``."""

    def __init__(self, registry: SiteRegistry, cfg: CoincidenceConfig) -> None:
        self.cfg = cfg
        self.ecef = registry.ecef_m
        self.sigma = registry.clock_sigma_ns
        self.n_sites = len(registry)
        self.eligible: BoolArray = registry.clock_sigma_ns <= cfg.front_max_clock_ns
        r = registry.ecef_m
        light = np.linalg.norm(r[:, None, :] - r[None, :, :], axis=-1) / C_M_PER_NS
        comb_sig = np.sqrt(self.sigma[:, None] ** 2 + self.sigma[None, :] ** 2)
        self.scales_ns = np.array([round(w * 1e9) for w in cfg.front_scales_s], dtype=np.int64)
        self.lo = -np.ceil(cfg.clock_sigmas * comb_sig)
        base = np.ceil(light + cfg.clock_sigmas * comb_sig)
        self.hi = base[None] + self.scales_ns[:, None, None]
        el = self.eligible
        pair_el = el[:, None] & el[None, :]
        self.back_ns = int(-self.lo[pair_el].min()) if pair_el.any() else 0
        self.ahead_ns = [int(h[pair_el].max()) if pair_el.any() else 0 for h in self.hi]
        max_sig = float(self.sigma[el].max()) if el.any() else 0.0
        self._tol_base = cfg.clock_sigmas * max_sig

    def trial_rate_hz(self, rates_per_ns: F64Array, live_frac: F64Array) -> float:
        """Front seed evaluations per second that can yield a front (added to the
        coincidence FAR multiplier).

        The front p-value is conditional on the seed's neighbour hits and is 1
        when fewer than three other sites are in its slots, so only seeds with
        three or more count as trials: per front scale, seed rate times the
        Poisson-binomial probability of >= 3 occupied slots.
        """
        use = self.eligible & (rates_per_ns > 0)
        if use.sum() < 4:
            return 0.0
        lam = np.where(use, rates_per_ns, 0.0)
        f = np.where(use, np.clip(live_frac, 0.0, 1.0), 0.0)
        total = 0.0
        for k in range(self.scales_ns.size):
            width = self.hi[k] - self.lo[None, :, :][0]
            q = f[None, :] * -np.expm1(-lam[None, :] * width)
            q = np.where(use[None, :] & ~np.eye(self.n_sites, dtype=bool), q, 0.0)[use]
            tail = pb_sf_table(poisson_binomial_pmf_rows(q))
            p3 = tail[:, 3] if tail.shape[1] > 3 else np.zeros(q.shape[0])
            total += float(np.sum(lam[use] * f[use] * p3))
        return total * 1e9

    def evaluate(
        self,
        t: I64Array,
        site: I32Array,
        seed_lo: int,
        seed_hi: int,
        rates_per_ns: F64Array,
        *,
        p_max: float,
    ) -> list[FrontResult]:
        """Evaluate seeds ``t[seed_lo:seed_hi]`` at every front scale (one result per
        scale); keep seeds with p <= p_max and m >= 4. Triples are solved once, at
        the widest scale's slots, and re-used for the narrower ones."""
        n_f = self.scales_ns.size
        k_sig = self.cfg.clock_sigmas
        use = self.eligible & (rates_per_ns > 0)
        empty = np.zeros(0, dtype=np.int64)
        none = [FrontResult(f, empty, np.zeros(0), empty, empty, empty) for f in range(n_f)]
        seed_pos = np.arange(seed_lo, seed_hi, dtype=np.int64)
        seed_pos = seed_pos[use[site[seed_pos]]]
        if seed_pos.size == 0 or use.sum() < 4 or n_f == 0:
            return none
        wide = n_f - 1
        sub = np.flatnonzero(use[site])
        t_sub, s_sub = t[sub], site[sub]
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
        # seeds with >= 3 distinct neighbour sites
        first_site = np.unique(g * self.n_sites + sn)
        n_sites_per = np.bincount(first_site // self.n_sites, minlength=seed_pos.size)
        cand = np.flatnonzero(n_sites_per >= 3)
        if cand.size == 0:
            return none
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
        b_l = seed_baselines(self.ecef, seed_site, nsite)  # (n_c, kk, 3)
        # all pairs (a, b) of neighbour hits at distinct sites
        ia, ib = np.triu_indices(kk, 1)
        pm = valid[:, ia] & valid[:, ib] & (nsite[:, ia] != nsite[:, ib])
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
        ok_t = np.flatnonzero(sol.valid)
        if ok_t.size == 0:
            return none
        mg, a, b = mg[ok_t], a[ok_t], b[ok_t]
        sol = TripleSolution(
            n=sol.n[:, ok_t],
            valid=sol.valid[ok_t],
            clamped=sol.clamped[ok_t],
            n0=sol.n0[ok_t],
            e3=sol.e3[ok_t],
            alpha2=sol.alpha2[ok_t],
            u_j=sol.u_j[ok_t],
            u_k=sol.u_k[ok_t],
        )
        sa, sb = nsite[mg, a], nsite[mg, b]
        pred = sol.predict(b_l[mg], self.sigma[seed_site[mg]], self.sigma[sa], self.sigma[sb])
        base_delta = k_sig * np.sqrt(self.sigma[nsite[mg]][None] ** 2 + pred.sigma_ns**2)
        abs_resid = np.abs(dly[mg][None] - pred.delay_ns)
        others = valid[mg] & (nsite[mg] != sa[:, None]) & (nsite[mg] != sb[:, None])
        same_before = (
            (nsite[:, :, None] == nsite[:, None, :]) & np.triu(np.ones((kk, kk), dtype=bool), 1)
        )[mg].astype(np.int8)
        # Triples valid only thanks to a wider scale's tolerance are not valid at a
        # narrower one (same first-order slack as solve_triples, per scale).
        norm0 = np.linalg.norm(sol.n0, axis=1)
        xy = np.abs(np.einsum("mc,mc->m", sol.n0, sol.u_j)) + np.abs(
            np.einsum("mc,mc->m", sol.n0, sol.u_k)
        )
        excess_norm = np.where(sol.alpha2 < 0.0, norm0 - 1.0, 0.0)
        out: list[FrontResult] = []
        for f in range(n_f):
            tol_f = self._tol_base + float(self.scales_ns[f])
            trip_ok = excess_norm <= C_M_PER_NS * tol_f * xy / np.maximum(norm0, 1e-300)
            in_slot = valid & (dly <= self.hi[f][seed_site[:, None], nsite])
            res = self._at_scale(
                f,
                n_c,
                kk,
                mg,
                a,
                b,
                hit,
                sub,
                seed_pos,
                cand,
                seed_site,
                nsite,
                in_slot,
                others,
                base_delta,
                abs_resid,
                same_before,
                trip_ok,
                p_max,
            )
            out.append(res)
        return out

    def _at_scale(
        self,
        f: int,
        n_c: int,
        kk: int,
        mg: I64Array,
        a: I64Array,
        b: I64Array,
        hit: I64Array,
        sub: I64Array,
        seed_pos: I64Array,
        cand: I64Array,
        seed_site: I64Array,
        nsite: I64Array,
        in_slot: BoolArray,
        others: BoolArray,
        base_delta: F64Array,
        abs_resid: F64Array,
        same_before: NDArray[np.int8],
        trip_ok: BoolArray,
        p_max: float,
    ) -> FrontResult:
        w_ns = float(self.scales_ns[f])
        empty = np.zeros(0, dtype=np.int64)
        none = FrontResult(f, empty, np.zeros(0), empty, empty, empty)
        pair_in = in_slot[mg, a] & in_slot[mg, b] & trip_ok
        if not pair_in.any():
            return none
        delta = base_delta + w_ns
        oth = others & in_slot[mg] & pair_in[:, None]
        cons = (abs_resid <= delta) & oth[None]
        dup = np.einsum("pmj,mjk->pmk", cons.astype(np.int8), same_before) > 0
        cons1 = cons & ~dup
        mult = np.where(pair_in[None], 3 + cons1.sum(axis=-1), 0)  # (2, M)
        u = np.where(cons1, abs_resid / delta, 1.0)
        log_u = np.log(np.clip(u, 1e-300, 1.0)).sum(axis=-1)  # (2, M)
        score = mult + 1e-6 * (-log_u)  # multiplicity first, then closeness of fit
        flat_score = score.reshape(-1)
        flat_seed = np.tile(mg, 2)
        order = np.lexsort((-flat_score, flat_seed))
        _, firsts = np.unique(flat_seed[order], return_index=True)
        best = order[firsts]
        best_seed = flat_seed[best]
        best_m = mult.reshape(-1)[best]
        strong = best_m >= 4
        if not strong.any():
            return none
        # null tail sums over every pair and solution of the strong seeds
        seed_m = np.zeros(n_c, dtype=np.int64)
        seed_m[best_seed] = best_m
        rows_seed = np.tile(mg, 2)
        rows_use = (seed_m[rows_seed] >= 4) & np.tile(pair_in, 2)
        width = (
            self.hi[f][seed_site[mg], :][np.arange(mg.size)[:, None], nsite[mg]]
            - self.lo[seed_site[mg][:, None], nsite[mg]]
        )
        rho = np.where(oth[None], np.clip(2.0 * delta / width[None], 0.0, 1.0), 0.0)
        rrho = rho.reshape(-1, kk)[rows_use]
        rseed = rows_seed[rows_use]
        tail = pb_sf_table(poisson_binomial_pmf_rows(rrho))
        m_r = seed_m[rseed]
        rix = np.arange(rseed.size)
        e_m = np.bincount(rseed, weights=tail[rix, np.minimum(m_r - 3, kk + 1)], minlength=n_c)
        e_m1 = np.bincount(rseed, weights=tail[rix, np.minimum(m_r - 2, kk + 1)], minlength=n_c)
        bs = best_seed[strong]
        mm = best_m[strong]
        c_m = np.array([comb(int(x) - 1, 2) for x in mm], dtype=float)
        c_m1 = np.array([comb(int(x), 2) for x in mm], dtype=float)
        p_ge = -np.expm1(-e_m[bs] / c_m)
        p_ge1 = -np.expm1(-e_m1[bs] / c_m1)
        lu = log_u.reshape(-1)[best[strong]]
        p = p_ge1 + np.maximum(p_ge - p_ge1, 0.0) * fisher_combined_sf(lu, mm - 3)
        p = np.clip(p, 0.0, 1.0)
        ok = p <= p_max
        if not ok.any():
            return none
        bs, mm, p = bs[ok], mm[ok], p[ok]
        rows = best[strong][ok]
        sol_i, trip = rows // mg.size, rows % mg.size
        groups: list[I64Array] = []
        owners: list[I64Array] = []
        for j in range(bs.size):  # only passing seeds: few
            tr = int(trip[j])
            members = np.concatenate(
                [[hit[mg[tr], a[tr]], hit[mg[tr], b[tr]]], hit[mg[tr]][cons1[sol_i[j], tr]]]
            )
            groups.append(sub[members].astype(np.int64))
            owners.append(np.full(members.size, j, dtype=np.int64))
        return FrontResult(
            f,
            seed_pos[cand[bs]],
            p,
            mm.astype(np.int64),
            np.concatenate(owners),
            np.concatenate(groups),
        )
