"""Compiled screen for the front search: a lower bound on each seed's front p-value.

The front statistic (:mod:`tocsin.engine.front`) solves a plane front for every
pair of a seed's neighbour hits and both mirror solutions, and counts the further
hits each predicts. In numpy that is a dozen (rows x neighbours) arrays per seed
and the bulk of the engine's time, although almost every seed ends far above any
reporting threshold. This module does the same per-row arithmetic in one compiled
pass per seed (numba, no Python per hit) and returns, per seed and front scale,

    B = min over rows with m >= 4 of  G(log_u, m - 3) * (1 - exp(-prod(rho) / C(m - 1, 2))),

the smallest of the per-row lower bounds that :meth:`FrontSearch._at_scale`
applies to its best row (``keep``). Since the best row is one of the rows, ``B``
is at most that bound, and every further step of the exact p only raises it, so a
seed with ``B > p_max`` cannot pass and need not be searched in numpy. ``B`` is
reported only where it is at most the caller's ``limit`` (``inf`` elsewhere): a row
whose cheap lower bound ``u z (1 - z/2)`` (no logarithms, no exponentials) shows it
can get below neither ``limit`` nor the rows already seen is not worked out, and
that skips most of the rows' transcendental work.

Conservative by construction, so the candidates do not change:

* ``rho`` uses each slot's full width; dead time only shortens the width that the
  exact search uses and so raises its ``rho`` and its bound;
* a seed is kept when ``B <= p_max * (1 + BOUND_MARGIN)``: rounding differences
  between this loop and numpy's vector arithmetic (~1e-16 relative) cannot drop it;
* kept seeds go through the unchanged numpy search, which alone decides.

The discrete choices inside (a triple usable, a hit consistent with a front) are
the same comparisons as numpy's, on values that agree to ~1e-16 relative; the
collinearity test errs towards keeping. Only a hit lying on a tolerance edge to
the last bit could be judged differently: not ruled out, but not seen (the
candidates of a 150 s, 1000-site bench replay and of the shipped recording are
byte-identical with and without the screen).

``tests/test_front_bound.py`` checks that the screened search returns exactly the
unscreened one on dense data with many seeds near the threshold.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from tocsin.engine.jit import kernel
from tocsin.types import C_M_PER_NS, BoolArray, F64Array, I32Array, I64Array

BOUND_MARGIN = 1.0e-6
"""Relative margin on ``p_max`` before a seed is screened out (rounding only)."""

_NO_BOUND = math.inf
EDGE_NS = 1.0e-6
"""A slot edge computed within this (ns) of an integer is read from the pair table
(:func:`_seed_bounds`)."""


class FrontGeometry(NamedTuple):
    """What the kernels read about the network, passed as one tuple."""

    ecef: F64Array
    """(N, 3) site positions (m, ECEF)."""
    up: F64Array
    """(N, 3) local up unit vectors."""
    sigma: F64Array
    """(N,) clock 1-sigma (ns)."""
    pair_ns: I32Array
    """(N, N, 2) per (seed site, site) pair of front-eligible sites: the slot's lower
    edge ``lo`` and its upper edge without the scale, ``hi - W`` (integer ns, so
    ``hi`` at scale f is ``pair_ns[s, l, 1] + scales_ns[f]`` exactly; 0 for pairs
    with a site that takes no part). 8 bytes a pair: 1000 sites fit in 8 MB."""
    pos_ns: F64Array
    """(N, 3) site positions in light-ns (ECEF / c): a pair's light time without a
    look-up of the pair table."""
    k_sigma_ns: F64Array
    """(N,) ``k_sig`` times each site's clock sigma (ns)."""
    scales_ns: F64Array
    """(F,) front scales (ns)."""
    tol_base_ns: float
    """Clock part of the triple tolerance (ns); a scale's own width is added."""
    k_sig: float
    """Clock sigmas of a consistency window."""
    min_angle_deg: float
    """Smallest interior angle (deg) of a usable triangle."""
    horizon_slack: float
    """How far below a site's horizon (sine) a front may come from."""


