"""Running the engine over shifted or injected copies of a recording, on several cores.

Each unit of work — one time slide or one injection set — is a full replay of
the recording through the same :class:`~tocsin.pipeline.Pipeline` as ``tocsin
replay``, with a loose candidate threshold. Units run in a
``ProcessPoolExecutor`` (``jobs`` workers); every worker gets the recording
once, at start. Workers ignore SIGINT: on Ctrl-C the parent sets a shared stop
flag, which each worker checks every few thousand batches, so all of them stop
within a fraction of a second, and the parent reports the interruption.
"""

from __future__ import annotations

import itertools
import multiprocessing
import os
import signal
import sys
import time
from collections.abc import Callable, Sequence
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from dataclasses import dataclass, field
from typing import Any, Protocol

from tocsin.engine.core import RATE_UPDATE_S
from tocsin.model.candidate import Candidate
from tocsin.model.config import EngineConfig
from tocsin.pipeline import REPLAY_BLOCK_S, Pipeline
from tocsin.tune.injections import (
    CandRow,
    InjectionSetPlan,
    InjectionSettings,
    Outcome,
    apply_injections,
    outcomes,
)
from tocsin.tune.recorded import RecordedNetwork
from tocsin.tune.slides import SlidePlan, slid_hits
from tocsin.types import NS_PER_S, I64Array

STOP_CHECK_BATCHES = 2048
"""A worker looks at the stop flag once per this many batches."""


class Interrupted(Exception):
    """The run was stopped (Ctrl-C or SIGTERM) before every unit finished."""

    def __init__(self, done: int, total: int) -> None:
        super().__init__(f"interrupted after {done} of {total} runs")
        self.done = done
        self.total = total


class _Flag(Protocol):
    def is_set(self) -> bool: ...


@dataclass(slots=True)
class RunResult:
    """One replay: its candidates (latest revision of each), searched time and cost."""

    kind: str  # "slide" | "inject"
    index: int
    searched_s: float
    """Time searched (s): the network live time (:meth:`RecordedNetwork.network_live_ns`)
    after the rate estimate's warm-up -- the time base of the engine's false alarm rates."""
    candidates: list[CandRow]
    outcomes: list[Outcome] = field(default_factory=list)
    hits: int = 0
    cpu_s: float = 0.0
    wall_s: float = 0.0
    pid: int = 0


@dataclass(frozen=True, slots=True)
class Job:
    """Everything a worker needs besides the unit of work."""

    net: RecordedNetwork
    cfg: EngineConfig
    candidate_far: float
    settings: InjectionSettings


def warmup_s(cfg: EngineConfig) -> float:
    """Time (s) at the start of a replay before every site can take part: the
    minimum live time of a rate estimate, then the first rate update."""
    return cfg.rate.min_live_s + RATE_UPDATE_S


def replay_hits(
    job: Job, hits: Sequence[I64Array] | None, stop: _Flag | None = None
) -> tuple[list[CandRow], float, int]:
    """Run the pipeline over the recording with ``hits`` per site; return the latest
    revision of every candidate from the end of the warm-up on, the searched time (s)
    over the same stretch and the hits used."""
    pipe = Pipeline(
        job.net.registry,
        job.cfg,
        candidate_far_per_year=job.candidate_far,
        release_every_s=REPLAY_BLOCK_S,
    )
    latest: dict[str, Candidate] = {}
    batches = iter(job.net.batches(hits))
    while chunk := list(itertools.islice(batches, STOP_CHECK_BATCHES)):
        for c in pipe.offer_many(chunk):  # as offer() one by one, in runs
            latest[c.id] = c
        if stop is not None and stop.is_set():
            raise Interrupted(0, 0)
    for c in pipe.finish():
        latest[c.id] = c
    eng = pipe.engine
    # Not the engine's span: Pipeline.finish runs the clock a horizon (~12 min with the
    # default windows) past the data so the last windows close, and that stretch has no
    # live time. The engine's FARs are per second of network live time, so that is T.
    # The engine may start searching before the nominal warm-up ends (its first rate
    # epoch is 60-120 s in); candidates and time are counted over the same stretch.
    searched = 0.0
    from_ns = 0
    if eng.t_start is not None:
        from_ns = eng.t_start + round(warmup_s(job.cfg) * NS_PER_S)
        searched = job.net.network_live_ns(from_ns, eng.bin_ns) / NS_PER_S
    rows = [
        CandRow(
            c.trigger,
            c.statistic,
            float(c.window_s),
            float(c.far_per_year),
            int(c.time_gps_ns),
            tuple(c.sites),
            tuple(int(x) for x in c.hit_times_ns),
        )
        for c in latest.values()
        if c.time_gps_ns >= from_ns
    ]
    return rows, searched, eng.counters.hits


