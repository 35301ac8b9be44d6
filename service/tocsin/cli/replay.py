"""``tocsin replay``: run the trigger engine over a recording as fast as it can."""

from __future__ import annotations

import argparse
import contextlib
import gc
import sys
import time
from collections import Counter
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any

import orjson

from tocsin.alerts.archive import Archive
from tocsin.alerts.outbox import flush_directory
from tocsin.alerts.policy import AlertDesk
from tocsin.cli.main import COMMANDS
from tocsin.cli.progress import Progress, raw_position
from tocsin.engine.core import default_threads
from tocsin.io.journal import PREFIX as JOURNAL_PREFIX
from tocsin.io.journal import SUFFIX as JOURNAL_SUFFIX
from tocsin.io.journal import read_from, segments
from tocsin.io.recording import Rejected, join_lines, open_text, read_blocks
from tocsin.model.alert_config import load_alert_config
from tocsin.model.candidate import Candidate
from tocsin.model.config import load_engine_config
from tocsin.model.registry import SiteRegistry
from tocsin.pipeline import REPLAY_BLOCK_S, Pipeline
from tocsin.types import NS_PER_S

MAX_REJECT_LINES_SHOWN = 20


def add_parser(sub: Any) -> None:
    p = sub.add_parser(
        "replay",
        help=COMMANDS["replay"][1],
        description=(
            "Run the same trigger engine as the live service over a recording (one JSON hit "
            "batch per line, .gz allowed), as fast as it can. Writes DIR/candidates.jsonl, "
            "DIR/rejected.jsonl (every unusable line with its reason), DIR/summary.json, and "
            "the alerts the service would have sent: VOEvent packets in DIR/alerts/ and the "
            "archive DIR/alerts.sqlite (same policy and IVORNs as the live service; the "
            "config's [alerts] table, role 'test' by default). Prints a summary table."
        ),
    )
    p.add_argument(
        "recording",
        type=Path,
        help="recording file (.jsonl or .jsonl.gz), or the service's journal directory "
        "(DATA_DIR/journal: its segments in order)",
    )
    p.add_argument("--sites", type=Path, required=True, help="site registry (TOML)")
    p.add_argument(
        "--config",
        type=Path,
        help="Tocsin config (TOML); its [engine] and [alerts] tables are used",
    )
    p.add_argument(
        "--candidate-far",
        type=float,
        metavar="F",
        help="write every candidate with far_per_year <= F (per year), overriding the config",
    )
    p.add_argument("--out", type=Path, required=True, help="output directory (created)")
    p.add_argument("--quiet", action="store_true", help="no progress bar and no per-line reports")
    p.add_argument(
        "--threads",
        type=int,
        default=None,
        help="engine threads (default: the cores available, at most 4; same results)",
    )


def run(args: argparse.Namespace) -> int:
    if args.candidate_far is not None and not args.candidate_far > 0:
        raise ValueError(f"--candidate-far {args.candidate_far!r} must be a positive rate per year")
    source: Path = args.recording
    journal = source.is_dir()
    if journal:
        segs = segments(source)
        if not segs:
            raise FileNotFoundError(
                f"{str(source)!r} is a directory without journal segments "
                f"({JOURNAL_PREFIX}*{JOURNAL_SUFFIX})"
            )
        size = sum(seg.stat().st_size for seg in segs)
    elif source.is_file():
        size = source.stat().st_size
    else:
        raise FileNotFoundError(f"recording {str(source)!r} does not exist")
    registry = SiteRegistry.from_toml(args.sites)
    cfg = load_engine_config(args.config)
    alert_cfg = load_alert_config(args.config)
    if args.threads is not None and args.threads < 1:
        raise ValueError(f"--threads {args.threads!r} must be >= 1")
    pipe = Pipeline(
        registry,
        cfg,
        candidate_far_per_year=args.candidate_far,
        release_every_s=REPLAY_BLOCK_S,
        threads=args.threads or default_threads(),
    )
    out: Path = args.out
    out.mkdir(parents=True, exist_ok=True)
    for stale in ("alerts.sqlite", "alerts.sqlite-wal", "alerts.sqlite-shm"):
        (out / stale).unlink(missing_ok=True)
    archive = Archive(
        out / "alerts.sqlite", stream=alert_cfg.stream_ivorn, role=alert_cfg.role, durable=False
    )
    desk = AlertDesk(alert_cfg, archive, packet_dir=out / "alerts", mqtt=False)
    latest: dict[str, Candidate] = {}
    t0 = time.perf_counter()
    progress = Progress(size, enabled=not args.quiet, label="replay")
    shown = 0
    with (
        open(out / "candidates.jsonl", "wb") as cand_fh,
        open(out / "rejected.jsonl", "wb") as rej_fh,
        contextlib.ExitStack() as stack,
    ):
        blocks: Iterable[tuple[bytes, int]]
        position: Callable[[], int]
        if journal:
            lines, position = _journal_lines(source)
            blocks = join_lines(lines)
        else:
            fh = stack.enter_context(open_text(source, "rb"))
            blocks, position = read_blocks(fh), lambda: raw_position(fh)

        def emit(cands: list[Candidate]) -> None:
            for c in cands:
                cand_fh.write(c.to_json_line())
                latest[c.id] = c
                if desk.consider(c) is not None:
                    flush_directory(archive, out / "alerts")

        # What exists now (imported modules, the registry, the engine's tables) lives
        # to the end: kept out of the garbage collector's full passes, which would
        # otherwise visit it again and again while batches pile up between releases.
        gc.freeze()
        for fed in pipe.feed(blocks):
            for item in fed.rejected:
                rej_fh.write(orjson.dumps(_rej_obj(item)) + b"\n")
                if shown < MAX_REJECT_LINES_SHOWN and not args.quiet:
                    print(
                        f"line {item.line_no}: rejected ({item.reason}): "
                        f"{item.field}: {item.detail}",
                        file=sys.stderr,
                    )
                    shown += 1
            emit(fed.candidates)
            progress.update(position())
        emit(pipe.finish())
    progress.done()
    wall = time.perf_counter() - t0
    summary = _summary(pipe, latest, pipe.counters.batches, wall)
    alerts = archive.latest(limit=1_000_000)
    summary["alerts"] = dict(sorted(Counter(f"{a.kind}/{a.level}" for a in alerts).items()))
    summary["alerts_held"] = sum(a.status == "held" for a in alerts)
    archive.close()
    (out / "summary.json").write_bytes(orjson.dumps(summary, option=orjson.OPT_INDENT_2))
    print(_table(summary))
    return 0


