"""Counting statistics against SciPy and published formulas (tocsin.engine.stats)."""

from __future__ import annotations

from functools import partial

import numpy as np
import pytest
from scipy import stats

from tocsin.engine.stats import (
    accidental_rate,
    far_to_chance,
    fisher_combined_sf,
    hash_uniform,
    li_ma_significance,
    onoff_point,
    onoff_tail,
    pb_remove,
    pb_sf,
    poisson_binomial_pmf,
    poisson_binomial_pmf_rows,
    poisson_sf,
    randomised_p,
    sidak,
)
from tocsin.model.candidate import sigma_from_p

RTOL = 1e-10  # special-function agreement with SciPy (both double precision)
close = partial(np.testing.assert_allclose, rtol=RTOL, atol=0.0)
KS_MIN_P = 0.01  # uniformity is rejected below this KS p-value


# ----------------------------------------------------------------------------- Poisson


def test_poisson_sf_matches_scipy() -> None:
    n = np.array([0, 1, 2, 5, 10, 32, 100, 400])
    for mu in (0.0, 1e-3, 1.0, 7.5, 90.0, 350.0):
        # reference: scipy.stats.poisson.sf(n - 1, mu) = P(N >= n) (textbook)
        ref = stats.poisson.sf(n - 1, mu)
        np.testing.assert_allclose(poisson_sf(n, mu), ref, rtol=1e-9, atol=1e-300)


def test_poisson_sf_deep_tail_check_value() -> None:
    # CHECKS.md: n = 32, mu = 1 gives 1.44e-36; reference scipy.stats.poisson.sf(31, 1)
    got = float(poisson_sf(32, 1.0))
    close(got, stats.poisson.sf(31, 1.0))
    assert got == pytest.approx(1.44e-36, rel=5e-3)


def test_poisson_sf_rejects_negative_mean() -> None:
    with pytest.raises(ValueError, match=r"-1\.0"):
        poisson_sf(3, -1.0)


# ----------------------------------------------------------------------------- Poisson-binomial


def test_poisson_binomial_matches_scipy() -> None:
    rng = np.random.default_rng(11)
    q = rng.uniform(0.0, 1.0, 23) ** 3  # mostly small, a few large
    pmf = poisson_binomial_pmf(q)
    ref = stats.poisson_binom(q)  # SciPy >= 1.15
    k = np.arange(q.size + 1)
    np.testing.assert_allclose(pmf, ref.pmf(k), rtol=1e-9, atol=1e-15)
    # P(K >= k) against scipy's sf(k - 1)
    np.testing.assert_allclose(pb_sf(pmf, k), ref.sf(k - 1), rtol=1e-9, atol=1e-15)
    assert float(pb_sf(pmf, 0)) == 1.0
    assert float(pb_sf(pmf, q.size + 1)) == 0.0
    assert float(pb_sf(pmf, -3)) == 1.0


def test_poisson_binomial_equal_p_is_binomial() -> None:
    # CHECKS.md: 7 or more of 24 sites at occupancy 0.18 -> scipy.stats.binom.sf(6, 24, 0.18)
    pmf = poisson_binomial_pmf(np.full(24, 0.18))
    close(float(pb_sf(pmf, 7)), stats.binom.sf(6, 24, 0.18))
    assert float(pb_sf(pmf, 7)) == pytest.approx(0.13, abs=0.01)
    # a deep tail keeps its relative precision (summed from the top)
    pmf = poisson_binomial_pmf(np.full(40, 4e-6))
    np.testing.assert_allclose(pb_sf(pmf, 5), stats.binom.sf(4, 40, 4e-6), rtol=1e-9)


def test_poisson_binomial_rows_match_single_rows() -> None:
    rng = np.random.default_rng(12)
    qs = rng.uniform(0.0, 0.6, (7, 15))
    rows = poisson_binomial_pmf_rows(qs)
    assert rows.shape == (7, 16)
    for r in range(7):
        np.testing.assert_allclose(
            rows[r], stats.poisson_binom(qs[r]).pmf(np.arange(16)), rtol=1e-9, atol=1e-15
        )
    ks = np.array([0, 1, 3, 5, 8, 15, 16])
    want = [stats.poisson_binom(qs[r]).sf(ks[r] - 1) for r in range(7)]
    np.testing.assert_allclose(pb_sf(rows, ks), want, rtol=1e-9, atol=1e-15)


def test_poisson_binomial_rejects_bad_probability() -> None:
    with pytest.raises(ValueError, match=r"1\.5"):
        poisson_binomial_pmf([0.2, 1.5])