def run_unit(job: Job, unit: SlidePlan | InjectionSetPlan, stop: _Flag | None) -> RunResult:
    """One time slide or one injection set."""
    t0, c0 = time.perf_counter(), time.process_time()
    if isinstance(unit, SlidePlan):
        rows, searched, n = replay_hits(job, slid_hits(job.net, unit), stop)
        res = RunResult("slide", unit.index, searched, rows, hits=n)
    else:
        hits, truths = apply_injections(job.net, unit, job.settings)
        rows, searched, n = replay_hits(job, hits, stop)
        res = RunResult("inject", unit.index, searched, rows, outcomes(truths, rows), hits=n)
        res.candidates = []  # only the outcomes are kept from injection runs
    res.cpu_s = time.process_time() - c0
    res.wall_s = time.perf_counter() - t0
    res.pid = os.getpid()
    return res


_WORKER: dict[str, Any] = {}


def _init_worker(job: Job, stop: Any) -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent decides when to stop
    _WORKER["job"] = job
    _WORKER["stop"] = stop


def _work(unit: SlidePlan | InjectionSetPlan) -> RunResult | None:
    try:
        return run_unit(_WORKER["job"], unit, _WORKER["stop"])
    except Interrupted:
        return None


def run_units(
    job: Job,
    units: Sequence[SlidePlan | InjectionSetPlan],
    *,
    jobs: int,
    on_done: Callable[[int, int], None] | None = None,
) -> list[RunResult]:
    """Run every unit, ``jobs`` at a time; results in the order given.

    ``on_done(done, total)`` is called as units finish. Ctrl-C (or SIGTERM) stops
    the workers and raises :class:`Interrupted`; nothing partial is returned.
    """
    if jobs < 1:
        raise ValueError(f"--jobs {jobs} must be at least 1")
    total = len(units)
    results: list[RunResult | None] = [None] * total
    done = 0
    old_term = signal.signal(signal.SIGTERM, _raise_interrupt)
    try:
        if jobs == 1:
            for k, u in enumerate(units):
                try:
                    results[k] = run_unit(job, u, None)
                except KeyboardInterrupt:
                    raise Interrupted(done, total) from None
                done += 1
                if on_done is not None:
                    on_done(done, total)
        else:
            done = _run_pool(job, units, jobs, results, on_done)
    finally:
        signal.signal(signal.SIGTERM, old_term)
    out = [r for r in results if r is not None]
    if len(out) != total:
        raise Interrupted(len(out), total)
    return out


def _raise_interrupt(signum: int, frame: object) -> None:
    raise KeyboardInterrupt


def _run_pool(
    job: Job,
    units: Sequence[SlidePlan | InjectionSetPlan],
    jobs: int,
    results: list[RunResult | None],
    on_done: Callable[[int, int], None] | None,
) -> int:
    ctx = multiprocessing.get_context("fork" if sys.platform == "linux" else "spawn")
    stop = ctx.Event()
    total = len(units)
    done = 0
    pool = ProcessPoolExecutor(
        max_workers=min(jobs, max(total, 1)),
        mp_context=ctx,
        initializer=_init_worker,
        initargs=(job, stop),
    )
    futures: dict[Future[RunResult | None], int] = {}
    try:
        futures = {pool.submit(_work, u): k for k, u in enumerate(units)}
        pending = set(futures)
        while pending:
            finished, pending = wait(pending, return_when=FIRST_COMPLETED)
            for f in finished:
                results[futures[f]] = f.result()
                done += 1
                if on_done is not None:
                    on_done(done, total)
    except KeyboardInterrupt:
        stop.set()
        for f in futures:
            f.cancel()
        pool.shutdown(wait=True, cancel_futures=True)
        raise Interrupted(done, total) from None
    except BaseException:
        stop.set()
        pool.shutdown(wait=True, cancel_futures=True)
        raise
    pool.shutdown(wait=True)
    return done
