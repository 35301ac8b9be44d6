"""The excess trigger: more hits than expected in a fixed, GPS-aligned window.

For every window scale ``w`` (``ExcessConfig.scales_s``, whole exposure bins)
the trigger evaluates the non-overlapping windows ``[k w, (k + 1) w)`` (bins) once
each, as soon as they are complete, for the network sum and for each site with
enough expected hits. The expectation comes from
:func:`tocsin.engine.rates.predict_counts` (a straight-line fit of rate against
time over the background that ends ``guard_bins`` before the window), turned
into an equivalent off measurement (``n_off_eff``, ``alpha_eff``) with the same
mean and variance.

p-value. ``P(N_on > n) + u P(N_on = n)`` under the on/off negative binomial
(:func:`tocsin.engine.stats.onoff_tail`): a randomised p-value, exactly uniform
under the null model, so "p <= x" happens with probability x even at two
expected hits, where a plain discrete p-value would be conservative by a
varying factor. ``u`` is not random but a hash of (scale, window index, site):
independent of the data, which is all the uniformity needs, and the same
input always gives the same p-value (replay equals live).

False alarm rate. By linearity of expectation, if ``R`` tests are made per
second (at scale ``w_s`` there are ``n_s`` tests per window, so
``R = sum_s n_s / w_s``), the expected number of tests per second with
``p <= x`` is ``x R``. A test's false alarm rate is therefore
``far = p R`` (per second; times the Julian year for ``far_per_year``). ``n_s``
changes as sites come and go, so ``R`` is taken from the window under test:
its own test count at its own scale, and for each other scale the number of
tests the same expectations would allow there (a site's expected count scaled
by the ratio of window lengths against ``min_expected``). ``R`` is per second
of network live time: divided by the window's live fraction (that of its most
live used site). Counting decisions with ``far <= F`` over a network live time
T then gives F T on average: the calibration tests (``tests/test_calibration.py``,
and ``tests/test_partial_live.py`` for networks that start and stop inside
bins) check exactly that.

Results do not depend on how ``process`` calls are batched: each scale keeps
its own progress pointer, windows are grouped on a fixed grid, and every group's
cumulative sums start at a fixed origin bin, so even float rounding is the same.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field, fields

import numpy as np

from tocsin.engine.exposure import BinStore
from tocsin.engine.rates import CumulativeSums, Prediction, equivalent_onoff, predict_counts
from tocsin.engine.stats import (
    hash_uniform,
    li_ma_significance,
    onoff_point,
    onoff_tail,
    randomised_p,
)
from tocsin.model.candidate import Candidate
from tocsin.model.config import ExcessConfig, RateConfig
from tocsin.types import NS_PER_S, SECONDS_PER_YEAR, BoolArray, F64Array, I64Array

__all__ = ["ExcessResult", "ExcessTests", "ExcessTrigger"]

_SALT = 0x657863657373  # "excess": keeps these hash values apart from other users
MAX_LISTED_SITES = 30
"""A network candidate lists at most this many of its most excessive sites."""


@dataclass(frozen=True, slots=True)
class ExcessTests:
    """Every test one call made, as flat arrays of equal length.

    ``site`` is the site index, or -1 for the network sum. ``window`` is the
    window index k at scale ``scale_bins`` (window ``[k w, (k + 1) w)`` in bins).
    ``tests_per_s`` is R, so ``far_per_year = p_value * tests_per_s * year``.
    """

    scale_bins: I64Array
    window: I64Array
    site: I64Array
    observed: I64Array
    expected: F64Array
    variance: F64Array
    p_value: F64Array
    tests_per_s: F64Array
    far_per_year: F64Array

    @staticmethod
    def concat(parts: Sequence[ExcessTests]) -> ExcessTests:
        """Join the parts and sort by (window end, scale, site) -- the canonical order."""
        if not parts:
            z = np.zeros(0, dtype=np.int64)
            f = np.zeros(0, dtype=np.float64)
            return ExcessTests(z, z, z, z, f, f, f, f, f)
        cols = [np.concatenate([getattr(p, n) for p in parts]) for n in _TEST_FIELDS]
        scale, window, site = cols[0], cols[1], cols[2]
        order = np.lexsort((site, scale, (window + 1) * scale))
        return ExcessTests(*[c[order] for c in cols])

    def __len__(self) -> int:
        return int(self.site.size)


_TEST_FIELDS = tuple(f.name for f in fields(ExcessTests))


@dataclass(slots=True)
class ExcessResult:
    """What one :meth:`ExcessTrigger.evaluate` call found."""

    tests: ExcessTests
    candidates: list[Candidate] = field(default_factory=list)


def _whole_bins(seconds: float, bin_ns: int, what: str) -> int:
    exact = seconds * NS_PER_S / bin_ns
    n = round(exact)
    if n < 1 or abs(exact - n) > 1e-6 * max(1.0, exact):
        raise ValueError(
            f"{what} {seconds!r} s is not a whole number of {bin_ns / NS_PER_S!r} s bins"
        )
    return int(n)


def _ceil_div(a: int, b: int) -> int:
    return -(-a // b)


class ExcessTrigger:
    """Network-sum and per-site excess tests over GPS-aligned windows of several scales.

    ``guard_bins``: gap between a window's background and its start (0 by
    default: each window is judged once, from the data just before it).
    ``group_bins``: windows are evaluated in groups of at most this many bins
    (default: the longest scale); the ring must hold ``required_capacity_bins``
    plus the longest gap between ``process`` calls for results to be
    bit-identical under any batching. A site takes part once its background
    holds ``rate_cfg.min_live_s`` of live time.
    """

    def __init__(
        self,
        n_sites: int,
        site_ids: Sequence[str],
        cfg: ExcessConfig,
        rate_cfg: RateConfig,
        *,
        bin_ns: int,
        guard_bins: int = 0,
        group_bins: int | None = None,
    ) -> None:
        if n_sites <= 0 or len(site_ids) != n_sites:
            raise ValueError(f"n_sites={n_sites} but {len(site_ids)} site ids given")
        if bin_ns <= 0:
            raise ValueError(f"bin_ns must be positive, got {bin_ns}")
        if abs(rate_cfg.bin_s * NS_PER_S - bin_ns) > 0.5:
            raise ValueError(f"rate.bin_s = {rate_cfg.bin_s!r} s disagrees with bin_ns = {bin_ns}")
        if guard_bins < 0 or (group_bins is not None and group_bins < 1):
            raise ValueError(f"guard_bins={guard_bins} must be >= 0, group_bins={group_bins} >= 1")
        self.n_sites = n_sites
        self.site_ids = list(site_ids)
        self.cfg = cfg
        self.bin_ns = bin_ns
        self.guard_bins = guard_bins
        self.background_bins = _whole_bins(rate_cfg.background_s, bin_ns, "rate.background_s")
        self.min_live_fraction = min(1.0, rate_cfg.min_live_s / rate_cfg.background_s)
        self.scales_bins: list[int] = []
        for s in cfg.scales_s:
            w = _whole_bins(s, bin_ns, "excess scale")
            if w in self.scales_bins:
                raise ValueError(f"excess scale {s!r} s is given twice")
            self.scales_bins.append(w)
        gb = max(self.scales_bins, default=1) if group_bins is None else group_bins
        self._group = [max(1, gb // w) for w in self.scales_bins]
        self._next: list[int | None] = [None] * len(self.scales_bins)
        self._sums: dict[int, CumulativeSums] = {}
        self._sums_store: BinStore | None = None
        self.skipped_windows = 0
        """Windows never evaluated because their background had left the ring."""

    @property
    def required_capacity_bins(self) -> int:
        """Ring length (bins) needed, not counting the lag between ``process`` calls."""
        spans = [g * w for g, w in zip(self._group, self.scales_bins, strict=True)]
        return self.guard_bins + self.background_bins + max(spans, default=0)

    def state(self) -> dict[str, object]:
        """Progress pointers (for checkpoints)."""
        return {"next": list(self._next)}

    def restore(self, st: dict[str, object]) -> None:
        """Load what :meth:`state` returned."""
        nxt = list(st["next"])  # type: ignore[call-overload]
        if len(nxt) != len(self.scales_bins):
            raise ValueError(
                f"checkpoint has {len(nxt)} scales, trigger has {len(self.scales_bins)}"
            )
        self._next = [None if v is None else int(v) for v in nxt]
        self._sums.clear()

    # ------------------------------------------------------------------ public

    def process(
        self, store: BinStore, done_bin: int, *, far_threshold_per_year: float
    ) -> list[Candidate]:
        """Evaluate every new complete window ending at or before ``done_bin``.

        Returns the decisions with ``far_per_year <= far_threshold_per_year``,
        ordered by (window end, scale, network before sites, site index).
        Overlapping decisions are not merged here.
        """
        return self.evaluate(
            store, done_bin, far_threshold_per_year=far_threshold_per_year
        ).candidates

    def evaluate(
        self, store: BinStore, done_bin: int, *, far_threshold_per_year: float
    ) -> ExcessResult:
        """Like :meth:`process`, but also returns every test made (:class:`ExcessTests`)."""
        if not far_threshold_per_year > 0.0:
            raise ValueError(f"far_threshold_per_year must be > 0, got {far_threshold_per_year!r}")
        if store.n_sites != self.n_sites or store.bin_ns != self.bin_ns:
            raise ValueError(
                f"store has {store.n_sites} sites and {store.bin_ns} ns bins; trigger expects "
                f"{self.n_sites} sites and {self.bin_ns} ns bins"
            )
        need = self.guard_bins + self.background_bins + max(self.scales_bins, default=0)
        if store.capacity < need:
            raise ValueError(f"store capacity {store.capacity} bins is below the {need} needed")
        if store.end_bin is None:
            return ExcessResult(ExcessTests.concat([]))
        if done_bin > store.end_bin:
            raise ValueError(f"done_bin {done_bin} is beyond the store's end bin {store.end_bin}")
        parts: list[ExcessTests] = []
        cands: list[tuple[tuple[int, int, int], Candidate]] = []
        first = store.first_bin
        for si, w in enumerate(self.scales_bins):
            k_end = done_bin // w
            k_min = _ceil_div(first + self.guard_bins + self.background_bins, w)
            k0 = self._next[si]
            if k0 is None:
                k0 = k_min
            if k0 < k_min:
                self.skipped_windows += k_min - k0
                k0 = k_min
            if k_end <= k0:
                self._next[si] = k0
                continue
            gsize = self._group[si]
            for g in range(k0 // gsize, (k_end - 1) // gsize + 1):
                klo, khi = max(k0, g * gsize), min(k_end, (g + 1) * gsize)
                if not store.live_ns(klo * w, khi * w).any():
                    # No site live in any of these windows (after the end of the data,
                    # or a network-wide outage): no test and no candidate can come of
                    # them, so their running sums are not built.
                    continue
                # Fixed origin of the group's cumulative sums, on a grid: the
                # same in every batching, so even float rounding agrees.
                anchor = g * gsize * w - self.guard_bins - self.background_bins
                tests, found = self._evaluate_group(
                    store, si, klo, khi, anchor, far_threshold_per_year
                )
                parts.append(tests)
                cands.extend(found)
            self._next[si] = k_end
        cands.sort(key=lambda kc: kc[0])
        return ExcessResult(ExcessTests.concat(parts), [c for _, c in cands])

    # ------------------------------------------------------------------ internals

    def _columns(self, si: int, anchor: int, klo: int, khi: int) -> I64Array:
        """Bins at which windows ``[klo, khi)`` of scale ``si`` read running sums."""
        w = self.scales_bins[si]
        ks = np.arange(klo, khi, dtype=np.int64)
        start = ks * w - self.guard_bins
        out: I64Array = np.unique(
            np.concatenate([start - self.background_bins, start, ks * w, (ks + 1) * w])
        )
        return out

    def _sums_for(self, store: BinStore, si: int, anchor: int) -> CumulativeSums:
        """The running sums of scale ``si``'s current group (origin ``anchor``): kept
        between calls, so each bin is summed once per group instead of once per call."""
        cur = self._sums.get(si)
        if cur is None or cur.origin != anchor or self._sums_store is not store:
            w = self.scales_bins[si]
            g0 = (anchor + self.guard_bins + self.background_bins) // w
            cols = self._columns(si, anchor, g0, g0 + self._group[si]) - anchor
            cur = CumulativeSums(self.n_sites, anchor, cols)
            self._sums[si] = cur
            self._sums_store = store
        return cur

    def _tests_per_s(self, si: int, pred: Prediction, net_ok: BoolArray) -> F64Array:
        """R for each window of the group: tests per second over all scales (1/s)."""
        w = self.scales_bins[si]
        bin_s = self.bin_ns / NS_PER_S
        used = pred.used
        rate = np.zeros(pred.on_b0.size, dtype=np.float64)
        for wj in self.scales_bins:
            n = net_ok.astype(np.float64)
            if self.cfg.per_site:
                scaled = pred.expected if wj == w else pred.expected * (wj / w)
                n = n + (used & (scaled >= self.cfg.min_expected)).sum(axis=0)
            rate += n / (wj * bin_s)
        # Per second of network live time: a window in which the sites are live for
        # only a fraction of its length spends only that much of the live time the
        # false alarm rate is counted against (the largest fraction of one used
        # site: exact when sites share their dead time, conservative otherwise).
        live = np.where(used, pred.on_live_s, 0.0).max(axis=0) / (w * bin_s)
        out: F64Array = np.where(live > 0.0, rate / np.where(live > 0.0, live, 1.0), rate)
        return out

    def _evaluate_group(
        self, store: BinStore, si: int, klo: int, khi: int, anchor: int, far_max: float
    ) -> tuple[ExcessTests, list[tuple[tuple[int, int, int], Candidate]]]:
        w = self.scales_bins[si]
        ks = np.arange(klo, khi, dtype=np.int64)
        sums = self._sums_for(store, si, anchor)
        pred = predict_counts(
            store,
            ks * w,
            (ks + 1) * w,
            background_bins=self.background_bins,
            guard_bins=self.guard_bins,
            min_live_fraction=self.min_live_fraction,
            origin_bin=anchor,
            sums=sums,
        )
        # only the columns of the group's later windows are kept
        g_end = (anchor + self.guard_bins + self.background_bins) // w + self._group[si]
        if khi < g_end:
            sums.keep_only(self._columns(si, anchor, khi, g_end) - anchor)
        else:
            del self._sums[si]
        used = pred.used
        if self.cfg.network:
            net_ok = (pred.net_expected > 0.0) & (pred.net_variance > 0.0)
        else:
            net_ok = np.zeros(ks.size, dtype=bool)
        if self.cfg.per_site:
            site_ok = used & (pred.expected >= self.cfg.min_expected) & (pred.variance > 0.0)
        else:
            site_ok = np.zeros(used.shape, dtype=bool)
        r_per_s = self._tests_per_s(si, pred, net_ok)

        # Network tests first (site -1), then site tests, window-major.
        kn = np.flatnonzero(net_ok)
        ss, kk = np.nonzero(site_ok.T)[::-1]  # window-major order
        win = np.concatenate([kn, kk])
        site = np.concatenate([np.full(kn.size, -1, dtype=np.int64), ss.astype(np.int64)])
        obs = np.concatenate([pred.net_observed[kn], pred.observed[ss, kk]])
        mu = np.concatenate([pred.net_expected[kn], pred.expected[ss, kk]])
        var = np.concatenate([pred.net_variance[kn], pred.variance[ss, kk]])
        n_off, alpha = equivalent_onoff(mu, var)
        u = hash_uniform(_SALT, w, ks[win], site)
        p = randomised_p(onoff_tail(obs + 1, n_off, alpha), onoff_point(obs, n_off, alpha), u)
        rate = r_per_s[win]
        far = p * rate * SECONDS_PER_YEAR
        tests = ExcessTests(
            scale_bins=np.full(win.size, w, dtype=np.int64),
            window=ks[win],
            site=site,
            observed=obs.astype(np.int64),
            expected=mu,
            variance=var,
            p_value=p,
            tests_per_s=rate,
            far_per_year=far,
        )
        found: list[tuple[tuple[int, int, int], Candidate]] = []
        for i in np.flatnonzero(far <= far_max):
            j = int(win[i])
            k = int(ks[j])
            s = int(site[i])
            lima = float(li_ma_significance(obs[i], n_off[i], alpha[i]))
            n_above: int | None = None
            if s < 0:
                sites, n_above = self._excess_sites(pred, j)
                statistic = "network"
            else:
                sites, statistic = [self.site_ids[s]], "site"
            details: dict[str, object] = {
                "li_ma_sigma": lima,
                "alpha_eff": float(alpha[i]),
                "n_off_eff": float(n_off[i]),
                "expected_sd": float(np.sqrt(var[i])),
                "live_sites": int(pred.net_sites[j]),
                "window_end_ns": (k + 1) * w * self.bin_ns,
                "tests_per_s": float(rate[i]),
            }
            if n_above is not None:
                details["sites_above_1sigma"] = n_above
            cand = Candidate(
                trigger="excess",
                statistic=statistic,
                time_gps_ns=k * w * self.bin_ns,
                window_s=w * self.bin_ns / NS_PER_S,
                sites=sites,
                p_value=float(p[i]),
                far_per_year=float(far[i]),
                multiplicity=len(sites),
                observed=float(obs[i]),
                expected=float(mu[i]),
                details=details,
            )
            found.append((((k + 1) * w, w, s), cand))
        return tests, found

    def _excess_sites(self, pred: Prediction, j: int) -> tuple[list[str], int]:
        """Sites of window j above expectation by more than 1 sigma, most significant first."""
        used = pred.used[:, j]
        mu = pred.expected[:, j]
        sd = np.sqrt(np.where(used, mu + pred.variance[:, j], 1.0))
        z = np.where(used, (pred.observed[:, j] - mu) / sd, -np.inf)
        idx = np.flatnonzero(z > 1.0)
        idx = idx[np.lexsort((idx, -z[idx]))]
        return [self.site_ids[int(i)] for i in idx[:MAX_LISTED_SITES]], int(idx.size)
