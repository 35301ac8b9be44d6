"""When each batch reaches the aggregator (``recv_ns``), and the order of a recording.

A batch is sent when its live interval closes and travels for a log-normal delay
(the site's ``delay_median_s`` and ``delay_sigma``): GPS stations on good links
~20-200 ms, NTP counters up to ~1 s, phones up to ~2 s. On-time delays are capped
so that ``recv_ns - live_start`` stays at least 0.2 s inside the lateness
allowance; a fraction ``late_fraction`` of batches, drawn independently of their
content, is instead held back past the allowance by 0.1 s plus an exponential
time of mean :data:`LATE_EXTRA_MEAN_S`.

A site's on-time batches travel over one connection and arrive in the order
sent (each arrival is at least the previous one's); a late batch stands for a
lost message sent again after a time-out, so its successors overtake it.
Batches of different sites interleave and arrive out of their live-time order.
"""

from __future__ import annotations

from typing import Final

import numpy as np

from tocsin.sim.scenario import LATENESS_MARGIN_S, MIN_DELAY_S, SiteSim
from tocsin.types import NS_PER_S, I64Array

LATE_EXTRA_MEAN_S: Final = 10.0
"""Mean extra hold-up (s) of a batch chosen to arrive late."""


def arrival_times(
    sim: SiteSim,
    live_start: I64Array,
    live_end: I64Array,
    rng: np.random.Generator,
    *,
    late_fraction: float,
    lateness_ns: int,
) -> I64Array:
    """``recv_ns`` (GPS ns) of each batch ``[live_start, live_end)`` of one site."""
    n = live_start.size
    delay_s = rng.lognormal(np.log(sim.delay_median_s), sim.delay_sigma, size=n)
    late = rng.random(n) < late_fraction
    extra_s = rng.exponential(LATE_EXTRA_MEAN_S, size=n)
    length_ns = live_end - live_start
    budget_s = (lateness_ns - length_ns) / NS_PER_S - LATENESS_MARGIN_S
    on_time = np.clip(delay_s, MIN_DELAY_S, np.maximum(budget_s, MIN_DELAY_S))
    late_delay = (lateness_ns - length_ns) / NS_PER_S + 0.1 + extra_s
    d = np.where(late, late_delay, on_time)
    recv: I64Array = live_end + np.round(d * NS_PER_S).astype(np.int64)
    # in order on the connection; stays on time: live_start grows with seq
    recv[~late] = np.maximum.accumulate(recv[~late])
    return recv


def arrival_order(recv_ns: I64Array, site_index: I64Array, seq: I64Array) -> I64Array:
    """Indices that sort batches by arrival time, ties broken by site index then seq."""
    order: I64Array = np.lexsort((seq, site_index, recv_ns)).astype(np.int64)
    return order