@pytest.mark.parametrize("q_out", [0.0, 1e-5, 0.2, 0.5, 0.51, 0.93, 1.0])
def test_pb_remove_equals_recomputation(q_out: float) -> None:
    rng = np.random.default_rng(13)
    others = rng.uniform(0.0, 1.0, 30)
    full = poisson_binomial_pmf(np.append(others, q_out))
    # reference: the pmf recomputed without that trial (SciPy's Poisson-binomial)
    want = stats.poisson_binom(others).pmf(np.arange(31))
    np.testing.assert_allclose(pb_remove(full, q_out), want, rtol=1e-7, atol=1e-13)


def test_pb_remove_rows_mixed_directions() -> None:
    rng = np.random.default_rng(14)
    q = rng.uniform(0.0, 1.0, (5, 12))
    q[:, -1] = [0.01, 0.3, 0.5, 0.7, 0.99]
    out = pb_remove(poisson_binomial_pmf_rows(q), q[:, -1])
    for r in range(5):
        want = stats.poisson_binom(q[r, :-1]).pmf(np.arange(12))
        np.testing.assert_allclose(out[r], want, rtol=1e-7, atol=1e-13)


# ----------------------------------------------------------------------------- Fisher


def test_fisher_combined_matches_scipy_combine_pvalues() -> None:
    rng = np.random.default_rng(15)
    for k in (1, 2, 5, 17):
        p = rng.uniform(1e-4, 1.0, k)
        got = float(fisher_combined_sf(np.log(p).sum(), k))
        # Fisher's method: scipy.stats.combine_pvalues(method="fisher") uses chi2(2k)
        close(got, stats.combine_pvalues(p, method="fisher").pvalue)
        # the same as a Gamma(k, 1) survival function (scipy.stats.gamma.sf)
        close(got, stats.gamma.sf(-np.log(p).sum(), k))


def test_fisher_combined_empty_and_sign() -> None:
    assert float(fisher_combined_sf(0.0, 0)) == 1.0
    np.testing.assert_array_equal(fisher_combined_sf([0.0, -3.0], [0, 2])[0], 1.0)
    with pytest.raises(ValueError, match="<= 0"):
        fisher_combined_sf(2.5, 2)  # caller passed -sum(ln u)


# ----------------------------------------------------------------------------- Li & Ma


def test_li_ma_worked_value() -> None:
    # Li & Ma 1983, ApJ 272, 317, eq. 17; CHECKS.md worked value S ~ 4.19
    assert float(li_ma_significance(150, 500, 0.2)) == pytest.approx(4.19, abs=0.005)


def test_li_ma_limits() -> None:
    # Li & Ma 1983, eq. 17: no excess (N_on = alpha N_off) gives 0
    np.testing.assert_allclose(li_ma_significance([20, 300.0], [100, 1500.0], 0.2), 0.0, atol=1e-7)
    # large counts approach eq. 9: (N_on - a N_off) / sqrt(a (N_on + N_off))
    n_off, a = 4e6, 0.25
    n_on = a * n_off + 3.0 * np.sqrt(a * (1 + a) * n_off)
    eq9 = (n_on - a * n_off) / np.sqrt(a * (n_on + n_off))
    assert float(li_ma_significance(n_on, n_off, a)) == pytest.approx(eq9, rel=2e-3)
    # sign follows the excess
    assert float(li_ma_significance(5, 100, 0.2)) < 0.0


def test_li_ma_safe_at_zero_counts() -> None:
    s = li_ma_significance([0, 0, 7], [0, 9, 0], 0.5)
    assert np.all(np.isfinite(s))
    assert s[0] == 0.0
    # Li & Ma eq. 17 with N_on = 0: -sqrt(2 N_off ln(1 + alpha)) (closed form)
    assert s[1] == pytest.approx(-np.sqrt(2 * 9 * np.log(1.5)), rel=1e-12)
    # with N_off = 0: sqrt(2 N_on ln((1 + alpha) / alpha))
    assert s[2] == pytest.approx(np.sqrt(2 * 7 * np.log(3.0)), rel=1e-12)


# ----------------------------------------------------------------------------- on/off tail


def test_onoff_tail_is_conditional_binomial_and_negative_binomial() -> None:
    n_on = np.array([0, 1, 2, 5, 12, 40, 90, 250])
    for n_off in (0, 3, 30, 400, 20000):
        for a in (0.01, 0.2, 1.0, 3.0):
            rho = a / (1 + a)
            got = onoff_tail(n_on, n_off, a)
            # Cousins, Linnemann & Tucker 2008, NIM A 595, 480: Z_Bi conditional binomial
            want_bi = stats.binom.sf(n_on - 1, n_on + n_off, rho)
            np.testing.assert_allclose(got, want_bi, rtol=1e-8, atol=1e-300)
            # Poisson-Gamma predictive = negative binomial (scipy.stats.nbinom)
            want_nb = stats.nbinom.sf(n_on - 1, n_off + 1, 1 / (1 + a))
            np.testing.assert_allclose(got, want_nb, rtol=1e-8, atol=1e-300)


