"""A tuning study: plan slides and injections, run them, measure, recommend.

:func:`run_study` is what ``tocsin tune`` does, without the files: it returns a
:class:`StudyResult` that :mod:`tocsin.tune.report` turns into the report.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from tocsin.model.config import EngineConfig
from tocsin.tune.far import CalibrationRow, FarCurve, calibration_rows, slide_curves, years
from tocsin.tune.injections import (
    CandRow,
    InjectionSetPlan,
    InjectionSettings,
    Outcome,
    plan_injections,
)
from tocsin.tune.recommend import Recommendation, recommend
from tocsin.tune.recorded import RecordedNetwork
from tocsin.tune.runner import Job, RunResult, run_units, warmup_s
from tocsin.tune.slides import SlidePlan, Windows, active_sites, plan_slides, trigger_windows
from tocsin.types import NS_PER_S

STEP_MARGIN = 1.2
"""The automatic step is this much longer than the window it must exceed (dead time
moves sites against each other; the exact check needs some room)."""
SPARE_SLOTS = 1.5
"""The automatic step leaves this many slots per site (when the live time allows), so
that sites can be placed away from each other's dead-time drift."""
CALIBRATION_COUNTS = (3.0, 30.0, 300.0)
FAR_MAX_COUNT = 1000.0
"""By default slide candidates are kept up to the FAR at which this many are expected."""
"""Expected accidental counts F x T at which measured and analytic rates are tabulated."""


@dataclass(frozen=True, slots=True)
class StudyOptions:
    """Settings of one study (see ``tocsin tune --help``)."""

    slides: int = 20
    step_s: float | None = None
    target_far_per_year: float = 1.0
    candidate_far_per_year: float | None = None
    seed: int = 1
    jobs: int = 2
    injections: InjectionSettings = field(default_factory=InjectionSettings)

    def __post_init__(self) -> None:
        if self.slides < 1:
            raise ValueError(f"--slides {self.slides} must be at least 1")
        if self.step_s is not None and not self.step_s > 0:
            raise ValueError(f"--step {self.step_s} must be > 0 s")
        if not self.target_far_per_year > 0:
            raise ValueError(f"--target-far {self.target_far_per_year} must be > 0 per year")
        if self.candidate_far_per_year is not None and not self.candidate_far_per_year > 0:
            raise ValueError(f"--candidate-far {self.candidate_far_per_year} must be > 0")
        if self.jobs < 1:
            raise ValueError(f"--jobs {self.jobs} must be at least 1")


@dataclass(slots=True)
class StudyResult:
    """Everything measured, for the report and the JSON summary."""

    net: RecordedNetwork
    cfg: EngineConfig
    options: StudyOptions
    windows: Windows
    step_ns: int
    guard_ns: int
    slides: list[SlidePlan]
    injection_sets: list[InjectionSetPlan]
    slide_results: list[RunResult]
    injection_results: list[RunResult]
    background_years: float
    candidate_far: float
    curves: list[FarCurve]
    calibration: list[CalibrationRow]
    recommendations: list[Recommendation]
    outcomes: list[Outcome]
    wall_s: float

    @property
    def slide_candidates(self) -> list[CandRow]:
        return [c for r in self.slide_results for c in r.candidates]

    @property
    def excess_scales_not_slid_apart(self) -> list[float]:
        """Excess windows (s) longer than the step: a real burst could reach them in
        a slide, so their slide background is not signal-free by construction."""
        return [w for w in self.cfg.excess.scales_s if w * NS_PER_S > self.guard_ns]


def choose_step(net: RecordedNetwork, windows: Windows, step_s: float | None) -> tuple[int, int]:
    """(step, guard) in ns. The guard is the separation every slide must keep: the
    longest window when the step exceeds it, else the longest coincidence window.

    The automatic step is as long as the shortest live time allows with
    :data:`SPARE_SLOTS` slots per site, between 1.2 x the longest coincidence
    window and 1.2 x the longest window of all."""
    if step_s is not None:
        step = round(step_s * NS_PER_S)
    else:
        active = active_sites(net)
        shortest = min(net.sites[i].live_ns for i in active) if active else 0
        fit = (shortest // math.ceil(SPARE_SLOTS * len(active) + 1)) // NS_PER_S * NS_PER_S
        step = min(
            _whole_s(windows.longest_ns * STEP_MARGIN),
            max(_whole_s(windows.coincidence_ns * STEP_MARGIN), fit),
        )
    guard = windows.longest_ns if step > windows.longest_ns else windows.coincidence_ns
    return step, guard


def _whole_s(ns: float) -> int:
    return math.ceil(ns / NS_PER_S) * NS_PER_S


def run_study(
    net: RecordedNetwork,
    cfg: EngineConfig,
    opts: StudyOptions,
    *,
    on_done: Callable[[int, int], None] | None = None,
) -> StudyResult:
    """Plan, run every slide and injection set, and analyse."""
    t0 = time.perf_counter()
    windows = trigger_windows(net.registry, cfg)
    step, guard = choose_step(net, windows, opts.step_s)
    slides = plan_slides(net, n_slides=opts.slides, step_ns=step, guard_ns=guard, seed=opts.seed)
    span_s = (net.end_ns - net.start_ns) / NS_PER_S
    t_years = years(opts.slides * max(0.0, span_s - warmup_s(cfg)))
    if not t_years > 0:
        raise ValueError(
            f"recording of {span_s:g} s is shorter than the warm-up of {warmup_s(cfg):g} s"
        )
    far_max = opts.candidate_far_per_year or max(
        FAR_MAX_COUNT / t_years, 100.0 * opts.target_far_per_year
    )
    inj = plan_injections(
        net,
        opts.injections,
        warmup_s=warmup_s(cfg),
        coincidence_window_s=windows.coincidence_ns / NS_PER_S,
        excess_window_s=windows.excess_ns / NS_PER_S,
        seed=opts.seed,
    )
    job = Job(net, cfg, far_max, opts.injections)
    units: list[SlidePlan | InjectionSetPlan] = [*slides, *inj]
    results = run_units(job, units, jobs=opts.jobs, on_done=on_done)
    slide_res = [r for r in results if r.kind == "slide"]
    inj_res = [r for r in results if r.kind == "inject"]
    # the searched time actually replayed (equal for every slide: same live time)
    t_years = years(sum(r.searched_s for r in slide_res))
    cands = [c for r in slide_res for c in r.candidates]
    outs = [o for r in inj_res for o in r.outcomes]
    curves = slide_curves(cands, t_years, far_max, len(slides))
    calib = calibration_rows(
        cands, t_years, [e for e in CALIBRATION_COUNTS if e / t_years <= far_max], len(slides)
    )
    recs = [
        recommend(trig, cands, t_years, far_max, opts.target_far_per_year, outs)
        for trig in ("coincidence", "excess")
    ]
    return StudyResult(
        net,
        cfg,
        opts,
        windows,
        step,
        guard,
        slides,
        inj,
        slide_res,
        inj_res,
        t_years,
        far_max,
        curves,
        calib,
        recs,
        outs,
        time.perf_counter() - t0,
    )
