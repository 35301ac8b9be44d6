"""The tuning report: one static HTML page with its plots embedded (base64 PNG),
plus the numbers as JSON and the recommended thresholds as a TOML snippet.

The page needs no server and no network: open ``report.html`` in any browser.
Files are written to temporary names and renamed into place only when all of
them are complete, so an interrupted run never leaves a report that looks whole.
"""

from __future__ import annotations

import base64
import html
import math
import os
from dataclasses import asdict
from pathlib import Path
from typing import Any

import orjson

from tocsin.gpstime import gps_ns_to_utc_iso
from tocsin.tune.far import threshold_grid
from tocsin.tune.plots import efficiency_figure, far_figure, rates_figure
from tocsin.tune.recommend import config_snippet
from tocsin.tune.study import StudyResult
from tocsin.types import NS_PER_S

REPORT = "report.html"
SUMMARY = "summary.json"
SNIPPET = "thresholds.toml"
BACKGROUND = "background.jsonl"

_CSS = """
body { font-family: system-ui, sans-serif; max-width: 1300px; margin: 2em auto; padding: 0 1em;
       color: #222; line-height: 1.45; }
h1 { font-size: 1.7em; } h2 { margin-top: 2em; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; margin: 0.8em 0; }
td, th { border: 1px solid #bbb; padding: 0.25em 0.6em; text-align: right; }
th { background: #eee; } td.l, th.l { text-align: left; }
img { max-width: 100%; border: 1px solid #ddd; }
pre { background: #f6f6f6; padding: 0.8em; border: 1px solid #ddd; overflow-x: auto; }
.how { background: #f3f7fb; border-left: 4px solid #5a8dc8; padding: 0.5em 1em; }
"""


def write_outputs(
    res: StudyResult, out: Path, *, recording: str, sites: str, config: str | None
) -> dict[str, Path]:
    """Write the report, the summary, the snippet and the slide candidates into ``out``."""
    out.mkdir(parents=True, exist_ok=True)
    source = f"{Path(recording).name} ({len(res.slides)} time slides)"
    snippet = config_snippet(res.recommendations, source)
    files = {
        SNIPPET: snippet.encode(),
        SUMMARY: orjson.dumps(
            summary(res, recording, sites, config),
            option=orjson.OPT_INDENT_2 | orjson.OPT_SERIALIZE_NUMPY,
        ),
        BACKGROUND: b"".join(
            orjson.dumps({"slide": r.index, **asdict(c)}) + b"\n"
            for r in res.slide_results
            for c in r.candidates
        ),
        REPORT: render(
            res, recording=recording, sites=sites, config=config, snippet=snippet
        ).encode(),
    }
    tmp = {name: out / f".{name}.partial" for name in files}
    try:
        for name, data in files.items():
            tmp[name].write_bytes(data)
        for name in files:
            os.replace(tmp[name], out / name)
    finally:
        for p in tmp.values():
            p.unlink(missing_ok=True)
    return {name: out / name for name in files}