def test_onoff_point_matches_negative_binomial_pmf() -> None:
    n_on = np.array([0, 1, 3, 17, 60, 400])
    for n_off in (0.0, 2.5, 47.3, 1e4, 3.3e6):  # non-integer equivalent off counts
        for a in (0.003, 0.4, 2.0):
            # scipy.stats.nbinom with real n = n_off + 1
            want = stats.nbinom.pmf(n_on, n_off + 1, 1 / (1 + a))
            np.testing.assert_allclose(onoff_point(n_on, n_off, a), want, rtol=1e-8, atol=1e-300)
            want_sf = stats.nbinom.sf(n_on - 1, n_off + 1, 1 / (1 + a))
            np.testing.assert_allclose(onoff_tail(n_on, n_off, a), want_sf, rtol=1e-8, atol=1e-300)


def test_onoff_known_background_limit_is_poisson() -> None:
    # alpha -> 0 with alpha n_off = mu fixed: the background is known exactly, so the
    # tail becomes the Poisson tail (scipy.stats.poisson.sf).
    mu, a = 6.0, 1e-7
    n = np.arange(0, 30)
    np.testing.assert_allclose(onoff_tail(n, mu / a, a), stats.poisson.sf(n - 1, mu), rtol=1e-5)
    np.testing.assert_allclose(onoff_point(n, mu / a, a), stats.poisson.pmf(n, mu), rtol=1e-5)


def test_onoff_rejects_bad_alpha() -> None:
    with pytest.raises(ValueError, match="alpha"):
        onoff_tail(3, 10, 0.0)
    with pytest.raises(ValueError, match="n_off"):
        onoff_point(3, -1.0, 0.5)


# ----------------------------------------------------------------------------- randomised p


@pytest.mark.parametrize("mu", [2.0, 3.5, 5.0, 40.0])
def test_randomised_poisson_p_is_uniform(mu: float) -> None:
    rng = np.random.default_rng(int(mu * 10))
    n = rng.poisson(mu, 20000)
    u = hash_uniform(np.arange(n.size), 7)
    p = randomised_p(poisson_sf(n + 1, mu), stats.poisson.pmf(n, mu), u)
    # Lehmann & Romano section 3.2: exactly uniform; KS test vs uniform (scipy.stats.kstest)
    assert stats.kstest(p, "uniform").pvalue > KS_MIN_P
    # the plain discrete p-value P(N >= n) is not uniform: the KS test has power here
    assert stats.kstest(poisson_sf(n, mu), "uniform").pvalue < KS_MIN_P


def test_randomised_onoff_p_is_uniform_with_estimated_background() -> None:
    # on/off pairs with a well-measured background (alpha = 0.02), expected 3 counts on:
    # the negative-binomial randomised p-value is uniform to KS precision.
    rng = np.random.default_rng(21)
    mu, a = 3.0, 0.02
    n_on = rng.poisson(mu, 20000)
    n_off = rng.poisson(mu / a, 20000)
    u = hash_uniform(np.arange(n_on.size), 8)
    p = randomised_p(onoff_tail(n_on + 1, n_off, a), onoff_point(n_on, n_off, a), u)
    assert stats.kstest(p, "uniform").pvalue > KS_MIN_P


def test_hash_uniform_deterministic_uniform_and_order_sensitive() -> None:
    k = np.arange(50000, dtype=np.int64)
    u1 = hash_uniform(3, k, -1)
    u2 = hash_uniform(3, k, -1)
    np.testing.assert_array_equal(u1, u2)
    assert u1.min() >= 0.0 and u1.max() < 1.0
    # consecutive keys give uniform values (scipy.stats.kstest) and no serial correlation
    assert stats.kstest(u1, "uniform").pvalue > KS_MIN_P
    assert abs(np.corrcoef(u1[:-1], u1[1:])[0, 1]) < 4.0 / np.sqrt(k.size)
    assert not np.array_equal(u1, hash_uniform(k, 3, -1))
    assert hash_uniform(5).shape == ()
    assert hash_uniform([1, 2], [[3], [4]]).shape == (2, 2)


# ----------------------------------------------------------------------------- rates, trials


def test_accidental_rate_closed_form() -> None:
    # Knoll, Radiation Detection and Measurement, coincidence chapter (from memory):
    # two counters 2 tau R1 R2; n-fold n tau^(n-1) prod R_i
    assert float(accidental_rate([12.0, 30.0], 1e-6)) == pytest.approx(
        2 * 1e-6 * 12 * 30, rel=1e-14
    )
    got = accidental_rate(np.array([[5.0, 7.0, 9.0], [1.0, 2.0, 3.0]]), 1e-3)
    np.testing.assert_allclose(got, [3 * 1e-6 * 315, 3 * 1e-6 * 6], rtol=1e-14)