def _journal_lines(directory: Path) -> tuple[Iterator[bytes], Callable[[], int]]:
    """The lines of a journal directory, oldest segment first (a torn last line is
    left out, as the service does), and a function giving the bytes read so far."""
    done = 0

    def lines() -> Iterator[bytes]:
        nonlocal done
        for line in read_from(directory, None):
            done += len(line) + 1
            yield line

    return lines(), lambda: done


def _rej_obj(r: Rejected) -> dict[str, Any]:
    return {"line": r.line_no, "reason": r.reason, "field": r.field, "detail": r.detail}


def _summary(
    pipe: Pipeline, latest: dict[str, Candidate], n_lines: int, wall: float
) -> dict[str, Any]:
    c = pipe.counters
    e = pipe.engine.counters
    by_kind: Counter[str] = Counter(f"{x.trigger}/{x.statistic}" for x in latest.values())
    best = min(latest.values(), key=lambda x: x.far_per_year, default=None)
    return {
        "lines": n_lines,
        "batches_accepted": c.accepted,
        "rejected": dict(sorted(c.rejected.items())),
        "sequence_gaps": c.new_gaps,
        "hits": e.hits,
        "live_site_hours": e.live_site_ns / NS_PER_S / 3600.0,
        "span_hours": (
            0.0
            if pipe.engine.t_start is None or pipe.engine.t_end is None
            else (pipe.engine.t_end - pipe.engine.t_start) / NS_PER_S / 3600.0
        ),
        "candidates": len(latest),
        "candidates_by_kind": dict(sorted(by_kind.items())),
        "decisions_merged": pipe.engine.merger.n_merged,
        "best": None if best is None else best.to_json_obj(),
        "wall_s": wall,
        "hits_per_s": e.hits / wall if wall > 0 else None,
    }


def _table(s: dict[str, Any]) -> str:
    rows = [
        ("lines read", f"{s['lines']:,}"),
        ("batches accepted", f"{s['batches_accepted']:,}"),
        ("batches rejected", f"{sum(s['rejected'].values()):,}"),
    ]
    rows += [(f"  {k}", f"{v:,}") for k, v in s["rejected"].items()]
    rows += [
        ("sequence gaps", f"{s['sequence_gaps']:,}"),
        ("hits used", f"{s['hits']:,}"),
        ("live site-hours", f"{s['live_site_hours']:.2f}"),
        ("candidates", f"{s['candidates']:,}"),
    ]
    rows += [(f"  {k}", f"{v:,}") for k, v in s["candidates_by_kind"].items()]
    b = s["best"]
    if b is not None:
        rows.append(
            (
                "most significant",
                f"{b['trigger']}/{b['statistic']} {b['time_utc']} "
                f"FAR {b['far_per_year']:.3g}/yr, {len(b['sites'])} sites",
            )
        )
    rows.append(
        ("alerts", f"{sum(s['alerts'].values()):,} ({s['alerts_held']} held by rate limit)")
    )
    rows += [(f"  {k}", f"{v:,}") for k, v in s["alerts"].items()]
    rows.append(("speed", f"{s['hits_per_s'] or 0:,.0f} hits/s ({s['wall_s']:.1f} s)"))
    w = max(len(r[0]) for r in rows)
    return "\n".join(f"{a:<{w}}  {b}" for a, b in rows)
