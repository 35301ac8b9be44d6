"""``tocsin simulate``: write a recording of an invented network, with a truth file.

Option values are checked in :func:`run`; a bad one raises ``ValueError`` (or
``ConfigError`` for the registry) naming it, which the entry point turns into
exit code 2 with a one-line reason.
"""

from __future__ import annotations

import argparse
import math
from pathlib import Path
from typing import Any, Final

from tocsin.cli.main import COMMANDS
from tocsin.cli.progress import Progress
from tocsin.gpstime import gps_ns_to_utc_iso, utc_to_gps_ns
from tocsin.model.registry import SiteRegistry
from tocsin.sim.injspec import INJECT_SYNTAX, BurstSpec, InjectionSpec, parse_injection
from tocsin.sim.output import truth_path_for, write_recording, write_truth
from tocsin.sim.scenario import DEFAULT_LATE_FRACTION, LATENESS_S, build_scenario
from tocsin.sim.simulation import simulate
from tocsin.types import NS_PER_S

DEFAULT_START: Final = "2026-03-14T00:00:00Z"
DEFAULT_SEED: Final = 1
_STEPS: Final = 1000
MAX_HOURS: Final = 48.0
"""Longest span (h): the whole simulation is held in memory (~1.5 M hits per hour here)."""

_DESCRIPTION = """\
Simulate a network of detector sites and write what an aggregator would have
received: one hit batch per line, in arrival order, each with recv_ns. Every site
of the registry gets independent Poisson background hits with a slowly drifting
rate, random dead time, 1 s batches and a random network delay. Signals are added
with --inject. Beside REC.jsonl.gz (or REC.jsonl) a truth file REC.truth.json
lists the seed, the dead time and every injected hit. The same options and seed
give byte-identical files.
"""


def add_parser(sub: argparse._SubParsersAction[Any]) -> None:
    """Register ``simulate`` with the ``tocsin`` command's sub-parsers."""
    p = sub.add_parser(
        "simulate",
        help=COMMANDS["simulate"][1],
        description=_DESCRIPTION,
        epilog="injection syntax (--inject SPEC, repeatable):\n" + _indent(INJECT_SYNTAX),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument(
        "--sites",
        required=True,
        metavar="S.toml",
        help="site registry (TOML, [[site]] entries); e.g. replay_data/network.toml",
    )
    p.add_argument(
        "--hours",
        required=True,
        metavar="H",
        help=f"length of the recording in hours, > 0 and at most {MAX_HOURS:g} (0.1 = 6 min)",
    )
    p.add_argument(
        "--out",
        required=True,
        metavar="REC.jsonl.gz",
        help="recording to write (.jsonl.gz gzipped, or .jsonl); the truth file goes beside it",
    )
    p.add_argument(
        "--seed",
        default=str(DEFAULT_SEED),
        metavar="N",
        help=f"seed of every random choice, an integer in [0, 2**63) (default {DEFAULT_SEED})",
    )
    p.add_argument(
        "--inject",
        action="append",
        default=[],
        metavar="SPEC",
        help="add a signal (repeatable); see the syntax below",
    )
    p.add_argument(
        "--start",
        default=DEFAULT_START,
        metavar="ISO",
        help=f"UTC start of the recording, ISO 8601 (default {DEFAULT_START})",
    )
    p.add_argument(
        "--late-fraction",
        default=repr(DEFAULT_LATE_FRACTION),
        metavar="X",
        help=(
            "fraction of batches, in [0, 0.5], that arrive later than the engine's "
            f"{LATENESS_S:g} s lateness allowance (default {DEFAULT_LATE_FRACTION:g})"
        ),
    )
    p.add_argument(
        "--quiet",
        action="store_true",
        help="print neither progress nor the summary",
    )


def run(args: argparse.Namespace) -> int:
    """Simulate and write; returns 0. Bad values raise ``ValueError`` naming them."""
    hours = _float_option("--hours", args.hours)
    if not 0.0 < hours <= MAX_HOURS:
        raise ValueError(f"--hours {args.hours!r} is not in (0, {MAX_HOURS:g}]")
    seed_text = str(args.seed).strip()
    if not seed_text.isdigit() or int(seed_text) >= 2**63:
        raise ValueError(f"--seed {args.seed!r} is not an integer in [0, 2**63)")
    late = _float_option("--late-fraction", args.late_fraction)
    if not 0.0 <= late <= 0.5:
        raise ValueError(f"--late-fraction {args.late_fraction!r} is not in [0, 0.5]")
    try:
        start_ns = utc_to_gps_ns(args.start)
    except ValueError:
        raise ValueError(f"--start {args.start!r} is not an ISO 8601 UTC time") from None
    out = Path(args.out)
    try:
        truth = truth_path_for(out)
    except ValueError:
        raise ValueError(f"--out {args.out!r} must end in .jsonl.gz or .jsonl") from None
    if not out.parent.is_dir():
        raise ValueError(f"--out {args.out!r}: folder {str(out.parent)!r} does not exist")
    specs: list[InjectionSpec] = [parse_injection(s) for s in args.inject]
    registry = SiteRegistry.from_toml(args.sites)

    scenario = build_scenario(
        registry,
        seed=int(seed_text),
        start_ns=start_ns,
        duration_ns=round(hours * 3600 * NS_PER_S),
        late_fraction=late,
    )
    bar = Progress(_STEPS, enabled=not args.quiet, label="tocsin simulate")
    # generation is about a third of the work, writing the rest
    sim = simulate(scenario, specs, progress=lambda f: bar.update(round(f * _STEPS / 3)))
    n_lines = write_recording(
        sim, out, progress=lambda f: bar.update(round(_STEPS / 3 + f * 2 * _STEPS / 3))
    )
    write_truth(sim, out)
    bar.done()
    if not args.quiet:
        counts = [_injected_count(t) for t in sim.injections]
        late_batches = sum(int(sim.late_mask(i).sum()) for i in range(len(registry)))
        print(
            f"simulated {len(registry)} sites for {hours:g} h from "
            f"{gps_ns_to_utc_iso(start_ns)} (seed {scenario.seed})"
        )
        print(f"  batches     {n_lines} ({late_batches} late)")
        print(f"  hits        {sim.n_hits} ({sum(counts)} injected)")
        for spec, t, c in zip(specs, sim.injections, counts, strict=True):
            what = "extra hits" if isinstance(spec, BurstSpec) else "hits"
            print(f"  injection   {spec.text}: {len(t['sites'])} sites, {c} {what}")
        print(f"  recording   {out}")
        print(f"  truth       {truth}")
    return 0


def _injected_count(truth: dict[str, Any]) -> int:
    """Hits an injection added (a burst's truth counts per site, a front's lists each hit)."""
    if truth["kind"] == "burst":
        return sum(int(h["count"]) for h in truth["hits"])
    return len(truth["hits"])


def _float_option(name: str, text: str) -> float:
    try:
        x = float(text)
    except ValueError:
        raise ValueError(f"{name} {text!r} is not a number") from None
    if not math.isfinite(x):
        raise ValueError(f"{name} {text!r} is not a finite number")
    return x


def _indent(text: str) -> str:
    return "\n".join("  " + line if line else "" for line in text.rstrip().splitlines())