def summary(res: StudyResult, recording: str, sites: str, config: str | None) -> dict[str, Any]:
    """The study's numbers as plain JSON types."""
    net = res.net
    return {
        "recording": recording,
        "sites": sites,
        "config": config,
        "n_sites": len(net.sites),
        "lines": net.n_lines,
        "batches": net.n_batches,
        "rejected": net.rejected,
        "hits": net.n_hits,
        "start_utc": gps_ns_to_utc_iso(net.start_ns),
        "span_s": (net.end_ns - net.start_ns) / NS_PER_S,
        "live_site_hours": float(net.live_ns.sum()) / NS_PER_S / 3600.0,
        "longest_coincidence_window_s": res.windows.coincidence_ns / NS_PER_S,
        "longest_excess_window_s": res.windows.excess_ns / NS_PER_S,
        "step_s": res.step_ns / NS_PER_S,
        "guard_s": res.guard_ns / NS_PER_S,
        "excess_windows_longer_than_guard_s": res.excess_scales_not_slid_apart,
        "slides": [
            {
                "index": p.index,
                "shift_s": [d / NS_PER_S for d in p.shift_ns],
                "min_separation_s": p.min_separation_ns / NS_PER_S,
                "redraws": p.redraws,
            }
            for p in res.slides
        ],
        "background_years": res.background_years,
        "candidate_far_per_year": res.candidate_far,
        "calibration": [asdict(r) for r in res.calibration],
        "far_curves": [
            {
                "trigger": c.trigger,
                "window_s": c.window_s,
                "thresholds_per_year": c.thresholds,
                "counts": c.counts,
            }
            for c in res.curves
        ],
        "recommendations": [asdict(r) for r in res.recommendations],
        "injections": [{**asdict(o), "best_far": _num(o.best_far)} for o in res.outcomes],
        "runs": [
            {
                "kind": r.kind,
                "index": r.index,
                "hits": r.hits,
                "cpu_s": r.cpu_s,
                "wall_s": r.wall_s,
                "pid": r.pid,
            }
            for r in (*res.slide_results, *res.injection_results)
        ],
        "jobs": res.options.jobs,
        "wall_s": res.wall_s,
    }


def _num(x: float) -> float | str | None:
    if math.isnan(x):
        return None
    return "inf" if math.isinf(x) else x


def _img(png: bytes, alt: str) -> str:
    data = base64.b64encode(png).decode("ascii")
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


def _table(head: list[str], rows: list[list[str]], left: int = 1) -> str:
    th = "".join(
        f'<th class="l">{html.escape(h)}</th>' if k < left else f"<th>{html.escape(h)}</th>"
        for k, h in enumerate(head)
    )
    body = "".join(
        "<tr>"
        + "".join(
            f'<td class="l">{html.escape(c)}</td>' if k < left else f"<td>{html.escape(c)}</td>"
            for k, c in enumerate(r)
        )
        + "</tr>"
        for r in rows
    )
    return f"<table><tr>{th}</tr>{body}</table>"


