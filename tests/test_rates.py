"""Background rates and drift-following predictions (tocsin.engine.rates)."""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
import pytest
from scipy import stats

from tocsin.engine.block import Block
from tocsin.engine.exposure import BinStore
from tocsin.engine.rates import (
    CumulativeSums,
    background_rates,
    equivalent_onoff,
    predict_counts,
)
from tocsin.types import NS_PER_S, F64Array, I64Array

BIN_NS = NS_PER_S
B = 3600  # background bins (1 s)
BASE = 1_400_000_000  # GPS second of the first bin in these tests (2024)
Z3 = 3.0  # "within 3 sigma"


def fill_store(
    counts: I64Array, live_ns: I64Array, b0: int, *, capacity: int | None = None
) -> BinStore:
    """A BinStore holding ``counts`` and ``live_ns`` (sites x bins) from bin ``b0``.

    Each bin's live time is one interval starting at the bin edge; its hits sit at
    the edge (the store only keeps counts per bin). Written in 1000-bin blocks.
    """
    n_sites, n_bins = counts.shape
    store = BinStore(n_sites, bin_ns=BIN_NS, capacity=capacity or n_bins)
    for c0 in range(0, n_bins, 1000):
        c1 = min(n_bins, c0 + 1000)
        starts = np.repeat((b0 + np.arange(c0, c1, dtype=np.int64)) * BIN_NS, n_sites)
        sid = np.tile(np.arange(n_sites, dtype=np.int32), c1 - c0)
        cnt = counts[:, c0:c1].T.ravel()
        live = live_ns[:, c0:c1].T.ravel()
        assert not np.any((live == 0) & (cnt > 0))
        m = live > 0
        store.add(
            Block(
                (b0 + c0) * BIN_NS,
                (b0 + c1) * BIN_NS,
                np.repeat(starts, cnt),
                np.repeat(sid, cnt),
                sid[m],
                starts[m],
                starts[m] + live[m],
            )
        )
    return store


def poisson_counts(
    rng: np.random.Generator, rate_hz: npt.ArrayLike, live_ns: I64Array
) -> tuple[I64Array, F64Array]:
    """Counts ~ Poisson(rate x live) per bin; ``rate_hz`` broadcasts to (sites, bins)."""
    lam = np.broadcast_to(rate_hz, live_ns.shape) * (live_ns / NS_PER_S)
    return rng.poisson(lam).astype(np.int64), lam


# ----------------------------------------------------------------------------- background_rates


def test_constant_rate_within_three_sigma_and_jeffreys_posterior() -> None:
    rng = np.random.default_rng(1)
    rates = np.array([0.7, 3.0, 12.0, 45.0])
    live = np.full((4, B + 10), BIN_NS, dtype=np.int64)
    counts, _ = poisson_counts(rng, rates[:, None], live)
    store = fill_store(counts, live, BASE)
    est = background_rates(
        store, BASE + B + 10, background_bins=B, guard_bins=10, min_live_fraction=0.2
    )
    assert (est.b0, est.b1) == (BASE, BASE + B)
    np.testing.assert_array_equal(est.n, counts[:, :B].sum(axis=1))
    np.testing.assert_array_equal(est.live_s, float(B))
    assert np.all(est.ok)
    assert np.all(np.abs(est.rate_hz - rates) < Z3 * est.rate_sd_hz)
    # Jeffreys prior Gamma(1/2, 0) on a Poisson rate: posterior Gamma(n + 1/2, rate = live)
    post = stats.gamma(est.n + 0.5, scale=1.0 / est.live_s)
    np.testing.assert_allclose(est.rate_hz, post.mean(), rtol=1e-12)
    np.testing.assert_allclose(est.rate_sd_hz, post.std(), rtol=1e-12)