@kernel
def _fisher_sf(log_u: float, k: int) -> float:
    """``P(Gamma(k, 1) >= -log_u)`` for integer ``k >= 1`` (1 for ``k <= 0``)."""
    if k <= 0:
        return 1.0
    x = -log_u
    term = 1.0
    total = 1.0
    for i in range(1, k):
        term *= x / i
        total += term
    return min(1.0, math.exp(-x) * total)


@kernel
def _seed_bounds(
    kk: int,
    nbs: I64Array,
    nbd: F64Array,
    s: int,
    out_row: F64Array,
    buf: F64Array,
    flags: BoolArray,
    cand: I64Array,
    slot_w: F64Array,
    slot_in: BoolArray,
    wide: int,
    geo: FrontGeometry,
    limit: float,
    from_table: bool,
) -> None:
    """Lower bounds (module doc) of one seed at site ``s`` into ``out_row`` (F,), from
    its ``kk`` neighbour hits at sites ``nbs[:kk]`` with delays ``nbd[:kk]`` (ns).
    ``buf`` (15, K), ``flags`` (3, K), ``cand`` (K,), ``slot_w`` (F, K) and
    ``slot_in`` (F, K) are scratch space (K >= kk). ``from_table``: read every slot
    edge from the pair table (the reference the computed edges are tested against)."""
    ecef, up, sigma, scales_ns = geo.ecef, geo.up, geo.sigma, geo.scales_ns
    tol_base_ns, k_sig = geo.tol_base_ns, geo.k_sig
    min_angle_deg, horizon_slack = geo.min_angle_deg, geo.horizon_slack
    c = C_M_PER_NS
    tol_wide = tol_base_ns + scales_ns[wide]
    blx, bly, blz = buf[0], buf[1], buf[2]
    delay, base_delta, abs_resid, sig2 = buf[3], buf[4], buf[5], buf[6]
    upx, upy, upz = buf[7], buf[8], buf[9]
    ulj, ulk, el3, blen, ratio = buf[10], buf[11], buf[12], buf[13], buf[14]
    sin_min = math.sin(math.radians(min_angle_deg)) * (1.0 - 1e-12)
    others, cons = flags[0], flags[2]
    ups0, ups1, ups2 = up[s, 0], up[s, 1], up[s, 2]
    ss = sigma[s]
    pos, k_sigma, pair_ns = geo.pos_ns, geo.k_sigma_ns, geo.pair_ns
    px, py, pz, k_s = pos[s, 0], pos[s, 1], pos[s, 2], k_sigma[s]
    # per neighbour hit, once per seed: baseline, local up, clock variance, and per
    # scale whether it is in its slot and the slot's full width
    for col in range(kk):
        site_l = nbs[col]
        blx[col] = ecef[s, 0] - ecef[site_l, 0]
        bly[col] = ecef[s, 1] - ecef[site_l, 1]
        blz[col] = ecef[s, 2] - ecef[site_l, 2]
        upx[col] = up[site_l, 0]
        upy[col] = up[site_l, 1]
        upz[col] = up[site_l, 2]
        sig2[col] = sigma[site_l] ** 2
        blen[col] = math.sqrt(blx[col] ** 2 + bly[col] ** 2 + blz[col] ** 2)
        if from_table:
            lo_l = float(pair_ns[s, site_l, 0])
            base_l = float(pair_ns[s, site_l, 1])
        else:
            # The slot edges -ceil(k sigma_pair) and ceil(light + k sigma_pair) from the
            # positions and clocks: the pair table is 8 MB at 1000 sites, and a read
            # of it a cache miss per neighbour hit. The computed values agree with
            # the table's to ~1e-9 ns, so their ceilings agree unless one lies within
            # EDGE_NS of an integer; that edge is read from the table.
            ks = math.sqrt(k_s * k_s + k_sigma[site_l] * k_sigma[site_l])
            dx, dy, dz = px - pos[site_l, 0], py - pos[site_l, 1], pz - pos[site_l, 2]
            x_hi = math.sqrt(dx * dx + dy * dy + dz * dz) + ks
            c_lo = float(math.ceil(ks))
            c_hi = float(math.ceil(x_hi))
            if c_lo - ks < EDGE_NS or ks - (c_lo - 1.0) < EDGE_NS:
                c_lo = -float(pair_ns[s, site_l, 0])
            if c_hi - x_hi < EDGE_NS or x_hi - (c_hi - 1.0) < EDGE_NS:
                c_hi = float(pair_ns[s, site_l, 1])
            lo_l = -c_lo
            base_l = c_hi
        for f in range(wide + 1):
            hi_f = base_l + scales_ns[f]
            slot_in[f, col] = nbd[col] <= hi_f
            slot_w[f, col] = hi_f - lo_l
    for a in range(kk):
        sa = nbs[a]
        for b in range(a + 1, kk):
            sb = nbs[b]
            if sa == sb:
                continue
            # --- the triple (seed, a, b), as solve_triples
            bj0, bj1, bj2 = blx[a], bly[a], blz[a]
            bk0, bk1, bk2 = blx[b], bly[b], blz[b]
            dj = nbd[a] * c
            dk = nbd[b] * c
            w0 = bj1 * bk2 - bj2 * bk1
            w1 = bj2 * bk0 - bj0 * bk2
            w2_ = bj0 * bk1 - bj1 * bk0
            w2 = w0 * w0 + w1 * w1 + w2_ * w2_
            if not (np.isfinite(w2) and w2 > 0.0):
                continue
            # smallest interior angle (as geometry.triangle_min_angle_deg, its sine)
            dx, dy, dz = bk0 - bj0, bk1 - bj1, bk2 - bj2
            l1, l2 = blen[a], blen[b]
            l3 = math.sqrt(dx * dx + dy * dy + dz * dz)
            lo_len = min(l1, l2, l3)
            hi_len = max(l1, l2, l3)
            mid = l1 + l2 + l3 - lo_len - hi_len
            denom = mid * hi_len
            sin_a = min(max(math.sqrt(w2) / denom, 0.0), 1.0) if denom > 0.0 else 0.0
            if sin_a < sin_min:
                continue  # nearly collinear (the threshold errs towards keeping)
            uj0 = (bk1 * w2_ - bk2 * w1) / w2
            uj1 = (bk2 * w0 - bk0 * w2_) / w2
            uj2 = (bk0 * w1 - bk1 * w0) / w2
            uk0 = (w1 * bj2 - w2_ * bj1) / w2
            uk1 = (w2_ * bj0 - w0 * bj2) / w2
            uk2 = (w0 * bj1 - w1 * bj0) / w2
            rw = math.sqrt(w2)
            e30, e31, e32 = w0 / rw, w1 / rw, w2_ / rw
            n00 = dj * uj0 + dk * uk0
            n01 = dj * uj1 + dk * uk1
            n02 = dj * uj2 + dk * uk2
            norm0 = math.sqrt(n00 * n00 + n01 * n01 + n02 * n02)
            alpha2 = 1.0 - norm0 * norm0
            x = n00 * uj0 + n01 * uj1 + n02 * uj2
            y = n00 * uk0 + n01 * uk1 + n02 * uk2
            xy = abs(x) + abs(y)
            over = alpha2 < 0.0
            if over and not (norm0 - 1.0 <= c * tol_wide * xy / norm0):
                continue
            alpha = 0.0 if over else math.sqrt(alpha2)
            scale0 = 1.0 / norm0 if (over and norm0 > 0.0) else 1.0
            excess_norm = norm0 - 1.0 if over else 0.0
            sj, sk = sigma[sa], sigma[sb]
            s_alpha2 = 2.0 * c * math.sqrt((x * sj) ** 2 + (y * sk) ** 2 + ((x + y) * ss) ** 2)
            alpha_r = math.sqrt(max(alpha2, 0.0) + s_alpha2)
            inv_alpha = 1.0 / alpha_r if alpha_r > 0.0 else 0.0
            # the triple's own projections of every further hit's baseline (the same
            # for both mirror solutions); the triple's own sites never count
            n_cand = 0
            for col in range(kk):
                site_l = nbs[col]
                if site_l != sa and site_l != sb:
                    cand[n_cand] = col
                    n_cand += 1
                    bx, by, bz = blx[col], bly[col], blz[col]
                    ulj[col] = bx * uj0 + by * uj1 + bz * uj2
                    ulk[col] = bx * uk0 + by * uk1 + bz * uk2
                    el3[col] = bx * e30 + by * e31 + bz * e32
            if n_cand == 0:
                continue
            for mirror in range(2):
                sign = 1.0 if mirror == 0 else -1.0
                nv0 = n00 * scale0 + sign * alpha * e30
                nv1 = n01 * scale0 + sign * alpha * e31
                nv2 = n02 * scale0 + sign * alpha * e32
                if nv0 * ups0 + nv1 * ups1 + nv2 * ups2 < -horizon_slack:
                    continue
                # --- predictions for every further hit (as _predict_rows)
                any_other = False
                for p in range(n_cand):
                    col = cand[p]
                    others[col] = False
                    if nv0 * upx[col] + nv1 * upy[col] + nv2 * upz[col] < -horizon_slack:
                        continue  # the source is below this site's horizon
                    others[col] = True
                    any_other = True
                    delay[col] = (nv0 * blx[col] + nv1 * bly[col] + nv2 * blz[col]) / c
                    el = el3[col] * inv_alpha
                    g_j = ulj[col] - sign * (x * el)
                    g_k = ulk[col] - sign * (y * el)
                    var = ((1.0 - g_j - g_k) * ss) ** 2 + (g_j * sj) ** 2 + (g_k * sk) ** 2
                    base_delta[col] = k_sig * math.sqrt(sig2[col] + var)
                    abs_resid[col] = abs(nbd[col] - delay[col])
                if not any_other:
                    continue
                # --- every scale up to the widest (as _at_scale, best row -> any row)
                for f in range(wide + 1):
                    w_ns = scales_ns[f]
                    tol_f = tol_base_ns + w_ns
                    if excess_norm > c * tol_f * xy / max(norm0, 1e-300):
                        continue
                    in_slot = slot_in[f]
                    width = slot_w[f]
                    if not (in_slot[a] and in_slot[b]):
                        continue
                    n_cons = 0
                    u_prod = 1.0
                    prod = 1.0
                    for p in range(n_cand):
                        col = cand[p]
                        delta = base_delta[col] + w_ns
                        ok = others[col] and in_slot[col] and abs_resid[col] <= delta
                        if ok:  # an earlier consistent hit of the same site wins
                            site_l = nbs[col]
                            for q in range(p):
                                e = cand[q]
                                if cons[e] and nbs[e] == site_l:
                                    ok = False
                                    break
                        cons[col] = ok
                        if ok:
                            n_cons += 1
                            ratio[col] = abs_resid[col] / delta
                            u_prod *= ratio[col]
                            prod *= min(max(2.0 * delta / width[col], 0.0), 1.0)
                    if n_cons == 0:
                        continue
                    m = 3 + n_cons
                    c_m = (m - 1) * (m - 2) / 2.0
                    z = prod / c_m
                    # The row's bound G(log u, m - 3) (1 - exp(-z)) is at least
                    # u z (1 - z / 2) (G >= exp(log u) = u; 1 - exp(-z) >= z - z^2 / 2):
                    # a row that cannot get below what is already recorded, nor below
                    # ``limit``, is not worked out (logs and exponentials are most of
                    # a row's cost). The margin covers the rounding of u and of the
                    # exact row (~1e-15 relative); below 1e-290 u is not trusted.
                    lower = u_prod * z * (1.0 - 0.5 * z)
                    if u_prod > 1e-290 and lower > min(out_row[f], limit) * (1.0 + 1e-12):
                        continue
                    log_u = 0.0
                    for p in range(n_cand):
                        col = cand[p]
                        if cons[col]:
                            log_u += math.log(max(ratio[col], 1e-300))
                    bound = _fisher_sf(log_u, m - 3) * -math.expm1(-z)
                    if bound <= limit and bound < out_row[f]:
                        out_row[f] = bound