def render(
    res: StudyResult, *, recording: str, sites: str, config: str | None, snippet: str
) -> str:
    """The report page."""
    net = res.net
    o = res.options
    s = o.injections
    span_s = (net.end_ns - net.start_ns) / NS_PER_S
    n_inj = sum(1 for x in res.outcomes if not math.isnan(x.best_far))
    not_inj = sum(1 for x in res.outcomes if math.isnan(x.best_far))
    grid = threshold_grid(res.background_years, res.candidate_far)
    cpu = sum(r.cpu_s for r in (*res.slide_results, *res.injection_results))
    e = html.escape
    inputs = _table(
        ["input", "value"],
        [
            ["recording", recording],
            ["site registry", sites],
            ["engine config", config or "built-in defaults (deploy/tocsin.toml)"],
            ["sites / lines / hits", f"{len(net.sites)} / {net.n_lines:,} / {net.n_hits:,}"],
            ["start (UTC), span", f"{gps_ns_to_utc_iso(net.start_ns)}, {span_s / 3600:.2f} h"],
            ["live site-hours", f"{float(net.live_ns.sum()) / NS_PER_S / 3600:.2f}"],
            [
                "lines or batches not used",
                ", ".join(f"{k} {v}" for k, v in net.rejected.items()) or "none",
            ],
            [
                "longest coincidence window (scale + light time + clocks)",
                f"{res.windows.coincidence_ns / NS_PER_S:.3f} s",
            ],
            ["longest excess window", f"{res.windows.excess_ns / NS_PER_S:g} s"],
            [
                "slide step / separation kept between sites",
                f"{res.step_ns / NS_PER_S:g} s / > {res.guard_ns / NS_PER_S:.3f} s",
            ],
            [
                "time slides / background searched",
                f"{len(res.slides)} / {res.background_years * 365.25 * 24:.2f} h "
                f"({res.background_years:.4g} yr)",
            ],
            ["candidate threshold of every replay", f"far_per_year ≤ {res.candidate_far:.4g}"],
            [
                "injection sets / injections (not injectable)",
                f"{len(res.injection_sets)} / {n_inj} ({not_inj})",
            ],
            [
                "fronts: multiplicities × per class",
                f"{', '.join(str(n) for n in s.front_sites)} × {s.fronts_per_class}",
            ],
            [
                "bursts: strengths × per class, sites, duration",
                f"{', '.join(f'{b:g}' for b in s.burst_boosts)} × {s.bursts_per_class}, "
                f"{s.burst_sites} sites, {s.burst_dur_s:g} s",
            ],
            ["target false alarm rate (each trigger)", f"{o.target_far_per_year:g} per year"],
            ["seed / worker processes", f"{o.seed} / {o.jobs}"],
            ["time taken", f"{res.wall_s:.1f} s wall, {cpu:.1f} s CPU in the replays"],
        ],
    )
    long_excess = res.excess_scales_not_slid_apart
    warn = (
        f"<p><b>Note:</b> excess windows of {', '.join(f'{w:g} s' for w in long_excess)} are "
        f"longer than the separation kept between sites ({res.guard_ns / NS_PER_S:.1f} s): a "
        "real burst in the recording could add to them in a slide, so their slide background "
        "is signal-free only if the recording is. A longer recording allows a longer step.</p>"
        if long_excess
        else ""
    )
    calib = _table(
        ["trigger", "threshold F (per yr)", "expected F×T", "observed", "(obs − exp)/σ"],
        [
            [r.trigger, f"{r.threshold:.4g}", f"{r.expected:g}", str(r.observed), f"{r.z:+.2f}"]
            for r in res.calibration
        ],
    )
    rec_rows = []
    for r in res.recommendations:
        eff = (
            "; ".join(
                f"{int(x.value) if r.trigger == 'coincidence' else x.value:g}"
                f"{' sites' if r.trigger == 'coincidence' else '×'}: {x.found}/{x.injected}"
                for x in r.efficiency
            )
            or "no injections"
        )
        rec_rows.append(
            [
                r.trigger,
                f"{r.target_per_year:g}",
                f"{r.threshold_per_year:.4g}",
                r.method,
                str(r.accidentals_passing),
                f"{r.calibration_ratio:.3f} ± {r.calibration_ratio_err:.3f}",
                eff,
            ]
        )
    rec = _table(
        [
            "trigger",
            "target (per yr)",
            "recommended bound on far_per_year",
            "how",
            "slide accidentals passing",
            "measured / analytic rate",
            "found at the bound",
        ],
        rec_rows,
    )
    workers = sorted({r.pid for r in (*res.slide_results, *res.injection_results)})
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>Tocsin threshold tuning: {e(Path(recording).name)}</title>
<style>{_CSS}</style></head><body>
<h1>Threshold tuning report: {e(Path(recording).name)}</h1>
<p>Made by <code>tocsin tune</code>. How often does each trigger fire by chance on this
network, and what fraction of real signals would it catch? This page answers both from the
recording itself, by replaying it many times through the same trigger engine as the live
service and <code>tocsin replay</code>:</p>
<ul>
<li><b>Background by time slides.</b> Each site's hits are moved by a different multiple of
a {res.step_ns / NS_PER_S:g} s step of its own live time, wrapping round within that live
time, so shifted hits stay inside the site's live intervals and its dead time stays dead.
Every placement is checked exactly: wherever two sites are both live, they are displaced
against each other by more than {res.guard_ns / NS_PER_S:.3f} s, longer than the longest
coincidence window, so no real coincidence survives. Every candidate of a slide is an
accidental one. {len(res.slides)} slides give {res.background_years * 365.25 * 24:.1f} hours
of background.</li>
<li><b>Efficiency by injection.</b> Simulated signals are added to the unshifted recording
with the simulator's own injection code: plane fronts from random directions on
{e(", ".join(str(n) for n in s.front_sites))} GPS-timed sites, and bursts of extra hits at
{e(", ".join(f"{b:g}" for b in s.burst_boosts))} times the rate of {s.burst_sites} sites for
{s.burst_dur_s:g} s. A front counts as found when a coincidence candidate holds at least two
of its injected hits; a burst when an excess candidate overlaps it in time.</li>
<li><b>Recommendation.</b> For each trigger, the loosest bound on the engine's
<code>far_per_year</code> whose measured slide rate meets the target of
{o.target_far_per_year:g} per year.</li>
</ul>
{warn}
<h2>Inputs</h2>
{inputs}