def test_guard_keeps_the_judged_bins_out_of_the_background() -> None:
    rng = np.random.default_rng(2)
    live = np.full((2, B + 30), BIN_NS, dtype=np.int64)
    counts, _ = poisson_counts(rng, np.array([[5.0], [9.0]]), live)
    quiet = fill_store(counts, live, BASE)
    loud_counts = counts.copy()
    loud_counts[:, B:] += 1000  # a burst in the 30 guard bins
    loud = fill_store(loud_counts, live, BASE)
    a, b = (
        background_rates(st, BASE + B + 30, background_bins=B, guard_bins=30, min_live_fraction=0.2)
        for st in (quiet, loud)
    )
    np.testing.assert_array_equal(a.rate_hz, b.rate_hz)
    # without the guard the burst is inside the background
    c = background_rates(
        loud, BASE + B + 30, background_bins=B, guard_bins=0, min_live_fraction=0.2
    )
    assert np.all(c.n > a.n + 29_000)


def test_dead_for_half_the_background_halves_live_time_not_rate() -> None:
    rng = np.random.default_rng(3)
    rate = 8.0
    live = np.full((2, B), BIN_NS, dtype=np.int64)
    live[1, : B // 2 - 1] = 0
    live[1, B // 2 - 1] = BIN_NS // 2  # half-live bins: dead time split to the nanosecond
    live[1, B // 2] = BIN_NS // 2
    counts, _ = poisson_counts(rng, np.array(rate), live)
    store = fill_store(counts, live, BASE)
    est = background_rates(store, BASE + B, background_bins=B, guard_bins=0, min_live_fraction=0.2)
    assert est.live_s[0] == B
    assert est.live_s[1] == B / 2
    assert np.all(est.ok)
    assert np.all(np.abs(est.rate_hz - rate) < Z3 * est.rate_sd_hz)
    # half the exposure: the posterior sd is larger by about sqrt(2)
    assert est.rate_sd_hz[1] / est.rate_sd_hz[0] == pytest.approx(np.sqrt(2), rel=0.05)


def test_sparse_site_rate_is_finite_positive_posterior() -> None:
    live = np.full((2, B), BIN_NS, dtype=np.int64)
    counts = np.zeros((2, B), dtype=np.int64)
    counts[0, [100, 1500, 3000]] = 1  # three hits in the hour (a camera-sensor detector)
    store = fill_store(counts, live, BASE)
    est = background_rates(store, BASE + B, background_bins=B, guard_bins=0, min_live_fraction=0.2)
    assert np.all(np.isfinite(est.rate_hz)) and np.all(est.rate_hz > 0.0)
    # Jeffreys posterior mean (n + 1/2) / T (scipy.stats.gamma)
    np.testing.assert_allclose(
        est.rate_hz, stats.gamma([3.5, 0.5], scale=1.0 / B).mean(), rtol=1e-12
    )
    np.testing.assert_array_equal(est.n, [3, 0])


def test_no_live_time_is_not_ok_and_leaks_no_nan() -> None:
    rng = np.random.default_rng(4)
    live = np.full((3, B + 60), BIN_NS, dtype=np.int64)
    live[1] = 0
    live[2, : B - 500] = 0  # live for 500 s of 3600: below a 0.2 fraction (720 s)
    counts, _ = poisson_counts(rng, np.array(6.0), live)
    store = fill_store(counts, live, BASE)
    est = background_rates(store, BASE + B, background_bins=B, guard_bins=0, min_live_fraction=0.2)
    np.testing.assert_array_equal(est.ok, [True, False, False])
    np.testing.assert_array_equal(est.rate_hz[1:], 0.0)
    assert np.all(np.isfinite(est.rate_sd_hz))
    pred = predict_counts(
        store, BASE + B, BASE + B + 60, background_bins=B, guard_bins=0, min_live_fraction=0.2
    )
    np.testing.assert_array_equal(pred.ok[:, 0], [True, False, False])
    for arr in (pred.expected, pred.variance, pred.net_expected, pred.net_variance):
        assert np.all(np.isfinite(arr))
    assert pred.net_expected[0] == pred.expected[0, 0]
    assert pred.net_observed[0] == pred.observed[0, 0]
    assert pred.net_sites[0] == 1


# ----------------------------------------------------------------------------- predict_counts


def _drift_sites(
    rng: np.random.Generator, n_sites: int, rate: float, drift_per_h: float, n_bins: int
) -> tuple[I64Array, I64Array, F64Array]:
    live = np.full((n_sites, n_bins), BIN_NS, dtype=np.int64)
    t_h = (np.arange(n_bins) + 0.5) / 3600.0
    rate_t = rate * (1.0 + drift_per_h * t_h)[None, :]
    counts, lam = poisson_counts(rng, rate_t, live)
    return counts, live, lam


def test_trend_prediction_is_unbiased_where_a_plain_average_is_not() -> None:
    # 80 independent sites at 10 Hz drifting +3 %/h; one 300 s window after an hour.
    rng = np.random.default_rng(5)
    n_sites, w = 80, 300
    counts, live, lam = _drift_sites(rng, n_sites, 10.0, 0.03, B + w)
    store = fill_store(counts, live, BASE)
    truth = lam[:, B:].sum(axis=1)
    pred = predict_counts(store, BASE + B, BASE + B + w, background_bins=B, guard_bins=0)
    z = (pred.expected[:, 0] - truth) / np.sqrt(pred.variance[:, 0])
    se = 1.0 / np.sqrt(n_sites)
    assert abs(z.mean()) < Z3 * se, z.mean()
    # the fit covariance describes the scatter: sample sd of z near 1 (chi-square band)
    assert 0.75 < z.std(ddof=1) < 1.25
    # plain average of the hour before: biased low by ~drift x (B + w) / 2 ~ 3 sd
    flat = background_rates(store, BASE + B, background_bins=B, guard_bins=0, min_live_fraction=0.2)
    z_flat = (flat.rate_hz * w - truth) / (flat.rate_sd_hz * w)
    assert z_flat.mean() < -1.5
    assert abs(z_flat.mean()) > 10 * se


def test_prediction_matches_weighted_polyfit() -> None:
    # The fit is weighted least squares of rate vs time with weights e_j (numpy.polyfit
    # with w = sqrt(e_j) = 1/sigma_j), covariance lam (X^T W X)^-1 (cov="unscaled").
    rng = np.random.default_rng(6)
    n_bins = B + 200
    live = np.full((1, n_bins), BIN_NS, dtype=np.int64)
    live[0, 700:1300] = 0
    live[0, 2000:2600] = rng.integers(1, BIN_NS, 600)
    live[0, B + 50 : B + 80] = 0
    rate_t = 4.0 * (1.0 - 0.05 * np.arange(n_bins) / 3600.0)
    counts, _ = poisson_counts(rng, rate_t[None, :], live)
    store = fill_store(counts, live, BASE)
    on0, on1 = BASE + B + 20, BASE + B + 200
    pred = predict_counts(store, on0, on1, background_bins=B, guard_bins=20)

    bg = slice(0, B)
    e = live[0, bg] / NS_PER_S
    t = np.arange(B) + 0.5
    m = e > 0
    coef, cov = np.polyfit(t[m], counts[0, bg][m] / e[m], 1, w=np.sqrt(e[m]), cov="unscaled")
    on = slice(B + 20, B + 200)
    e_on = live[0, on] / NS_PER_S
    t_on = np.arange(B + 20, B + 200) + 0.5
    grad = np.array([np.sum(e_on * t_on), np.sum(e_on)])  # d mu / d (slope, intercept)
    lam = counts[0, bg].sum() / e.sum()  # Poisson variance from the mean rate
    assert pred.expected[0, 0] == pytest.approx(float(grad @ coef), rel=1e-9)
    assert pred.variance[0, 0] == pytest.approx(float(lam * grad @ cov @ grad), rel=1e-9)
    assert pred.on_live_s[0, 0] == pytest.approx(e_on.sum(), rel=1e-12)
    assert pred.observed[0, 0] == counts[0, on].sum()


def test_many_windows_at_once_equal_one_at_a_time() -> None:
    rng = np.random.default_rng(7)
    n_sites, n_bins = 5, B + 400
    live = np.full((n_sites, n_bins), BIN_NS, dtype=np.int64)
    live[2, 1000:2500] = 0
    counts, _ = poisson_counts(rng, np.array([[1.0], [2.0], [7.0], [15.0], [0.2]]), live)
    store = fill_store(counts, live, BASE, capacity=n_bins + 500)
    b0 = BASE + B + np.arange(0, 400, 16, dtype=np.int64)
    kw = {"background_bins": B - 40, "guard_bins": 40}
    many = predict_counts(store, b0, b0 + 16, **kw)
    # an origin long before the data (empty bins, partly outside the ring) changes nothing
    early = predict_counts(store, b0, b0 + 16, origin_bin=BASE - 900, **kw)
    for k in range(b0.size):
        one = predict_counts(store, int(b0[k]), int(b0[k]) + 16, **kw)
        np.testing.assert_array_equal(many.observed[:, k], one.observed[:, 0])
        np.testing.assert_allclose(many.expected[:, k], one.expected[:, 0], rtol=1e-9)
        np.testing.assert_allclose(many.variance[:, k], one.variance[:, 0], rtol=1e-9)
    np.testing.assert_allclose(early.expected, many.expected, rtol=1e-9)
    np.testing.assert_allclose(many.net_expected, many.expected.sum(axis=0), rtol=1e-12)
    np.testing.assert_array_equal(many.net_observed, many.observed.sum(axis=0))


def test_flat_fit_is_the_classical_onoff_measurement() -> None:
    # Without the slope (min_trend_fraction > 1) the moment-matched off measurement is
    # exactly the background count and the exposure ratio t_on / t_off (Li & Ma 1983, sec. 2).
    rng = np.random.default_rng(8)
    live = np.full((3, B + 100), BIN_NS, dtype=np.int64)
    live[1, 200:900] = 0
    counts, _ = poisson_counts(rng, np.array([[3.0], [11.0], [0.5]]), live)
    store = fill_store(counts, live, BASE)
    pred = predict_counts(
        store, BASE + B, BASE + B + 100, background_bins=B, guard_bins=0, min_trend_fraction=2.0
    )
    n_off, alpha = equivalent_onoff(pred.expected, pred.variance)
    n_bg = counts[:, :B].sum(axis=1)
    t_off = live[:, :B].sum(axis=1) / NS_PER_S
    np.testing.assert_allclose(alpha[:, 0], 100.0 / t_off, rtol=1e-12)
    np.testing.assert_allclose(n_off[:, 0], n_bg, rtol=1e-12)


def test_predict_rejects_bad_windows() -> None:
    live = np.full((1, B + 10), BIN_NS, dtype=np.int64)
    store = fill_store(np.zeros_like(live), live, BASE)
    with pytest.raises(ValueError, match=str(BASE + B + 5)):
        predict_counts(store, BASE + B + 5, BASE + B + 5, background_bins=B, guard_bins=0)
    with pytest.raises(ValueError, match="no longer held"):
        predict_counts(store, BASE + B - 1, BASE + B, background_bins=B, guard_bins=0)


def test_running_sums_equal_fresh_sums_bit_for_bit() -> None:
    """Running sums extended block by block, from an origin over an hour before the
    first data and the oldest held bin (those empty bins are skipped, not summed),
    give predictions identical to the bit to sums computed afresh from the same
    origin. (Checked to fail when the skip reaches one bin into the data.)"""
    rng = np.random.default_rng(21)
    n_sites, cap = 7, 450  # the ring never wraps: no data is dropped
    store = BinStore(n_sites, bin_ns=BIN_NS, capacity=cap)
    origin = BASE - 6000
    bg, guard, on = 100, 2, 4
    # every column any window below uses, relative to the origin
    starts = np.arange(BASE + bg + guard, BASE + 400 - on + 1)
    cols = np.unique(
        np.concatenate([starts - guard - bg, starts - guard, starts, starts + on]) - origin
    )
    sums = CumulativeSums(n_sites, origin, cols)
    sid = np.arange(n_sites, dtype=np.int32)
    calls = 0
    for c0 in range(0, 400, 50):
        live = rng.integers(NS_PER_S // 2, NS_PER_S + 1, (50, n_sites)).astype(np.int64)
        edge = (BASE + c0 + np.arange(50, dtype=np.int64))[:, None] * BIN_NS
        cnt = rng.poisson(5.0 * live / NS_PER_S)
        t_hit = np.repeat(np.broadcast_to(edge, live.shape).ravel(), cnt.ravel())
        s_hit = np.repeat(np.tile(sid, 50), cnt.ravel())
        store.add(
            Block(
                (BASE + c0) * BIN_NS,
                (BASE + c0 + 50) * BIN_NS,
                t_hit,
                s_hit,
                np.tile(sid, 50),
                np.broadcast_to(edge, live.shape).ravel(),
                (edge + live).ravel(),
            )
        )
        b0 = starts[starts + on <= BASE + c0 + 50]
        b0 = b0[b0 >= BASE + c0 - 50] if c0 else b0
        if b0.size == 0:
            continue
        kw = {"background_bins": bg, "guard_bins": guard, "origin_bin": origin}
        running = predict_counts(store, b0, b0 + on, sums=sums, **kw)  # type: ignore[arg-type]
        fresh = predict_counts(store, b0, b0 + on, **kw)  # type: ignore[arg-type]
        for name in ("observed", "expected", "variance", "ok", "on_live_s", "bg_live_s"):
            assert np.array_equal(getattr(running, name), getattr(fresh, name)), (c0, name)
        assert running.expected.min() > 0.0
        calls += 1
    assert store.first_bin > origin and calls >= 5


# ----------------------------------------------------------------------------- the bin ring


def test_ring_reads_equal_the_written_bins_with_and_without_wrapping() -> None:
    """Reads of every range held, contiguous in the ring or wrapped around its end,
    return the bins as written (the first bins, overwritten, are no longer held),
    and a read cannot write into the store; totals over a range are their sums."""
    rng = np.random.default_rng(7)
    n_sites, n_bins, capacity = 3, 50, 17
    live = rng.integers(0, BIN_NS + 1, size=(n_sites, n_bins))
    counts = np.where(live > 0, rng.integers(0, 5, size=(n_sites, n_bins)), 0)
    b0 = BASE
    store = fill_store(counts, live, b0, capacity=capacity)
    assert store.first_bin == b0 + n_bins - capacity
    wrapped = 0
    for lo in range(store.first_bin, b0 + n_bins + 1):
        for hi in range(lo, b0 + n_bins + 1):
            got_c, got_l = store.counts(lo, hi), store.live_ns(lo, hi)
            np.testing.assert_array_equal(got_c, counts[:, lo - b0 : hi - b0])
            np.testing.assert_array_equal(got_l, live[:, lo - b0 : hi - b0])
            assert not got_c.flags.writeable and not got_l.flags.writeable
            n, live_ns = store.totals(lo, hi)
            np.testing.assert_array_equal(n, counts[:, lo - b0 : hi - b0].sum(axis=1))
            np.testing.assert_array_equal(live_ns, live[:, lo - b0 : hi - b0].sum(axis=1))
            wrapped += (lo % capacity) + (hi - lo) > capacity
    assert wrapped > 0  # both kinds of read were made
    for read in (store.counts, store.totals):
        with pytest.raises(IndexError, match="not all held"):
            read(store.first_bin - 1, store.first_bin + 1)