@kernel
def front_lower_bounds(
    t: I64Array,
    site: I64Array,
    t_seed: I64Array,
    seed_site: I64Array,
    back_ns: int,
    ahead_ns: int,
    k_max: int,
    wide: int,
    geo: FrontGeometry,
    limit: float,
    from_table: bool = False,
) -> F64Array:
    """Lower bound ``B`` (module doc) per seed and front scale where it is at most
    ``limit``; ``inf`` elsewhere, and where the seed has fewer than three other sites
    in its slots, no row reaches m >= 4, or the scale is above ``wide``.

    ``t`` (sorted, GPS ns) and ``site`` are the hits of the sites that take part;
    ``t_seed`` (sorted) and ``seed_site`` the seeds. A seed's neighbour hits are, as
    in :meth:`FrontSearch._evaluate_wide`, the hits within ``[t_seed - back_ns,
    t_seed + ahead_ns]`` at other sites inside their slot at scale ``wide``
    (``lo <= delay <= hi[wide]``), the earliest ``k_max`` of them. ``geo``: the
    network (:class:`FrontGeometry`); triples are solved with the tolerance of scale
    ``wide``, as the exact search does. ``from_table``: every slot edge read from
    ``geo.pair_ns`` rather than computed (same results; for tests).
    """
    n_seed = t_seed.size
    ecef, pair_ns, scales_ns = geo.ecef, geo.pair_ns, geo.scales_ns
    pos, k_sigma = geo.pos_ns, geo.k_sigma_ns
    w_wide = scales_ns[wide]
    out = np.full((n_seed, scales_ns.size), _NO_BOUND)
    nbs = np.empty(k_max, dtype=np.int64)
    nbd = np.empty(k_max)
    buf = np.empty((15, k_max))
    slot_w = np.empty((scales_ns.size, k_max))
    slot_in = np.zeros((scales_ns.size, k_max), dtype=np.bool_)
    flags = np.zeros((3, k_max), dtype=np.bool_)
    cand = np.empty(k_max, dtype=np.int64)  # the further hits of a triple
    distinct = np.zeros(ecef.shape[0], dtype=np.int64)  # last seed (+1) that saw a site
    left = 0
    n = t.size
    for i in range(n_seed):
        ts = t_seed[i]
        s = seed_site[i]
        while left < n and t[left] < ts - back_ns:
            left += 1
        j = left
        end = ts + ahead_ns
        kk = 0
        n_distinct = 0
        px, py, pz, k_s = pos[s, 0], pos[s, 1], pos[s, 2], k_sigma[s]
        while j < n and t[j] <= end and kk < k_max:
            sl = site[j]
            j += 1
            if sl == s:
                continue
            d = float(t[j - 1] - ts)
            # In the slot at scale ``wide``: lo <= d <= hi, with lo <= 0 and
            # hi = ceil(light + k sigma_pair) + W, sigma_pair <= sigma_s + sigma_l.
            # The light time from the positions (good to ~1e-8 ns) decides all but
            # hits within a few clock sigmas of the upper edge without reading the
            # pair table (a cache miss per hit); those, and hits before the seed,
            # read it.
            if d < 0.0:
                inside = d >= pair_ns[s, sl, 0]
            else:
                dx, dy, dz = px - pos[sl, 0], py - pos[sl, 1], pz - pos[sl, 2]
                light = math.sqrt(dx * dx + dy * dy + dz * dz)
                if d <= light - 1.0 + w_wide:
                    inside = True
                elif d > light + 2.0 + k_s + k_sigma[sl] + w_wide:
                    inside = False
                else:
                    inside = d <= pair_ns[s, sl, 1] + w_wide
            if inside:
                nbs[kk] = sl
                nbd[kk] = d
                kk += 1
                if distinct[sl] != i + 1:
                    distinct[sl] = i + 1
                    n_distinct += 1
        if n_distinct < 3:
            continue
        _seed_bounds(
            kk,
            nbs,
            nbd,
            s,
            out[i],
            buf,
            flags,
            cand,
            slot_w,
            slot_in,
            wide,
            geo,
            limit,
            from_table,
        )
    return out


def warm_up() -> None:
    """Load (or compile) the kernel now, on a tiny input (see
    :func:`tocsin.engine.slot_counts.warm_up`)."""
    one = np.zeros(1, dtype=np.int64)
    front_lower_bounds(
        one,
        one,
        one,
        one,
        0,
        0,
        1,
        0,
        FrontGeometry(
            np.zeros((1, 3)),
            np.zeros((1, 3)),
            np.zeros(1),
            np.zeros((1, 1, 2), dtype=np.int32),
            np.zeros((1, 3)),
            np.zeros(1),
            np.zeros(1),
            0.0,
            0.0,
            0.0,
            0.0,
        ),
        1.0,
    )
