"""Run a scenario: background per site, injections, arrival times.

Random streams are independent per (site, purpose) and per injection (see
:mod:`tocsin.sim.scenario`), so an injection never changes the background, the
dead time or the arrival times, and the same scenario gives the same result.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from tocsin.model.batch import HitBatch
from tocsin.sim.arrival import arrival_order, arrival_times
from tocsin.sim.background import SiteStream, background_stream
from tocsin.sim.inject import inject
from tocsin.sim.injspec import InjectionSpec
from tocsin.sim.scenario import TAG_ARRIVAL, TAG_BACKGROUND, TAG_INJECT, Scenario
from tocsin.types import I64Array

Progress = Callable[[float], None]
"""Called with the fraction done, in [0, 1]."""


@dataclass(frozen=True, slots=True)
class Simulation:
    """The simulated network: one stream per registry site, its batches' arrival times.

    ``recv_ns[i][j]`` is when batch ``j`` (``seq == j``) of site ``i`` arrives (GPS ns);
    ``injections`` holds one truth record per injection, in the order given.
    """

    scenario: Scenario
    streams: tuple[SiteStream, ...]
    recv_ns: tuple[I64Array, ...]
    injections: tuple[dict[str, Any], ...]

    @property
    def n_batches(self) -> int:
        return sum(s.n_batches for s in self.streams)

    @property
    def n_hits(self) -> int:
        return sum(int(s.t.size) for s in self.streams)

    def late_mask(self, site_index: int) -> np.ndarray[Any, np.dtype[np.bool_]]:
        """Batches of a site that arrive after the lateness allowance (from live start)."""
        st = self.streams[site_index]
        late: np.ndarray[Any, np.dtype[np.bool_]] = (
            self.recv_ns[site_index] - st.live_start > self.scenario.lateness_ns
        )
        return late

    def order(self) -> tuple[I64Array, I64Array]:
        """(site index, seq) of every batch in arrival order."""
        site = np.concatenate(
            [np.full(s.n_batches, s.site_index, dtype=np.int64) for s in self.streams]
        )
        seq = np.concatenate([np.arange(s.n_batches, dtype=np.int64) for s in self.streams])
        recv = np.concatenate(self.recv_ns)
        k = arrival_order(recv, site, seq)
        return site[k], seq[k]


def simulate(
    scenario: Scenario,
    injections: Sequence[InjectionSpec] = (),
    *,
    progress: Progress | None = None,
) -> Simulation:
    """Simulate ``scenario`` with ``injections`` (applied in order)."""
    n = len(scenario.registry)
    streams: list[SiteStream] = []
    for i, sim in enumerate(scenario.sims):
        rng = scenario.rng(sim.site_id, TAG_BACKGROUND)
        streams.append(background_stream(i, sim, scenario.start_ns, scenario.end_ns, rng))
        if progress is not None:
            progress(0.9 * (i + 1) / n)
    truths: list[dict[str, Any]] = []
    background = tuple(streams)
    for k, spec in enumerate(injections):
        rng = np.random.default_rng(np.random.SeedSequence([scenario.seed, TAG_INJECT, k]))
        done = inject(spec, scenario, background, rng)
        for i, extra in done.hits.items():
            streams[i] = streams[i].with_hits(extra)
        truths.append(done.truth)
    recv = tuple(
        arrival_times(
            sim,
            st.live_start,
            st.live_end,
            scenario.rng(sim.site_id, TAG_ARRIVAL),
            late_fraction=scenario.late_fraction,
            lateness_ns=scenario.lateness_ns,
        )
        for sim, st in zip(scenario.sims, streams, strict=True)
    )
    result = Simulation(scenario, tuple(streams), recv, tuple(truths))
    _annotate_fronts(result)
    if progress is not None:
        progress(1.0)
    return result


def _annotate_fronts(sim: Simulation) -> None:
    """Add the batch seq, and whether that batch arrives late, to every front hit's truth."""
    reg = sim.scenario.registry
    for truth in sim.injections:
        if truth["kind"] != "front":
            continue
        for hit in truth["hits"]:
            i = reg.index(hit["site"])
            j = int(sim.streams[i].batch_of(np.array([hit["t_ns"]], dtype=np.int64))[0])
            hit["batch_seq"] = j
            hit["recv_ns"] = int(sim.recv_ns[i][j])
            hit["late"] = bool(sim.late_mask(i)[j])


def iter_batches(sim: Simulation) -> Iterator[HitBatch]:
    """Every batch of a simulation as a validated-shape :class:`HitBatch`, in arrival order.

    The in-memory twin of a recording: feeding these to a pipeline gives the
    same candidates as replaying the written file.
    """
    ids = sim.scenario.registry.ids
    site_order, seq_order = sim.order()
    offsets = [st.offsets() for st in sim.streams]
    for i, j in zip(site_order.tolist(), seq_order.tolist(), strict=True):
        st = sim.streams[i]
        yield HitBatch(
            ids[i],
            i,
            j,
            int(st.live_start[j]),
            int(st.live_end[j]),
            st.t[offsets[i][j] : offsets[i][j + 1]],
            None,
            int(sim.recv_ns[i][j]),
        )
