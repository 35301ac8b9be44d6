"""Rolling, live-time-aware background rates read from a :class:`BinStore`.

Two estimates, both per site and vectorised:

* :func:`background_rates` -- the mean rate over a background stretch that ends
  ``guard_bins`` before the bin being judged (the judged data never sit in their
  own background). Bayesian posterior with the Jeffreys prior of a Poisson rate,
  so the rate is never zero and never divides by zero.
* :func:`predict_counts` -- the expected counts in one or many on-windows from a
  weighted least-squares straight-line fit of rate against time over each
  window's background, extrapolated over the window with the window's own live
  exposure. It follows slow drifts (pressure, temperature) that bias a plain
  average by about half the background length times the drift.

Times inside the fits are float seconds relative to a local origin bin, never
absolute GPS seconds.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tocsin.engine.exposure import BinStore
from tocsin.types import NS_PER_S, BoolArray, F64Array, I64Array

__all__ = [
    "CumulativeSums",
    "Prediction",
    "RateEstimate",
    "background_rates",
    "equivalent_onoff",
    "predict_counts",
]

_DEFAULT_MIN_LIVE_FRACTION = 0.2  # same default as RateConfig.min_live_fraction
_DEFAULT_MIN_TREND_FRACTION = 0.5
_REL_SXX_FLOOR = 1e-9  # a fit whose time spread is below this (relative) has no slope


@dataclass(frozen=True, slots=True)
class RateEstimate:
    """Per-site background over bins ``[b0, b1)``. Arrays have shape ``(n_sites,)``.

    ``rate_hz`` is the posterior mean ``(n + 1/2) / live_s`` and ``rate_sd_hz``
    the posterior standard deviation ``sqrt(n + 1/2) / live_s`` (Jeffreys prior
    Gamma(1/2, 0) on a Poisson rate). Sites with too little live time have
    ``ok = False`` and rate 0: they contribute no expectation.
    """

    b0: int
    b1: int
    n: I64Array
    live_s: F64Array
    rate_hz: F64Array
    rate_sd_hz: F64Array
    ok: BoolArray


def _check_lengths(background_bins: int, guard_bins: int, min_live_fraction: float) -> None:
    if background_bins <= 0:
        raise ValueError(f"background_bins must be positive, got {background_bins}")
    if guard_bins < 0:
        raise ValueError(f"guard_bins must be >= 0, got {guard_bins}")
    if not 0.0 <= min_live_fraction <= 1.0:
        raise ValueError(f"min_live_fraction must lie in [0, 1], got {min_live_fraction!r}")


def background_rates(
    store: BinStore,
    end_bin: int,
    *,
    background_bins: int,
    guard_bins: int,
    min_live_fraction: float,
) -> RateEstimate:
    """Mean rate (Hz) per site over ``[end_bin - guard - background, end_bin - guard)``.

    ``ok`` requires live time of at least ``min_live_fraction`` of the
    background length (and more than zero).
    """
    _check_lengths(background_bins, guard_bins, min_live_fraction)
    b1 = end_bin - guard_bins
    b0 = b1 - background_bins
    n, live_ns = store.totals(b0, b1)
    live_s = live_ns / NS_PER_S
    length_s = background_bins * store.bin_ns / NS_PER_S
    ok = (live_s > 0.0) & (live_s >= min_live_fraction * length_s)
    safe = np.where(ok, live_s, 1.0)
    rate = np.where(ok, (n + 0.5) / safe, 0.0)
    sd = np.where(ok, np.sqrt(n + 0.5) / safe, 0.0)
    return RateEstimate(b0, b1, n.astype(np.int64), live_s, rate, sd, ok)


def equivalent_onoff(expected: F64Array, variance: F64Array) -> tuple[F64Array, F64Array]:
    """Moment-matched off measurement ``(n_off_eff, alpha_eff)`` of a background estimate.

    A background estimate of mean ``mu`` and variance ``v`` is replaced by an
    off count with the same mean and variance: ``alpha * n_off = mu`` and
    ``alpha^2 * n_off = v`` give ``n_off = mu^2 / v`` and ``alpha = v / mu``. For
    a flat fit this is exactly the off count of the background and the ratio of
    exposures. Entries with ``mu <= 0`` or ``v <= 0`` get 0 for both.
    """
    good = (expected > 0.0) & (variance > 0.0)
    mu = np.where(good, expected, 1.0)
    v = np.where(good, variance, 1.0)
    return np.where(good, mu * mu / v, 0.0), np.where(good, v / mu, 0.0)


@dataclass(frozen=True, slots=True)
class Prediction:
    """Expected background counts in on-windows ``[on_b0[k], on_b1[k])``.

    Per-site arrays have shape ``(n_sites, n_windows)``; ``net_*`` arrays
    ``(n_windows,)`` sum the sites with ``ok`` background and some live time in
    the window (their number is ``net_sites``). ``expected`` and ``variance``
    (counts, counts^2) are 0 where not ``ok``; ``observed`` is the window's
    actual count, ``on_live_s`` its live seconds.
    """

    on_b0: I64Array
    on_b1: I64Array
    observed: I64Array
    expected: F64Array
    variance: F64Array
    ok: BoolArray
    on_live_s: F64Array
    bg_live_s: F64Array
    net_observed: I64Array
    net_expected: F64Array
    net_variance: F64Array
    net_sites: I64Array

    @property
    def used(self) -> BoolArray:
        """Site-windows that enter the network sum: ``ok`` and live in the window."""
        return self.ok & (self.on_live_s > 0.0)

    @property
    def n_off_eff(self) -> F64Array:
        return equivalent_onoff(self.expected, self.variance)[0]

    @property
    def alpha_eff(self) -> F64Array:
        return equivalent_onoff(self.expected, self.variance)[1]


def _csum0(x: np.ndarray) -> np.ndarray:
    out = np.zeros((*x.shape[:-1], x.shape[-1] + 1), dtype=x.dtype)
    np.cumsum(x, axis=-1, out=out[..., 1:])
    return out


_N_SUMS = 5
"""Running sums kept per site: y, e, e t, e t^2, y t (see :func:`predict_counts`)."""


def _bin_terms(
    store: BinStore, origin: int, b0: int, b1: int
) -> tuple[I64Array, F64Array, F64Array, F64Array, F64Array]:
    """Per-bin terms of bins ``[b0, b1)``: counts y, live seconds e, e t, e t^2, y t,
    with t the bin centre in seconds from ``origin``; bins before the oldest held bin
    are empty."""
    bin_s = store.bin_ns / NS_PER_S
    start = min(max(b0, store.first_bin), b1)
    y = store.counts(start, b1)
    live_ns = store.live_ns(start, b1)
    if start > b0:  # empty bins before the oldest held bin
        pad = ((0, 0), (start - b0, 0))
        y = np.pad(y, pad)
        live_ns = np.pad(live_ns, pad)
    e = live_ns / NS_PER_S
    t = (np.arange(b0 - origin, b1 - origin, dtype=np.float64) + 0.5) * bin_s
    return y, e, e * t, e * (t * t), y * t


class CumulativeSums:
    """Running sums along bins from a fixed ``origin_bin``, extended as data arrive.

    Column ``j`` holds the sums over bins ``[origin, origin + j)`` of the five
    terms :func:`predict_counts` fits (counts, live seconds and their time
    moments, times in seconds from the origin). Only the columns in ``keep``
    are stored. Extending adds the new bins one after another to the last
    column, exactly as one cumulative sum over the whole stretch would, so the
    values are bit-identical to a fresh computation whatever the extension steps.
    """

    def __init__(self, n_sites: int, origin_bin: int, keep: I64Array) -> None:
        self.origin = origin_bin
        self.end = origin_bin
        """One past the last bin summed (column ``end - origin`` is the latest)."""
        self._keep = np.unique(np.asarray(keep, dtype=np.int64))
        self._last: list[np.ndarray] = [np.zeros(n_sites, dtype=np.int64)] + [
            np.zeros(n_sites) for _ in range(_N_SUMS - 1)
        ]
        self._cols: dict[int, list[np.ndarray]] = {}
        if self._keep.size and self._keep[0] == 0:
            self._cols[0] = [x.copy() for x in self._last]

    def extend(self, store: BinStore, end_bin: int) -> None:
        """Add bins up to ``end_bin`` (exclusive)."""
        if end_bin <= self.end:
            return
        if self.end < store.empty_before:
            # Bins before the first data, or before the oldest held bin, are empty
            # (_bin_terms pads the latter with zeros too): the sums stand still over
            # them, so their columns are the last ones (adding zeros changes no bit).
            # Saves summing an hour of zeros per site at start-up.
            skip_to = min(store.empty_before, end_bin)
            j0, j1 = self.end - self.origin, skip_to - self.origin
            for j in self._keep[(self._keep > j0) & (self._keep <= j1)].tolist():
                self._cols[j] = [x.copy() for x in self._last]
            self.end = skip_to
            if end_bin <= self.end:
                return
        j0, j1 = self.end - self.origin, end_bin - self.origin
        want = self._keep[(self._keep > j0) & (self._keep <= j1)]
        terms = _bin_terms(store, self.origin, self.end, end_bin)
        last: list[np.ndarray] = []
        picked: list[np.ndarray] = []
        for prev, x in zip(self._last, terms, strict=True):
            c = np.cumsum(np.concatenate([prev[:, None], x], axis=1), axis=1)
            last.append(c[:, -1].copy())
            picked.append(c[:, want - j0])
        for i, j in enumerate(want.tolist()):
            self._cols[j] = [p[:, i] for p in picked]
        self._last = last
        self.end = end_bin

    def columns(self, idx: I64Array) -> list[np.ndarray]:
        """The five sums at columns ``idx`` (each (n_sites, len(idx)))."""
        try:
            cols = [self._cols[int(j)] for j in idx]
        except KeyError as exc:
            raise KeyError(
                f"column {exc.args[0]} (bin {self.origin + int(exc.args[0])}) was not "
                f"kept or not yet summed (summed to bin {self.end})"
            ) from None
        return [np.stack([c[i] for c in cols], axis=1) for i in range(_N_SUMS)]

    def keep_only(self, idx: I64Array) -> None:
        """Keep (and from now on sum) only columns ``idx``."""
        self._keep = np.unique(np.asarray(idx, dtype=np.int64))
        keep = set(self._keep.tolist())
        for j in [j for j in self._cols if j not in keep]:
            del self._cols[j]


def predict_counts(
    store: BinStore,
    on_b0: int | I64Array,
    on_b1: int | I64Array,
    *,
    background_bins: int,
    guard_bins: int,
    min_live_fraction: float = _DEFAULT_MIN_LIVE_FRACTION,
    min_trend_fraction: float = _DEFAULT_MIN_TREND_FRACTION,
    origin_bin: int | None = None,
    sums: CumulativeSums | None = None,
) -> Prediction:
    """Drift-following expected counts for many on-windows and all sites at once.

    Window ``k`` is ``[on_b0[k], on_b1[k])`` (bins); its background is the
    ``background_bins`` bins ending ``guard_bins`` before ``on_b0[k]``. Over the
    background, bin j (live seconds ``e_j``, count ``y_j``, centre time ``t_j``)
    is modelled as ``y_j ~ Poisson(e_j (a + b (t_j - tc)))`` with ``tc`` the
    exposure-weighted mean time. Weighted least squares with weights ``1/e_j``
    gives ``a = sum y / sum e`` and ``b = sum y (t - tc) / sum e (t - tc)^2``;
    bins with no live time drop out by themselves. The prediction is
    ``mu = a E_on + b M_on`` with ``E_on = sum_on e_j`` and
    ``M_on = sum_on e_j (t_j - tc)``, floored at the Jeffreys half count
    ``0.5 E_on / sum e`` so a steep fitted fall never predicts zero. Its
    variance is ``lam (E_on^2 / sum e + M_on^2 / Sxx)`` from the fit covariance
    ``lam (X^T W X)^-1`` with the Poisson variance ``lam = sum y / sum e`` (half a
    count when the background is empty, so the variance is never zero).

    All sums come from cumulative sums along bins starting at ``origin_bin``
    (default: the earliest background bin), with times in seconds from that
    origin. Results depend on the origin only through float rounding, so a
    caller that needs bit-identical results for a window regardless of how its
    calls are batched passes a fixed ``origin_bin``. The origin may lie before
    the store's oldest bin: the missing bins count as empty (no live time, no
    hits), which is what a fresh store holds there; every background itself
    must be held.

    ``sums``: running sums from ``origin_bin`` kept between calls (a
    :class:`CumulativeSums` whose ``keep`` holds every column the windows use):
    extended to the last window's end instead of summing from the origin again.
    Same values to the bit.

    ``ok`` needs background live time ``>= min_live_fraction`` of its length.
    The slope is fitted only when the live time is ``>= min_trend_fraction`` of
    the length (and its spread in time is not degenerate); otherwise ``b = 0``
    and the variance is the flat ``lam E_on^2 / sum e`` -- after a restart a
    short background says little about a slope, and a drift biases its mean
    only by the drift over half of that short stretch.
    """
    _check_lengths(background_bins, guard_bins, min_live_fraction)
    b0 = np.atleast_1d(np.asarray(on_b0, dtype=np.int64))
    b1 = np.atleast_1d(np.asarray(on_b1, dtype=np.int64))
    if b0.ndim != 1 or b0.shape != b1.shape:
        raise ValueError(f"on_b0 {b0.shape} and on_b1 {b1.shape} must be equal 1-D shapes")
    if b0.size == 0:
        raise ValueError("predict_counts needs at least one window")
    if np.any(b1 <= b0):
        bad = int(np.argmax(b1 <= b0))
        raise ValueError(f"window {bad} is empty or reversed: [{int(b0[bad])}, {int(b1[bad])})")
    lo_bg = b0 - guard_bins - background_bins
    first = int(lo_bg.min())
    origin = first if origin_bin is None else int(origin_bin)
    if origin > first:
        raise ValueError(f"origin_bin {origin} is after the earliest background bin {first}")
    end = int(b1.max())
    bin_s = store.bin_ns / NS_PER_S
    held = store.first_bin
    if first < held and (sums is None or sums.end <= first):
        raise ValueError(f"background from bin {first} is no longer held (oldest bin {held})")
    lo = lo_bg - origin
    hi = b0 - guard_bins - origin
    a0 = b0 - origin
    a1 = b1 - origin
    if sums is None:
        c_y, c_e, c_et, c_et2, c_yt = (_csum0(x) for x in _bin_terms(store, origin, origin, end))
    else:
        if sums.origin != origin:
            raise ValueError(f"running sums start at bin {sums.origin}, not at {origin}")
        sums.extend(store, end)
        cols = np.unique(np.concatenate([lo, hi, a0, a1]))
        c_y, c_e, c_et, c_et2, c_yt = sums.columns(cols)
        lo, hi, a0, a1 = (np.searchsorted(cols, x) for x in (lo, hi, a0, a1))

    s0 = c_e[:, hi] - c_e[:, lo]
    s1 = c_et[:, hi] - c_et[:, lo]
    s2 = c_et2[:, hi] - c_et2[:, lo]
    y0 = (c_y[:, hi] - c_y[:, lo]).astype(np.float64)
    y1 = c_yt[:, hi] - c_yt[:, lo]

    length_s = background_bins * bin_s
    has_live = s0 > 0.0
    s0_safe = np.where(has_live, s0, 1.0)
    tc = s1 / s0_safe
    sxx = s2 - s1 * tc
    ok = has_live & (s0 >= min_live_fraction * length_s)
    trend = (
        ok
        & (s0 >= min_trend_fraction * length_s)
        & (sxx > _REL_SXX_FLOOR * s0 * length_s * length_s)
    )
    sxx_safe = np.where(trend, sxx, 1.0)
    s0_ok = np.where(ok, s0, 1.0)

    rate_c = y0 / s0_ok  # a: fitted rate at tc (Hz)
    slope = np.where(trend, (y1 - tc * y0) / sxx_safe, 0.0)  # b (Hz/s)
    lam = np.maximum(y0, 0.5) / s0_ok  # Poisson variance; half a count if none

    e_on = c_e[:, a1] - c_e[:, a0]
    m_on = (c_et[:, a1] - c_et[:, a0]) - tc * e_on
    mu = np.maximum(rate_c * e_on + slope * m_on, 0.5 * e_on / s0_ok)
    var = lam * (e_on * e_on / s0_ok + np.where(trend, m_on * m_on / sxx_safe, 0.0))
    expected = np.where(ok, mu, 0.0)
    variance = np.where(ok, var, 0.0)
    observed = (c_y[:, a1] - c_y[:, a0]).astype(np.int64)

    used = ok & (e_on > 0.0)
    return Prediction(
        on_b0=b0,
        on_b1=b1,
        observed=observed,
        expected=expected,
        variance=variance,
        ok=ok,
        on_live_s=e_on,
        bg_live_s=s0,
        net_observed=np.where(used, observed, 0).sum(axis=0).astype(np.int64),
        net_expected=np.where(used, expected, 0.0).sum(axis=0),
        net_variance=np.where(used, variance, 0.0).sum(axis=0),
        net_sites=used.sum(axis=0).astype(np.int64),
    )
