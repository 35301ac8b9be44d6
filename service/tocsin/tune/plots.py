"""The report's figures (matplotlib, headless), returned as PNG bytes.

Each figure has a title, axis labels with units and a legend; the report's text
says how to read it.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from tocsin.figures import plt, png_bytes
from tocsin.tune.far import TRIGGERS, FarCurve
from tocsin.tune.injections import Outcome
from tocsin.tune.recommend import KIND_OF_TRIGGER, Recommendation
from tocsin.tune.recorded import RecordedNetwork
from tocsin.types import NS_PER_S, F64Array


def far_figure(curves: Sequence[FarCurve], recs: Sequence[Recommendation]) -> bytes:
    """Measured vs analytic false alarm rate, per trigger (top) and per window scale (bottom)."""
    fig, axes = plt.subplots(2, 2, figsize=(12, 9), squeeze=False)
    thr = {r.trigger: r for r in recs}
    for col, trig in enumerate(TRIGGERS):
        ax = axes[0][col]
        tot = next((c for c in curves if c.trigger == trig and c.window_s is None), None)
        if tot is not None:
            f = tot.thresholds
            shown = tot.counts > 0
            ax.errorbar(
                f[shown],
                tot.rate[shown],
                yerr=[tot.rate[shown] - tot.rate_lo[shown], tot.rate_hi[shown] - tot.rate[shown]],
                fmt="o",
                color="C0",
                capsize=3,
                label="time slides (measured, 1σ Poisson)",
            )
            zero = ~shown
            if zero.any():
                ax.plot(
                    f[zero],
                    tot.rate_hi[zero],
                    "v",
                    color="C0",
                    alpha=0.6,
                    label="no slide candidate: 1σ upper limit",
                )
            ax.plot(f, f, "--", color="k", label="engine's analytic rate (= threshold)")
        if trig in thr:
            ax.axvline(
                thr[trig].threshold_per_year,
                color="C3",
                lw=1,
                label=f"recommended bound {thr[trig].threshold_per_year:.3g}/yr",
            )
            ax.axhline(
                thr[trig].target_per_year,
                color="C3",
                lw=1,
                ls=":",
                label=f"target {thr[trig].target_per_year:g}/yr",
            )
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_title(f"{trig}: false alarm rate, all window scales")
        ax.set_xlabel("threshold on the candidate's far_per_year  F  (per year)")
        ax.set_ylabel("candidates with far_per_year ≤ F, per year of slides")
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize=8, loc="upper left")
        ax2 = axes[1][col]
        scales = [c for c in curves if c.trigger == trig and c.window_s is not None]
        for k, c in enumerate(scales):
            ok = c.counts > 0
            ax2.errorbar(
                c.thresholds[ok],
                c.rate[ok],
                yerr=[c.rate[ok] - c.rate_lo[ok], c.rate_hi[ok] - c.rate[ok]],
                fmt="o-",
                ms=3,
                capsize=2,
                color=f"C{k % 10}",
                label=f"window {_fmt_s(c.window_s or 0.0)}",
            )
        if scales:
            f = scales[0].thresholds
            ax2.plot(f, f, "--", color="k", label="all scales together should follow this")
        ax2.set_xscale("log")
        ax2.set_yscale("log")
        ax2.set_title(f"{trig}: measured rate by window scale of the candidate")
        ax2.set_xlabel("threshold F (per year)")
        ax2.set_ylabel("measured rate (per year)")
        ax2.grid(True, which="both", alpha=0.3)
        if scales:
            ax2.legend(fontsize=7, loc="upper left", ncol=2)
    fig.suptitle("False alarm rate from time slides against the engine's own rate", fontsize=14)
    fig.tight_layout()
    return png_bytes(fig)


def efficiency_figure(
    outs: Sequence[Outcome], recs: Sequence[Recommendation], far_grid: F64Array
) -> bytes:
    """Fraction of injections found against the threshold, per class (left: fronts,
    right: bursts)."""
    fig, axes = plt.subplots(1, 2, figsize=(12, 4.8), squeeze=False)
    for col, trig in enumerate(TRIGGERS):
        ax = axes[0][col]
        kind = KIND_OF_TRIGGER[trig]
        mine = [o for o in outs if o.kind == kind and not math.isnan(o.best_far)]
        values = sorted({o.value for o in mine})
        for k, v in enumerate(values):
            best = np.array([o.best_far for o in mine if o.value == v])
            eff = [(best <= f).mean() for f in far_grid]
            label = f"{int(v)} sites" if kind == "front" else f"strength {v:g}× rate"
            ax.plot(far_grid, eff, "-o", ms=3, color=f"C{k % 10}", label=f"{label} (n={best.size})")
        for r in recs:
            if r.trigger == trig:
                ax.axvline(
                    r.threshold_per_year,
                    color="C3",
                    lw=1,
                    label=f"recommended bound {r.threshold_per_year:.3g}/yr",
                )
        ax.set_xscale("log")
        ax.set_ylim(-0.03, 1.03)
        what = (
            "plane fronts (coincidence trigger)" if kind == "front" else "bursts (excess trigger)"
        )
        ax.set_title(f"Efficiency for injected {what}")
        ax.set_xlabel("threshold on far_per_year  F  (per year)")
        ax.set_ylabel("fraction of injections found")
        ax.grid(True, which="both", alpha=0.3)
        if values:
            ax.legend(fontsize=8, loc="lower right")
        else:
            ax.text(0.5, 0.5, "no injections of this kind", ha="center", transform=ax.transAxes)
    fig.tight_layout()
    return png_bytes(fig)


def rates_figure(net: RecordedNetwork, bin_s: float = 60.0) -> bytes:
    """Each site's hit rate over time in ``bin_s`` bins (live time only), dead time shaded."""
    n = len(net.sites)
    ncol = 4 if n > 8 else 2
    nrow = math.ceil(n / ncol)
    fig, axes = plt.subplots(nrow, ncol, figsize=(13, 1.6 * nrow + 0.8), squeeze=False, sharex=True)
    t0 = net.start_ns
    span = net.end_ns - t0
    nb = max(1, math.ceil(span / (bin_s * NS_PER_S)))
    edges = t0 + (np.arange(nb + 1, dtype=np.int64) * round(bin_s * NS_PER_S))
    x_min = (edges[:-1] - t0 + edges[1:] - t0) / 2 / 60e9
    for i, s in enumerate(net.sites):
        ax = axes[i // ncol][i % ncol]
        counts = np.diff(np.searchsorted(s.t, edges))
        live = np.diff(s.live_before(edges)) / NS_PER_S
        with np.errstate(divide="ignore", invalid="ignore"):
            rate = np.where(live > 0.1 * bin_s, counts / live, np.nan)
        ax.plot(x_min, rate, "-", lw=0.8, color="C0")
        a, b = s.merged()
        dead_lo = np.concatenate([[t0], b])
        dead_hi = np.concatenate([a, [net.end_ns]])
        for lo, hi in zip(dead_lo.tolist(), dead_hi.tolist(), strict=True):
            if hi > lo:
                ax.axvspan((lo - t0) / 60e9, (hi - t0) / 60e9, color="0.6", alpha=0.5, lw=0)
        dead_pct = 100.0 * (1 - s.live_ns / span) if span > 0 else 0.0
        ax.set_title(f"{net.registry.ids[i]}  (dead {dead_pct:.1f} %)", fontsize=8)
        ax.tick_params(labelsize=7)
        if i % ncol == 0:
            ax.set_ylabel("rate (Hz)", fontsize=7)
        if i // ncol == nrow - 1 or i + ncol >= n:
            ax.set_xlabel("minutes after the recording's start", fontsize=7)
    for j in range(n, nrow * ncol):
        axes[j // ncol][j % ncol].set_visible(False)
    fig.suptitle(
        f"Per-site hit rate in {bin_s:g} s bins (hits per live second); grey = dead time",
        fontsize=12,
    )
    fig.tight_layout()
    return png_bytes(fig)


def _fmt_s(w: float) -> str:
    if w >= 1:
        return f"{w:g} s"
    if w >= 1e-3:
        return f"{w * 1e3:g} ms"
    return f"{w * 1e6:g} µs"
