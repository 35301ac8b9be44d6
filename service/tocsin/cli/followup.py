"""``tocsin followup``: search a recording around an outside alert, as the service would.

The packet goes through the same safe parsing and the same follow-up desk as in
``tocsin serve`` (role and author rules from ``--config``'s ``[followup]`` table,
which defaults to accepting any author here, since the operator chose the file);
the recording goes through the same ordering stage into the same ring buffer.
Writes ``OUT/followups.jsonl`` and the answer packet ``OUT/<local id>.xml``.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

import orjson

from tocsin.alerts.external import ExternalRejected, parse_external
from tocsin.alerts.followup_desk import FollowupDesk
from tocsin.alerts.safexml import PacketRejected, XmlLimits
from tocsin.cli.followup_plot import plot_followup
from tocsin.cli.main import COMMANDS
from tocsin.cli.progress import Progress, raw_position
from tocsin.engine.targeted import TargetedResult
from tocsin.io.hitring import HitRing
from tocsin.io.recording import Rejected, decode_line, open_text
from tocsin.model.alert_config import load_alert_config
from tocsin.model.config import load_engine_config
from tocsin.model.followup_config import load_followup_config
from tocsin.model.registry import SiteRegistry
from tocsin.ordering import Orderer
from tocsin.types import NS_PER_S

_DESCRIPTION = """\
Search a recording around the time of an outside VOEvent packet (another
facility's alert) with the live service's targeted search: coincidences at every
window scale, a direction-aware coincidence when the packet gives a position,
and hit counts; p-value corrected for the window and scales from off-source
windows of the same recording; 90 % upper limits (Kraft, Burrows & Nousek 1991)
when nothing is significant. Writes OUT/followups.jsonl and the answer packet.
"""


def add_parser(sub: argparse._SubParsersAction[Any]) -> None:
    p = sub.add_parser(
        "followup",
        help=COMMANDS["followup"][1],
        description=_DESCRIPTION,
    )
    p.add_argument("packet", type=Path, metavar="PACKET.xml", help="outside VOEvent 2.0 packet")
    p.add_argument("--recording", required=True, type=Path, metavar="REC", help="recording")
    p.add_argument("--sites", required=True, type=Path, metavar="S.toml", help="site registry")
    p.add_argument(
        "--config",
        type=Path,
        default=None,
        metavar="C.toml",
        help="service config ([engine], [alerts], [followup] tables)",
    )
    p.add_argument("--out", type=Path, default=Path("followup-out"), metavar="DIR")
    p.add_argument("--plot", action="store_true", help="also write OUT/<local id>.png")
    p.add_argument("--quiet", action="store_true", help="no summary or progress")


def run(args: argparse.Namespace) -> int:
    if not args.packet.is_file():
        raise FileNotFoundError(f"packet {str(args.packet)!r} does not exist")
    if not args.recording.is_file():
        raise FileNotFoundError(f"recording {str(args.recording)!r} does not exist")
    registry = SiteRegistry.from_toml(args.sites)
    eng = load_engine_config(args.config)
    alert_cfg = load_alert_config(args.config)
    fcfg = load_followup_config(args.config)
    if args.config is None or not fcfg.authors:
        fcfg = fcfg.model_copy(update={"authors": ["*"]})
    if "test" not in fcfg.roles:  # an operator's own file: drills too
        fcfg = fcfg.model_copy(update={"roles": [*fcfg.roles, "test"]})
    data = args.packet.read_bytes()
    try:
        ev = parse_external(data, limits=XmlLimits(max_bytes=fcfg.max_packet_bytes))
    except (PacketRejected, ExternalRejected) as exc:
        raise ValueError(f"packet {str(args.packet)!r} refused: {exc}") from exc
    out: Path = args.out
    out.mkdir(parents=True, exist_ok=True)
    desk = FollowupDesk(
        fcfg, alert_cfg, registry, eng.coincidence, desk=None, jsonl=out / "followups.jsonl"
    )
    try:
        status = desk.offer(ev)
    except ExternalRejected as exc:
        raise ValueError(f"packet {str(args.packet)!r} not followed up: {exc}") from exc
    if status != "pending":
        raise ValueError(f"packet {str(args.packet)!r} is a {status}, not an event to search")
    ring = HitRing(len(registry), hours=10_000.0)
    orderer = Orderer(
        len(registry), lateness_ns=round(eng.lateness_s * NS_PER_S), quantum_ns=16 * NS_PER_S
    )
    n_rej = 0
    progress = Progress(args.recording.stat().st_size, enabled=not args.quiet, label="read")
    with open_text(args.recording, "rb") as fh:
        for k, raw in enumerate(fh, start=1):
            line = raw.strip()
            if not line:
                continue
            item = decode_line(line, registry, line_no=k)
            if isinstance(item, Rejected):
                n_rej += 1
                continue
            if orderer.offer(item).status == "accepted":
                blk = orderer.release()
                if blk is not None:
                    ring.add(blk)
            if k % 2000 == 0:
                progress.update(raw_position(fh))
    progress.done()
    blk = orderer.flush()
    if blk is not None:
        ring.add(blk)
    result: TargetedResult | None = None
    due = desk.due(ring.t_start, ring.t_end)
    key = ev.ivorn
    has_data = dict(due).get(key)
    if has_data is None:
        note = "the event time lies after the end of the recording (window not covered)"
        desk.answer(key, None, note=note)
    elif not has_data:
        desk.answer(key, None, note="the event time lies before the start of the recording")
    else:
        lo, hi = desk.span_needed(key, ring.t_start or 0)
        block = ring.block(lo, hi)
        if not args.quiet:
            print(
                f"searching {block.n_hits:,} hits over {(hi - lo) / NS_PER_S / 3600:.2f} h ...",
                file=sys.stderr,
            )
        result = desk.search(key, block)
        desk.answer(key, result)
    tracked = desk.tracked[key]
    packet = desk.last_packet
    assert packet is not None
    local = tracked.answers[-1].split("#", 1)[1]
    (out / f"{local}.xml").write_bytes(packet)
    if args.plot and result is not None:
        plot_followup(out / f"{local}.png", block, result, ev.ivorn)
    line = (out / "followups.jsonl").read_bytes().splitlines()[-1]
    rec = orjson.loads(line)
    if not args.quiet:
        best = rec.get("best") or {}
        print(f"outcome        {rec['outcome']}")
        if "p_value" in rec:
            print(
                f"p-value        {rec['p_value']:.3g} ({rec['p_value_calibration']}, "
                f"{rec['offsource_windows']} off-source windows)"
            )
            print(
                f"most signif.   {best.get('statistic')} at {best.get('scale_s')} s, "
                f"local p {best.get('local_p', 1.0):.3g}"
            )
            print(
                f"network UL 90% {rec['upper_limit_90']['network']:.4g} extra hits "
                f"(observed {rec['observed']['network']}, expected "
                f"{rec['expected']['network']:.4g})"
            )
        if rec["note"]:
            print(f"note           {rec['note']}")
        print(f"packet         {out / f'{local}.xml'}")
        if n_rej:
            print(f"recording lines rejected: {n_rej}", file=sys.stderr)
    return 0
