"""Counting statistics for the triggers: pure, vectorised numpy/scipy functions.

Every function takes array-like input, broadcasts, and returns float64 arrays
(0-d for scalar input). Probabilities are computed from special functions in the
form that keeps tail values accurate (no ``1 - cdf`` subtraction).

Sources:

* Poisson and Poisson-binomial tails: textbook definitions.
* On/off excess significance: T.-P. Li & Y.-Q. Ma 1983, ApJ 272, 317, eq. 17.
* On/off tail with the background known only from an off measurement:
  R. D. Cousins, J. T. Linnemann & J. Tucker 2008, NIM A 595, 480 (Z_Bi).
* Randomised p-values for discrete statistics: E. L. Lehmann & J. P. Romano,
  *Testing Statistical Hypotheses*, section 3.2.
* Accidental coincidences: G. F. Knoll, *Radiation Detection and Measurement*,
  coincidence chapter (from memory: n-fold rate n tau^(n-1) prod R_i).
* Fisher's method: R. A. Fisher, *Statistical Methods for Research Workers*.
* Trials and false alarm rates: Sidak correction and Poisson occurrence
  (common practice).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy import special

from tocsin.engine.jit import kernel
from tocsin.types import F64Array

__all__ = [
    "accidental_rate",
    "far_to_chance",
    "fisher_combined_sf",
    "hash_uniform",
    "li_ma_significance",
    "onoff_point",
    "onoff_tail",
    "pb_remove",
    "pb_sf",
    "pb_sf_table",
    "poisson_binomial_pmf",
    "poisson_binomial_pmf_rows",
    "poisson_sf",
    "randomised_p",
    "sidak",
]


def _f64(x: ArrayLike) -> F64Array:
    return np.asarray(x, dtype=np.float64)


# --------------------------------------------------------------------------- Poisson


def poisson_sf(n: ArrayLike, mu: ArrayLike) -> F64Array:
    """``P(N >= n)`` for ``N ~ Poisson(mu)``; ``n`` integer counts, ``mu`` >= 0 (counts).

    Uses the identity ``P(N >= n) = P(n, mu)`` (regularised lower incomplete
    gamma), accurate far into the tail (n = 32, mu = 1 gives 1.44e-36).
    ``n <= 0`` gives 1.
    """
    nn = _f64(n)
    m = _f64(mu)
    if np.any(m < 0.0):
        raise ValueError(f"Poisson mean must be >= 0, got min {float(np.min(m))!r}")
    return _f64(np.where(nn >= 1.0, special.gammainc(np.maximum(nn, 1.0), m), 1.0))


# --------------------------------------------------------------------------- Poisson-binomial


def poisson_binomial_pmf_rows(q: ArrayLike) -> F64Array:
    """Poisson-binomial pmf of each row of success probabilities.

    ``q`` has shape ``(R, N)``: row ``r`` holds N independent success
    probabilities. Returns shape ``(R, N + 1)``: ``out[r, k] = P(K_r = k)``.
    Standard dynamic programme (multiply the generating polynomial by
    ``1 - q + q z`` one factor at a time), vectorised over rows, looping over
    the N columns only. All terms are non-negative, so it is stable.
    """
    qq = _f64(q)
    if qq.ndim != 2:
        raise ValueError(f"q must have shape (R, N), got shape {qq.shape}")
    if qq.size and (np.any(qq < 0.0) or np.any(qq > 1.0) or not np.all(np.isfinite(qq))):
        raise ValueError(
            f"probabilities must lie in [0, 1], got range [{float(np.min(qq))!r}, "
            f"{float(np.max(qq))!r}]"
        )
    r, n = qq.shape
    # Work on (state, row) and (column, row) layouts: each step then reads and writes
    # contiguous rows (~3x faster than column slices for large R; same arithmetic).
    qt = np.ascontiguousarray(qq.T)
    pmf = np.zeros((n + 1, r), dtype=np.float64)
    pmf[0] = 1.0
    for j in range(n):
        qj = qt[j]
        pj = 1.0 - qj
        pmf[1 : j + 2] = pmf[1 : j + 2] * pj + pmf[: j + 1] * qj
        pmf[0] *= pj
    return np.ascontiguousarray(pmf.T)


def poisson_binomial_pmf_top(q: ArrayLike, k_top: int) -> F64Array:
    """Poisson-binomial pmf of each row, truncated: shape ``(R, k_top + 1)``.

    Columns ``0 .. k_top - 1`` are exact ``P(K = k)``; column ``k_top`` holds
    ``P(K >= k_top)`` (an absorbing top state in the same DP). Costs R x N x
    k_top instead of R x N^2, for large networks where only the low counts and
    a far tail matter.
    """
    qq = _f64(q)
    if qq.ndim != 2:
        raise ValueError(f"q must have shape (R, N), got shape {qq.shape}")
    if k_top < 1:
        raise ValueError(f"k_top must be >= 1, got {k_top}")
    r, n = qq.shape
    if k_top >= n:
        full = poisson_binomial_pmf_rows(qq)
        out = np.zeros((r, k_top + 1))
        out[:, : n + 1] = full
        return _f64(out)
    return _pmf_top_rows(np.ascontiguousarray(qq), k_top)


@kernel
def _pmf_top_rows(q: F64Array, k_top: int) -> F64Array:
    """The truncated DP of :func:`poisson_binomial_pmf_top`, one row at a time (the
    row's k_top + 1 states stay in cache; compiled). Per element the same operations
    in the same order as a vectorised step ``pmf[top] += pmf[top-1] q``,
    ``pmf[1:top] = pmf[1:top] p + pmf[:top-1] q``, ``pmf[0] *= p``: each step reads
    the old states from one buffer and writes the new ones to the other, so the
    inner loop has no dependence between states and the compiler vectorises it."""
    r, n = q.shape
    out = np.zeros((r, k_top + 1))
    old = np.zeros(k_top + 1)
    new = np.zeros(k_top + 1)
    for i in range(r):
        old[:] = 0.0
        old[0] = 1.0
        for j in range(n):
            qj = q[i, j]
            pj = 1.0 - qj
            new[k_top] = old[k_top] + old[k_top - 1] * qj
            for k in range(1, k_top):
                new[k] = old[k] * pj + old[k - 1] * qj
            new[0] = old[0] * pj
            old, new = new, old
        out[i] = old
    return out


def poisson_binomial_pmf(q: ArrayLike) -> F64Array:
    """Poisson-binomial pmf, shape ``(N + 1,)``, of N independent success probabilities."""
    qq = _f64(q)
    if qq.ndim != 1:
        raise ValueError(f"q must be one-dimensional, got shape {qq.shape}")
    return _f64(poisson_binomial_pmf_rows(qq[None, :])[0])


def pb_sf_table(pmf: ArrayLike) -> F64Array:
    """Survival table ``T[..., k] = P(K >= k)`` for k = 0 .. N + 1 (first 1, last 0).

    Summed from the top down, so small tail probabilities keep full relative precision.
    """
    p = _f64(pmf)
    rev = np.cumsum(p[..., ::-1], axis=-1)[..., ::-1]
    zero = np.zeros((*p.shape[:-1], 1), dtype=np.float64)
    tab = np.minimum(np.concatenate([rev, zero], axis=-1), 1.0)
    tab[..., 0] = 1.0  # P(K >= 0) is 1 exactly, whatever the rounding of the sum
    return _f64(tab)


def pb_sf(pmf: ArrayLike, k: ArrayLike) -> F64Array:
    """``P(K >= k)`` from a pmf over 0 .. N (shape ``(N + 1,)`` or ``(R, N + 1)``).

    For a 1-D pmf, ``k`` may be any integer array (result has its shape). For a
    2-D pmf, ``k`` broadcasts against the R rows (one threshold per row).
    ``k <= 0`` gives 1, ``k > N`` gives 0.
    """
    p = _f64(pmf)
    tab = pb_sf_table(p)
    n1 = p.shape[-1]
    kk = np.clip(np.asarray(k, dtype=np.int64), 0, n1)
    if p.ndim == 1:
        return _f64(tab[kk])
    if p.ndim != 2:
        raise ValueError(f"pmf must be 1-D or 2-D, got shape {p.shape}")
    kb = np.broadcast_to(kk, (p.shape[0],))
    return _f64(tab[np.arange(p.shape[0]), kb])


def pb_remove(pmf: ArrayLike, q: ArrayLike) -> F64Array:
    """Leave one trial out: divide the generating polynomial by ``(1 - q + q z)``.

    ``pmf`` has shape ``(N + 1,)`` or ``(R, N + 1)``; ``q`` (scalar or one per
    row) is the success probability of the trial to remove. Returns the pmf of
    the other N - 1 trials, shape ``(N,)`` or ``(R, N)``. Synthetic division runs
    forward for ``q <= 0.5`` and backward otherwise, so each step multiplies
    rounding errors by at most 1. Tiny negative round-off is clipped to 0.
    """
    p = _f64(pmf)
    one_d = p.ndim == 1
    g = p[None, :] if one_d else p
    if g.ndim != 2 or g.shape[1] < 2:
        raise ValueError(f"pmf must have shape (N + 1,) or (R, N + 1) with N >= 1, got {p.shape}")
    rows, n1 = g.shape
    qq = np.broadcast_to(_f64(q), (rows,)).copy()
    if np.any(qq < 0.0) or np.any(qq > 1.0):
        raise ValueError(f"q must lie in [0, 1], got range [{qq.min()!r}, {qq.max()!r}]")
    out = np.zeros((rows, n1 - 1), dtype=np.float64)
    fwd = qq <= 0.5
    if np.any(fwd):
        gf, qf = g[fwd], qq[fwd]
        inv = 1.0 / (1.0 - qf)
        acc = gf[:, 0] * inv
        out_f = np.empty((gf.shape[0], n1 - 1))
        out_f[:, 0] = acc
        for k in range(1, n1 - 1):
            acc = (gf[:, k] - qf * acc) * inv
            out_f[:, k] = acc
        out[fwd] = out_f
    bwd = ~fwd
    if np.any(bwd):
        gb, qb = g[bwd], qq[bwd]
        inv = 1.0 / qb
        acc = gb[:, n1 - 1] * inv
        out_b = np.empty((gb.shape[0], n1 - 1))
        out_b[:, n1 - 2] = acc
        for k in range(n1 - 2, 0, -1):
            acc = (gb[:, k] - (1.0 - qb) * acc) * inv
            out_b[:, k - 1] = acc
        out[bwd] = out_b
    np.clip(out, 0.0, 1.0, out=out)
    return out[0] if one_d else out


# --------------------------------------------------------------------------- combining


def fisher_combined_sf(log_u_sum: ArrayLike, k: ArrayLike) -> F64Array:
    """Fisher's combination: ``P(-sum ln U_i >= x)`` for k independent uniforms.

    ``log_u_sum`` is ``sum ln u_i`` (so it is <= 0; a positive value means the
    caller passed ``-sum ln u`` and is rejected); ``x = -log_u_sum``. The sum of
    k standard exponentials is Gamma(k, 1), so the result is the regularised
    upper incomplete gamma ``Q(k, x)``. ``k = 0`` (empty sum) gives 1.
    """
    s = _f64(log_u_sum)
    kk = _f64(k)
    if np.any(s > 0.0):
        raise ValueError(f"log_u_sum is a sum of log-uniforms and must be <= 0, got {s.max()!r}")
    if np.any(kk < 0.0):
        raise ValueError(f"number of combined p-values must be >= 0, got {kk.min()!r}")
    x = -s
    return _f64(np.where(kk >= 1.0, special.gammaincc(np.maximum(kk, 1.0), x), 1.0))


# --------------------------------------------------------------------------- on/off


def li_ma_significance(n_on: ArrayLike, n_off: ArrayLike, alpha: ArrayLike) -> F64Array:
    """Likelihood-ratio significance of an on/off excess (Li & Ma 1983, eq. 17), in sigma.

    ``alpha = t_on / t_off`` (exposure ratio); counts need not be integers. The
    sign is that of the excess ``n_on - alpha * n_off``. Safe (no warnings, no
    NaN) for ``n_on = 0``, ``n_off = 0`` or both (then 0).
    """
    on = _f64(n_on)
    off = _f64(n_off)
    a = _f64(alpha)
    if np.any(a <= 0.0):
        raise ValueError(f"alpha must be > 0, got min {float(np.min(a))!r}")
    if np.any(on < 0.0) or np.any(off < 0.0):
        raise ValueError("counts must be >= 0")
    tot = on + off
    safe_tot = np.where(tot > 0.0, tot, 1.0)
    t1 = special.xlogy(on, (1.0 + a) / a * (on / safe_tot))
    t2 = special.xlogy(off, (1.0 + a) * (off / safe_tot))
    inner = np.maximum(t1 + t2, 0.0)
    return _f64(np.sign(on - a * off) * np.sqrt(2.0 * inner))


def _check_onoff(n_off: F64Array, a: F64Array) -> None:
    if np.any(~(a > 0.0)) or np.any(~np.isfinite(a)):
        raise ValueError(f"alpha must be finite and > 0, got range [{a.min()!r}, {a.max()!r}]")
    if np.any(~(n_off >= 0.0)) or np.any(~np.isfinite(n_off)):
        raise ValueError(
            f"n_off must be finite and >= 0, got range [{n_off.min()!r}, {n_off.max()!r}]"
        )


def onoff_tail(n_on: ArrayLike, n_off: ArrayLike, alpha: ArrayLike) -> F64Array:
    """``P(N_on >= n_on)`` under background only, background known from an off count.

    The background mean in the on region is ``b``; the off region saw ``n_off``
    counts of mean ``b / alpha``. With a flat prior on ``b`` the predictive
    distribution of ``N_on`` is negative binomial (Poisson-Gamma mixture) with
    ``r = n_off + 1`` and success probability ``1 / (1 + alpha)``, whose tail is
    ``I_rho(n_on, n_off + 1)``, ``rho = alpha / (1 + alpha)``. For integer counts
    this equals the conditional binomial test Z_Bi,
    ``binom.sf(n_on - 1, n_on + n_off, rho)`` (Cousins, Linnemann & Tucker 2008,
    NIM A 595, 480). ``n_off`` may be non-integer (an equivalent off count).
    ``n_on <= 0`` gives 1.
    """
    on = _f64(n_on)
    off = _f64(n_off)
    a = _f64(alpha)
    _check_onoff(off, a)
    rho = a / (1.0 + a)
    return _f64(np.where(on >= 1.0, special.betainc(np.maximum(on, 1.0), off + 1.0, rho), 1.0))


def onoff_point(n_on: ArrayLike, n_off: ArrayLike, alpha: ArrayLike) -> F64Array:
    """``P(N_on = n_on)`` of the same negative binomial as :func:`onoff_tail`.

    ``C(n_on + n_off, n_on) rho^n_on (1 - rho)^(n_off + 1)``, evaluated in log
    space through ``betaln`` (accurate for large ``n_off``). ``n_on < 0`` gives 0.
    """
    on = _f64(n_on)
    off = _f64(n_off)
    a = _f64(alpha)
    _check_onoff(off, a)
    pos = on >= 1.0
    on_s = np.where(pos, on, 1.0)
    log1pa = np.log1p(a)
    log_rho = np.log(a) - log1pa
    # C(n_on + n_off, n_on) = 1 / (n_on * B(n_on, n_off + 1)) for n_on >= 1
    log_c = np.where(pos, -np.log(on_s) - special.betaln(on_s, off + 1.0), 0.0)
    log_p = log_c + np.where(pos, on_s * log_rho, 0.0) - (off + 1.0) * log1pa
    return _f64(np.where(on >= 0.0, np.exp(log_p), 0.0))


def randomised_p(tail_gt: ArrayLike, point: ArrayLike, u: ArrayLike) -> F64Array:
    """Randomised p-value ``P(X > x) + u * P(X = x)`` of a discrete statistic.

    With ``u`` uniform on [0, 1) and independent of the data, the result is
    exactly uniform under the null hypothesis (Lehmann & Romano, *Testing
    Statistical Hypotheses*, section 3.2), so counting small p-values gives
    calibrated false alarm rates even at a handful of expected counts.
    """
    return _f64(np.clip(_f64(tail_gt) + _f64(u) * _f64(point), 0.0, 1.0))


# --------------------------------------------------------------------------- hashing

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_SEED = np.uint64(0x243F6A8885A308D3)


def _mix(z: np.ndarray[Any, np.dtype[np.uint64]]) -> np.ndarray[Any, np.dtype[np.uint64]]:
    # splitmix64 finaliser (Steele, Lea & Flood 2014); uint64 arrays wrap silently.
    z = (z ^ (z >> np.uint64(30))) * _M1
    z = (z ^ (z >> np.uint64(27))) * _M2
    return z ^ (z >> np.uint64(31))


def hash_uniform(*keys: ArrayLike) -> F64Array:
    """Deterministic pseudo-uniform numbers in [0, 1) from integer keys.

    The keys (int64 arrays, broadcast together) are folded with the splitmix64
    finaliser; the top 53 bits give the result. Same keys, same numbers, on any
    machine: a randomised p-value built from it is reproducible. The order of
    the keys matters.
    """
    if not keys:
        raise ValueError("hash_uniform needs at least one key array")
    arrs = np.broadcast_arrays(*[np.asarray(k, dtype=np.int64) for k in keys])
    shape = arrs[0].shape
    h = np.full(max(1, int(np.prod(shape))), _SEED, dtype=np.uint64)
    for a in arrs:
        v = np.ascontiguousarray(a, dtype=np.int64).reshape(-1).view(np.uint64)
        h = _mix(h ^ _mix(v + _GOLDEN))
    out = (h >> np.uint64(11)).astype(np.float64) * (1.0 / 9007199254740992.0)
    return out.reshape(shape)


# --------------------------------------------------------------------------- rates, trials


def accidental_rate(rates_hz: ArrayLike, tau_s: ArrayLike) -> F64Array:
    """Accidental n-fold coincidence rate ``n tau^(n-1) prod R_i`` (Hz).

    ``rates_hz`` has shape ``(..., n)`` (the n counters' rates, Hz); ``tau_s`` is
    the resolving time (s; a coincidence is every counter within ``tau`` of the
    first). Two counters: ``2 tau R1 R2`` (Knoll, *Radiation Detection and
    Measurement*, coincidence chapter; from memory). Valid while every
    ``R_i tau << 1``.
    """
    r = _f64(rates_hz)
    if r.ndim < 1 or r.shape[-1] < 1:
        raise ValueError(f"rates_hz must have a last axis of n >= 1 counters, got {r.shape}")
    n = r.shape[-1]
    return _f64(n * _f64(tau_s) ** (n - 1) * np.prod(r, axis=-1))


def sidak(p: ArrayLike, m: ArrayLike) -> F64Array:
    """Global p-value of the best of m independent tests: ``1 - (1 - p)^m`` (Sidak).

    Computed as ``-expm1(m log1p(-p))`` so tiny ``p`` keeps full precision
    (``~ m p``). ``m = 0`` gives 0; ``p = 1`` with ``m > 0`` gives 1.
    """
    pp = _f64(p)
    mm = _f64(m)
    if np.any(pp < 0.0) or np.any(pp > 1.0):
        raise ValueError(f"p must lie in [0, 1], got range [{pp.min()!r}, {pp.max()!r}]")
    if np.any(mm < 0.0):
        raise ValueError(f"number of trials must be >= 0, got {mm.min()!r}")
    with np.errstate(divide="ignore", invalid="ignore"):
        val = -np.expm1(mm * np.log1p(-pp))
    return _f64(np.where(mm == 0.0, 0.0, np.where(pp >= 1.0, 1.0, val)))


def far_to_chance(far_per_year: ArrayLike, years: ArrayLike) -> F64Array:
    """Chance of at least one false alarm in ``years`` at ``far_per_year``: ``1 - exp(-F T)``."""
    f = _f64(far_per_year)
    t = _f64(years)
    if np.any(f < 0.0) or np.any(t < 0.0):
        raise ValueError("false alarm rate and duration must be >= 0")
    return _f64(-np.expm1(-f * t))
