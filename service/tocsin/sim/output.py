"""Write a simulation as a recording (contract §4) and its truth file.

The recording lists every batch in arrival order with its ``recv_ns``. Output is
byte-reproducible: gzip is written with no file name and a zero time stamp in
its header, and JSON with fixed key order. Both files are written to a
temporary name beside the target and renamed into place when complete.

The truth file (``REC.truth.json`` beside ``REC.jsonl.gz``) is JSON with the
seed, start (GPS ns and UTC), duration, lateness allowance and late fraction,
each site's base rate (Hz), every site's dead time ``[start_ns, end_ns)``, the
number of late batches, and one record per injection: kind, the spec text and
its parameters, ``t0_gps_ns`` (a front's time at the Earth's centre; a burst's
start), the sites used, and per front hit its site, ``t_ns``, geometric delay and
clock error (ns), elevation, batch seq and arrival; per burst site its count of
extra hits, the expected count and its live seconds in the burst.
"""

from __future__ import annotations

import gzip
import io
import os
from pathlib import Path
from typing import Any, Final

import orjson

from tocsin.gpstime import gps_ns_to_utc_iso
from tocsin.sim.simulation import Progress, Simulation
from tocsin.types import NS_PER_S

TRUTH_FORMAT: Final = "tocsin-sim-truth/1"
_CHUNK_LINES: Final = 4096


def truth_path_for(recording: str | Path) -> Path:
    """``REC.truth.json`` for ``REC.jsonl.gz`` or ``REC.jsonl``; other names are refused."""
    p = Path(recording)
    for suffix in (".jsonl.gz", ".jsonl"):
        if p.name.endswith(suffix) and len(p.name) > len(suffix):
            return p.with_name(p.name[: -len(suffix)] + ".truth.json")
    raise ValueError(f"recording name {str(p)!r} does not end in .jsonl or .jsonl.gz")


def write_recording(sim: Simulation, path: str | Path, *, progress: Progress | None = None) -> int:
    """Write every batch in arrival order; returns the number of lines."""
    p = Path(path)
    reg = sim.scenario.registry
    ids = reg.ids
    site_order, seq_order = sim.order()
    offsets = [st.offsets() for st in sim.streams]
    starts = [st.live_start.tolist() for st in sim.streams]
    ends = [st.live_end.tolist() for st in sim.streams]
    recv = [r.tolist() for r in sim.recv_ns]
    total = int(site_order.size)
    tmp = p.with_name(p.name + ".partial")
    with open(tmp, "wb") as raw:
        fh: gzip.GzipFile | io.BufferedWriter = (
            gzip.GzipFile(filename="", mode="wb", fileobj=raw, compresslevel=6, mtime=0)
            if p.suffix == ".gz"
            else raw
        )
        try:
            lines: list[bytes] = []
            for k, (i, j) in enumerate(zip(site_order.tolist(), seq_order.tolist(), strict=True)):
                st = sim.streams[i]
                obj = {
                    "v": 1,
                    "site": ids[i],
                    "seq": j,
                    "live": [starts[i][j], ends[i][j]],
                    "t": st.t[offsets[i][j] : offsets[i][j + 1]],
                    "recv_ns": recv[i][j],
                }
                lines.append(orjson.dumps(obj, option=orjson.OPT_SERIALIZE_NUMPY))
                if len(lines) == _CHUNK_LINES:
                    fh.write(b"\n".join(lines) + b"\n")
                    lines.clear()
                    if progress is not None:
                        progress((k + 1) / total)
            if lines:
                fh.write(b"\n".join(lines) + b"\n")
        finally:
            if fh is not raw:
                fh.close()
    os.replace(tmp, p)
    if progress is not None:
        progress(1.0)
    return total


def truth_record(sim: Simulation, recording_name: str) -> dict[str, Any]:
    """The truth file's content (plain JSON types)."""
    sc = sim.scenario
    reg = sc.registry
    return {
        "format": TRUTH_FORMAT,
        "recording": recording_name,
        "seed": sc.seed,
        "start_gps_ns": sc.start_ns,
        "start_utc": gps_ns_to_utc_iso(sc.start_ns),
        "duration_s": sc.duration_ns / NS_PER_S,
        "end_gps_ns": sc.end_ns,
        "lateness_s": sc.lateness_ns / NS_PER_S,
        "late_fraction": sc.late_fraction,
        "n_sites": len(reg),
        "n_batches": sim.n_batches,
        "n_hits": sim.n_hits,
        "late_batches": sum(int(sim.late_mask(i).sum()) for i in range(len(reg))),
        "site_rate_hz": {s.site_id: s.rate_hz for s in sc.sims},
        "dead_time": {
            reg.ids[st.site_index]: [
                [a, b] for a, b in zip(st.dead_start.tolist(), st.dead_end.tolist(), strict=True)
            ]
            for st in sim.streams
            if st.dead_start.size
        },
        "injections": list(sim.injections),
    }


def write_truth(sim: Simulation, recording: str | Path) -> Path:
    """Write the truth file beside ``recording``; returns its path."""
    path = truth_path_for(recording)
    data = orjson.dumps(truth_record(sim, Path(recording).name), option=orjson.OPT_INDENT_2)
    tmp = path.with_name(path.name + ".partial")
    tmp.write_bytes(data + b"\n")
    os.replace(tmp, path)
    return path
