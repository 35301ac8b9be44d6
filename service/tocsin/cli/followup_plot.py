"""A picture of one follow-up: network hits around the outside event time.

Hits of all sites in bins of 1/100 of the window (at least 1 ms), over the window
and one window's length either side; the expectation from the rates; the window
shaded; the outside time and the most significant evaluation marked.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from tocsin.engine.block import Block
from tocsin.engine.targeted import TargetedResult
from tocsin.types import NS_PER_S


def plot_followup(path: Path, block: Block, r: TargetedResult, title: str) -> Path:
    """Write a PNG of the follow-up ``r`` over ``block`` to ``path``."""
    from tocsin.figures import plt  # headless; loaded only when a plot is asked for

    length = int(r.window_end - r.window_start)
    lo = max(int(block.t_start), int(r.window_start) - length)
    hi = min(int(block.t_end), int(r.window_end) + length)
    width = max(length // 100, 1_000_000)
    edges = np.arange(lo, hi + width, width, dtype=np.int64)
    counts, _ = np.histogram(block.t, bins=edges)
    x = (edges[:-1] - r.t_event) / NS_PER_S
    rate = r.expected["network"] / max(length, 1) * width  # hits per bin
    fig, ax = plt.subplots(figsize=(9, 4))
    ax.step(x, counts, where="post", lw=0.8, color="0.2", label="network hits")
    ax.axhline(rate, color="tab:blue", lw=1, ls="--", label="expected (rates x live time)")
    ax.axvspan(
        (r.window_start - r.t_event) / NS_PER_S,
        (r.window_end - r.t_event) / NS_PER_S,
        color="tab:orange",
        alpha=0.15,
        label="searched window",
    )
    ax.axvline(0.0, color="tab:red", lw=1, label="outside event time")
    if r.best is not None:
        ax.axvline(
            (r.best.time_gps_ns - r.t_event) / NS_PER_S,
            color="tab:green",
            lw=1,
            ls=":",
            label=f"most significant: {r.best.kind} {r.best.scale_s:g} s",
        )
    ax.set_xlabel("time from the outside event (s)")
    ax.set_ylabel(f"hits per {width / NS_PER_S:g} s")
    ax.set_title(
        f"{title}\np = {r.p_value:.3g} ({r.calibration}), network 90 % UL "
        f"{r.upper_limit_90['network']:.4g} extra hits",
        fontsize=9,
    )
    ax.legend(fontsize=7, loc="upper right")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
