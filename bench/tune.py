"""Time slides per second of ``tocsin tune`` on the shipped scenario, on one and two cores.

Simulates the shipped 40-site network (``replay_data/network.toml``) as
``tocsin simulate`` does, plans the slides, then replays the same slides with
``--jobs 1`` and ``--jobs 2`` side by side in one run and prints slides per
second, the speed-up, and each worker's CPU time against the wall time (both
cores busy means two workers each with CPU close to the wall time).

With the default engine config the longest coincidence window is ~101 s; 40
sites each need their own slot of 1.2 x that, so the recording must hold ~83
minutes of live time, and dead time needs room on top: the default here is
2 hours. Usage::

    .venv/bin/python bench/tune.py [--hours 2] [--slides 2]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from collections import defaultdict
from pathlib import Path

from tocsin.gpstime import utc_to_gps_ns
from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry
from tocsin.sim import build_scenario, simulate, write_recording
from tocsin.tune import InjectionSettings, load_recording
from tocsin.tune.runner import Job, RunResult, run_units, warmup_s
from tocsin.tune.slides import plan_slides, trigger_windows
from tocsin.tune.study import FAR_MAX_COUNT, choose_step
from tocsin.types import NS_PER_S, SECONDS_PER_YEAR

SITES = Path(__file__).resolve().parents[1] / "replay_data" / "network.toml"


def _per_worker(results: list[RunResult]) -> str:
    cpu: dict[int, float] = defaultdict(float)
    for r in results:
        cpu[r.pid] += r.cpu_s
    return ", ".join(f"pid {pid}: {c:.1f} s CPU" for pid, c in sorted(cpu.items()))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--hours", type=float, default=2.0, help="length of the recording (h)")
    ap.add_argument("--slides", type=int, default=2, help="slides per measurement")
    ap.add_argument("--seed", type=int, default=2026)
    args = ap.parse_args()
    reg = SiteRegistry.from_toml(SITES)
    cfg = EngineConfig()
    with tempfile.TemporaryDirectory(prefix="tocsin-bench-tune-") as tmp:
        rec = Path(tmp) / "shipped.jsonl.gz"
        t0 = time.perf_counter()
        sc = build_scenario(
            reg,
            seed=args.seed,
            start_ns=utc_to_gps_ns("2026-03-14T00:00:00"),
            duration_ns=round(args.hours * 3600 * NS_PER_S),
        )
        write_recording(simulate(sc), rec)
        t_sim = time.perf_counter() - t0
        t0 = time.perf_counter()
        net = load_recording(rec, reg, cfg)
        t_load = time.perf_counter() - t0
    windows = trigger_windows(reg, cfg)
    step, guard = choose_step(net, windows, None)
    t0 = time.perf_counter()
    plans = plan_slides(net, n_slides=args.slides, step_ns=step, guard_ns=guard, seed=1)
    t_plan = time.perf_counter() - t0
    span_s = (net.end_ns - net.start_ns) / NS_PER_S
    t_years = args.slides * (span_s - warmup_s(cfg)) / SECONDS_PER_YEAR
    job = Job(net, cfg, FAR_MAX_COUNT / t_years, InjectionSettings())
    print(
        f"shipped scenario: {len(reg)} sites, {args.hours:g} h, {net.n_hits:,} hits, "
        f"{net.n_batches:,} batches (simulated in {t_sim:.1f} s, read in {t_load:.1f} s)"
    )
    print(
        f"slide step {step / NS_PER_S:g} s, separation kept > {guard / NS_PER_S:.2f} s; "
        f"{args.slides} slides planned and checked in {t_plan:.2f} s"
    )
    rates = {}
    for jobs in (1, 2):
        t0 = time.perf_counter()
        res = run_units(job, plans, jobs=jobs)
        wall = time.perf_counter() - t0
        rates[jobs] = args.slides / wall
        hits = sum(r.hits for r in res)
        print(
            f"--jobs {jobs}: {args.slides} slides in {wall:.1f} s wall = "
            f"{rates[jobs]:.4f} slides/s ({hits / wall:,.0f} hits/s); {_per_worker(res)}"
        )
    print(f"speed-up of --jobs 2 over --jobs 1: {rates[2] / rates[1]:.2f}x")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