<h2>Recommended thresholds</h2>
{rec}
<p>Ready to paste into the service config (also written as <code>{SNIPPET}</code>): a
candidate of that trigger becomes a public alert when its <code>far_per_year</code> is at
most the bound.</p>
<pre>{e(snippet)}</pre>
<p class="how"><b>How to read it.</b> "measured" means the slides hold enough background to
count the accidentals at the target directly; "extrapolated" means the target is rarer than
the slides can count, so the engine's own rate is used, corrected by the measured / analytic
ratio (1 for a perfectly calibrated engine). "found at the bound" is the number of injections
of each class caught at the recommended bound.</p>

<h2>False alarm rate: time slides against the engine</h2>
{_img(far_figure(res.curves, res.recommendations), "false alarm rate curves")}
<p class="how"><b>How to read it.</b> Top row: for each trigger, the rate of slide candidates
(accidental by construction) whose <code>far_per_year</code> is at most F, against F; error bars
are 1σ Poisson intervals (Gehrels 1986). The dashed line is the engine's analytic rate: if the
engine's false alarm rates are right, the points lie on it. Red lines mark the target and the
recommended bound. At the loosest thresholds accidental decisions come close enough in time to
merge into one candidate, so the points may fall a little below the line there. Bottom row:
the same, split by the window scale of each candidate (the scale of its best decision): where
the accidentals come from. Each scale alone lies below the line, because the engine's rate
counts every scale as a trial.</p>
{calib}
<p>Observed and expected numbers of slide candidates at thresholds where 3, 30 and 300 are
expected: a |z| above about 3 would mean the engine's rate is off. σ is Poisson, widened for the
excess trigger's single-site windows: a slide moves a site's data but does not change it, so each
slide sees the same single-site fluctuations again, and each such candidate counts as
{len(res.slides)} (the number of slides) in the variance; the same applies to the error bars
above.</p>

<h2>Efficiency: injected signals found</h2>
{_img(efficiency_figure(res.outcomes, res.recommendations, grid), "efficiency curves")}
<p class="how"><b>How to read it.</b> Each curve is one class of injected signal (left: plane
fronts by number of sites; right: bursts by strength, extra hits as a multiple of each site's
rate). It gives the fraction of those injections found by a candidate at or below the threshold
F on the horizontal axis. A looser threshold (to the right) finds more and fires more often by
chance; the red line is the recommended bound. Injections that found no suitable sites (e.g. too
few GPS-timed sites live and above the horizon) are left out: {not_inj} of them.</p>

<h2>Per-site rates and dead time</h2>
{_img(rates_figure(net), "per-site rates")}
<p class="how"><b>How to read it.</b> One panel per site: its hit rate in 60 s bins, counted
over live time only, against minutes since the start of the recording. Grey bands are dead time
(no accepted batch: outages, gaps and batches that arrived too late). Time slides move hits only
within the white parts.</p>

<h2>Runs</h2>
<p>{len(res.slide_results)} slide replays and {len(res.injection_results)} injection replays on
{len(workers)} worker process(es) (<code>--jobs {o.jobs}</code>); {res.wall_s:.1f} s wall time,
{cpu:.1f} s CPU in the replays. Numbers behind every plot are in <code>{SUMMARY}</code>; every
slide candidate is in <code>{BACKGROUND}</code>.</p>
</body></html>
"""


__all__ = ["render", "summary", "write_outputs"]