def test_accidental_rate_monte_carlo_two_streams() -> None:
    # Independent Poisson streams: count hits of stream 1 with a stream-2 hit within
    # +-tau; expected 2 tau R1 R2 per second (Knoll, from memory). Poisson 4-sigma band.
    rng = np.random.default_rng(31)
    r1, r2, tau, t_s = 50.0, 80.0, 1e-4, 2000.0
    t1 = np.sort(rng.uniform(0, t_s, rng.poisson(r1 * t_s)))
    t2 = np.sort(rng.uniform(0, t_s, rng.poisson(r2 * t_s)))
    n_pairs = int(np.sum(np.searchsorted(t2, t1 + tau) - np.searchsorted(t2, t1 - tau)))
    expect = float(accidental_rate([r1, r2], tau)) * t_s
    assert abs(n_pairs - expect) < 4.0 * np.sqrt(expect)


def test_sigma_from_p_five_sigma() -> None:
    # one-sided 5 sigma is p = 2.87e-7 (scipy.stats.norm.isf / norm.sf)
    assert sigma_from_p(float(stats.norm.sf(5.0))) == pytest.approx(5.0, rel=1e-12)
    assert sigma_from_p(2.87e-7) == pytest.approx(float(stats.norm.isf(2.87e-7)), rel=1e-12)
    assert sigma_from_p(2.87e-7) == pytest.approx(5.0, abs=2e-3)


def test_sidak_stable_and_exact() -> None:
    # Sidak correction 1 - (1 - p)^m (common practice): direct formula where it is exact
    p = np.array([0.3, 0.01, 1e-3])
    m = np.array([2, 50, 1000])
    np.testing.assert_allclose(sidak(p, m), 1.0 - (1.0 - p) ** m, rtol=1e-12)
    # tiny p: 1 - (1 - p)^m rounds to 0 in double precision; the series m p - C(m,2) p^2
    got = float(sidak(1e-18, 1000))
    assert got == pytest.approx(1000 * 1e-18 - 499500 * 1e-36, rel=1e-12)
    np.testing.assert_array_equal(sidak([0.5, 1.0, 0.0], [0, 3, 7]), [0.0, 1.0, 0.0])


def test_far_to_chance() -> None:
    # Poisson process (common practice): 1 - exp(-F T)
    assert float(far_to_chance(1.0, 1.0)) == pytest.approx(1.0 - np.exp(-1.0), rel=1e-14)
    assert float(far_to_chance(1e-12, 3.0)) == pytest.approx(3e-12, rel=1e-9)
    assert float(far_to_chance(0.0, 5.0)) == 0.0


def test_truncated_poisson_binomial_matches_scipy() -> None:
    """Truncated DP: exact P(K = k) below the top, P(K >= top) in the last column
    (reference: scipy.stats.poisson_binom, SciPy >= 1.15)."""
    from scipy import stats as sps

    from tocsin.engine.stats import poisson_binomial_pmf_top

    rng = np.random.default_rng(7)
    q = rng.uniform(0.0, 0.3, size=(5, 60))
    top = 9
    got = poisson_binomial_pmf_top(q, top)
    for r in range(q.shape[0]):
        ref = sps.poisson_binom(q[r])
        np.testing.assert_allclose(got[r, :top], ref.pmf(np.arange(top)), rtol=1e-10, atol=0)
        np.testing.assert_allclose(got[r, top], ref.sf(top - 1), rtol=1e-10)


def test_truncated_poisson_binomial_is_the_vectorised_dp_to_the_bit() -> None:
    """The compiled row-at-a-time DP does per element exactly what the vectorised
    step over all rows does (same products and sums, in the same order), so the
    tables, and every p-value read from them, are identical to the bit."""
    from tocsin.engine.stats import poisson_binomial_pmf_top

    rng = np.random.default_rng(9)
    q = rng.uniform(0.0, 0.05, size=(40, 700))
    q[:, ::17] = 0.0  # sites that do not count
    top = 31
    ref = np.zeros((top + 1, q.shape[0]))
    ref[0] = 1.0
    for j in range(q.shape[1]):
        qj = q[:, j]
        pj = 1.0 - qj
        ref[top] += ref[top - 1] * qj
        ref[1:top] = ref[1:top] * pj + ref[: top - 1] * qj
        ref[0] *= pj
    got = poisson_binomial_pmf_top(q, top)
    assert np.array_equal(got, ref.T)
