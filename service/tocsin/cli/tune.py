"""``tocsin tune``: time-slide background, injection efficiency and recommended thresholds."""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from tocsin.cli.main import COMMANDS
from tocsin.cli.progress import Progress
from tocsin.model.config import load_engine_config
from tocsin.model.registry import SiteRegistry
from tocsin.tune import InjectionSettings, Interrupted, StudyOptions, load_recording, run_study
from tocsin.tune.report import REPORT, write_outputs

_DESCRIPTION = """\
Tune alert thresholds on a recording. The recording is replayed many times
through the same trigger engine as the live service: with every site shifted by
a different multiple of a step of its own live time (time slides: every
coincidence that survives is accidental), and with simulated plane fronts and
bursts added (injections: what fraction comes back). Writes DIR/report.html (a
static page with plots), DIR/thresholds.toml (per-trigger thresholds meeting
--target-far, ready to paste), DIR/summary.json and DIR/background.jsonl.
Nothing is written unless every replay finished; Ctrl-C stops the workers and
exits with code 1.
"""


def add_parser(sub: Any) -> None:
    p = sub.add_parser(
        "tune",
        help=COMMANDS["tune"][1],
        description=_DESCRIPTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("recording", type=Path, help="recording file (.jsonl or .jsonl.gz)")
    p.add_argument("--sites", type=Path, required=True, help="site registry (TOML)")
    p.add_argument("--config", type=Path, help="Tocsin config (TOML); its [engine] table is used")
    p.add_argument("--out", type=Path, required=True, help="output directory (created)")
    p.add_argument("--slides", type=int, default=20, help="number of time slides (default 20)")
    p.add_argument(
        "--step",
        type=float,
        metavar="S",
        help="slide step in seconds, longer than the longest coincidence window "
        "(default: as long as the live time allows, up to 1.2 x the longest window)",
    )
    p.add_argument(
        "--target-far",
        type=float,
        default=1.0,
        metavar="F",
        help="target false alarm rate per trigger, per year (default 1)",
    )
    p.add_argument(
        "--candidate-far",
        type=float,
        metavar="F",
        help="candidate threshold of every replay, per year (default: where 1000 "
        "accidentals are expected in all slides)",
    )
    p.add_argument(
        "--front-sites",
        default="3,4,5,6,8",
        metavar="N,N,...",
        help="multiplicities of the injected plane fronts (default 3,4,5,6,8)",
    )
    p.add_argument("--fronts", type=int, default=20, help="fronts per multiplicity (default 20)")
    p.add_argument(
        "--burst-strengths",
        default="0.003,0.01,0.03,0.1,0.3,1",
        metavar="X,X,...",
        help="extra hits of the injected bursts, as multiples of each site's rate "
        "(default 0.003,0.01,0.03,0.1,0.3,1)",
    )
    p.add_argument("--bursts", type=int, default=10, help="bursts per strength (default 10)")
    p.add_argument("--burst-sites", type=int, default=10, help="sites per burst (default 10)")
    p.add_argument(
        "--burst-duration",
        type=float,
        default=30.0,
        metavar="S",
        help="burst length in seconds (default 30)",
    )
    p.add_argument("--seed", type=int, default=1, help="seed of slides and injections")
    p.add_argument("--jobs", type=int, default=2, help="worker processes (default 2)")
    p.add_argument("--quiet", action="store_true", help="no progress display")


def _list(text: str, conv: Callable[[str], Any], name: str) -> tuple[Any, ...]:
    try:
        vals = tuple(conv(x) for x in text.split(",") if x.strip())
    except ValueError:
        raise ValueError(f"{name} {text!r} is not a comma-separated list of numbers") from None
    if not vals:
        raise ValueError(f"{name} {text!r} lists nothing")
    return vals


def run(args: argparse.Namespace) -> int:
    if not args.recording.is_file():
        raise FileNotFoundError(f"recording {str(args.recording)!r} does not exist")
    settings = InjectionSettings(
        front_sites=_list(args.front_sites, int, "--front-sites"),
        fronts_per_class=args.fronts,
        burst_boosts=_list(args.burst_strengths, float, "--burst-strengths"),
        bursts_per_class=args.bursts,
        burst_sites=args.burst_sites,
        burst_dur_s=args.burst_duration,
    )
    opts = StudyOptions(
        slides=args.slides,
        step_s=args.step,
        target_far_per_year=args.target_far,
        candidate_far_per_year=args.candidate_far,
        seed=args.seed,
        jobs=args.jobs,
        injections=settings,
    )
    registry = SiteRegistry.from_toml(args.sites)
    cfg = load_engine_config(args.config)

    def say(msg: str) -> None:
        if not args.quiet:
            print(msg, file=sys.stderr)

    t0 = time.perf_counter()
    net = load_recording(args.recording, registry, cfg)
    say(
        f"tune: {net.n_lines:,} lines, {net.n_hits:,} hits, "
        f"{float(net.live_ns.sum()) / 1e9 / 3600:.2f} live site-hours "
        f"({time.perf_counter() - t0:.1f} s to read)"
    )
    progress: Progress | None = None

    def on_done(done: int, total: int) -> None:
        nonlocal progress
        if progress is None:
            progress = Progress(total, enabled=not args.quiet, label="tune")
        progress.update(done, force=done == total)

    try:
        res = run_study(net, cfg, opts, on_done=on_done)
    except Interrupted as exc:
        print(
            f"tocsin tune: {exc}; workers stopped, nothing written to {str(args.out)!r}",
            file=sys.stderr,
        )
        return 1
    if progress is not None:
        progress.done()
    files = write_outputs(
        res,
        args.out,
        recording=str(args.recording),
        sites=str(args.sites),
        config=None if args.config is None else str(args.config),
    )
    for r in res.recommendations:
        print(
            f"{r.trigger:12s} bound far_per_year <= {r.threshold_per_year:.4g} "
            f"(target {r.target_per_year:g}/yr, {r.method})"
        )
    for row in res.calibration:
        print(
            f"calibration  {row.trigger:12s} F={row.threshold:.4g}/yr  expected "
            f"{row.expected:g}  observed {row.observed}"
        )
    print(
        f"slides {len(res.slides)} ({res.background_years * 8766:.1f} h of background), "
        f"injection sets {len(res.injection_sets)}, {res.wall_s:.1f} s on {opts.jobs} job(s)"
    )
    print(f"report       {files[REPORT]}")
    return 0
