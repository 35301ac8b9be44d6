"""Our answer to an outside alert: a VOEvent 2.0 packet citing it with ``cite="followup"``.

It carries the result of the targeted search (:mod:`tocsin.engine.targeted`) — a
detection with its corrected p-value, or 90 % upper limits on extra hits — or says
that the event time lies outside the data we hold. Parameter names are Tocsin's
own. Validated against the VOEvent 2.0 schema before it leaves :func:`build_followup`.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any, Literal

import voeventparse as vp
from lxml import etree

from tocsin.alerts.external import ExternalEvent
from tocsin.alerts.packet import (
    SYSTEM_TOPO,
    TEST_BANNER,
    AlertMeta,
    _citations,
    _el,
    _f,
    _finish,
    _p,
    _skeleton,
    add_where_when,
)
from tocsin.engine.targeted import TargetedResult
from tocsin.gpstime import gps_ns_to_utc_iso
from tocsin.model.alert_config import AlertConfig
from tocsin.model.candidate import METHOD_VERSION
from tocsin.types import NS_PER_S

Outcome = Literal["detection", "upper_limit", "no_data"]

METHOD_TEXT = (
    "Targeted search of Tocsin's own recent data around the cited event time: every hit a "
    "seed of the geometry-aware coincidence statistic at every window scale; when a direction "
    "is given, the same statistic on hits shifted by each site's plane-front delay, only sites "
    "with the source above their horizon; network and per-site hit counts in consecutive "
    "windows at several scales (randomised Poisson p-values). The smallest local p-value in "
    "the window is calibrated against the same search in off-source windows of equal length "
    "from the same data (rank with a random tie-break), or bounded by Sidak over the "
    "evaluations when no off-source window is as extreme. Upper limits: Kraft, Burrows and "
    "Nousek 1991 (ApJ 374, 344), 90 % confidence, background from the rate in the searched data."
)


@dataclass(frozen=True, slots=True)
class FollowupMeta:
    """What the answer is, apart from the search result."""

    ivorn: str
    created: dt.datetime
    outcome: Outcome
    before_s: float
    after_s: float
    note: str = ""


def build_followup(
    ext: ExternalEvent,
    result: TargetedResult | None,
    meta: FollowupMeta,
    cfg: AlertConfig,
) -> bytes:
    """A validated packet answering ``ext``; ``result`` is None when no data was searched."""
    if (result is None) != (meta.outcome == "no_data"):
        raise ValueError(f"outcome {meta.outcome!r} does not match result {result is not None}")
    v = _skeleton(AlertMeta(meta.ivorn, "new", "internal", meta.created), cfg)
    w = v.What
    w.append(_p("alert_kind", "followup", ucd="meta.code"))
    w.append(_p("external_ivorn", ext.ivorn, ucd="meta.ref.ivoid"))
    w.append(
        _p(
            "followup_outcome",
            meta.outcome,
            ucd="meta.code",
            desc="detection, upper_limit, or no_data (event time outside the data held)",
        )
    )
    w.append(_p("window_before", _f(meta.before_s), dtype="float", unit="s", ucd="time.interval"))
    w.append(_p("window_after", _f(meta.after_s), dtype="float", unit="s", ucd="time.interval"))
    if ext.time_gps_ns is not None:
        w.append(
            _p(
                "event_gps_ns",
                str(int(ext.time_gps_ns)),
                dtype="int",
                unit="ns",
                ucd="time.epoch",
                desc="the cited event's time, nanoseconds since the GPS epoch",
            )
        )
    if meta.note:
        w.append(_p("followup_note", meta.note[:1000]))
    if result is not None:
        _result_params(w, result)
    w.append(_p("method_version", METHOD_VERSION, ucd="meta.version"))
    if ext.time_gps_ns is not None:
        _where_when(v, ext)
    how = etree.SubElement(v, "How")
    _el(how, "Description", f"{METHOD_TEXT} Method version {METHOD_VERSION}.")
    why = etree.SubElement(v, "Why", importance="0.5" if meta.outcome == "detection" else "0.1")
    _el(why, "Name", f"Tocsin follow-up of {ext.ivorn}")
    _citations(v, ext.ivorn, "followup", "Search of Tocsin data around this event.")
    v.Description = _summary(ext, result, meta, cfg)
    return _finish(v)


def _result_params(w: Any, r: TargetedResult) -> None:
    w.append(
        _p(
            "p_value",
            _f(r.p_value),
            dtype="float",
            ucd="stat.probability",
            desc="chance probability of the most significant evaluation in the window, "
            "corrected for the window length, every scale and every statistic",
        )
    )
    w.append(_p("p_value_calibration", r.calibration, ucd="meta.code"))
    w.append(_p("p_value_offsource", _f(r.p_offsource), dtype="float"))
    w.append(_p("p_value_sidak", _f(r.p_analytic), dtype="float"))
    w.append(_p("offsource_windows", str(r.n_offsource), dtype="int", ucd="meta.number"))
    w.append(
        _p(
            "offsource_excluded",
            str(r.n_offsource_excluded),
            dtype="int",
            ucd="meta.number",
            desc="off-source windows left out because they hold a significant event",
        )
    )
    w.append(_p("evaluations", str(r.n_evaluations), dtype="int", ucd="meta.number"))
    w.append(_p("window_start_gps_ns", str(int(r.window_start)), dtype="int", unit="ns"))
    w.append(_p("window_end_gps_ns", str(int(r.window_end)), dtype="int", unit="ns"))
    w.append(_p("live_fraction", _f(r.live_fraction), dtype="float"))
    w.append(_p("statistics", ",".join(r.statistics), ucd="meta.code"))
    if r.visible_sites is not None:
        w.append(_p("visible_sites", ",".join(r.visible_sites), ucd="meta.id"))
    if r.best is not None:
        b = r.best
        params = [
            _p("best_statistic", b.kind, ucd="meta.code"),
            _p("best_scale", _f(b.scale_s), dtype="float", unit="s", ucd="time.interval"),
            _p("best_time_gps_ns", str(int(b.time_gps_ns)), dtype="int", unit="ns"),
            _p("best_local_p", _f(b.local_p), dtype="float", ucd="stat.probability"),
            _p("best_multiplicity", str(b.multiplicity), dtype="int", ucd="meta.number"),
        ]
        if b.site is not None:
            params.append(_p("best_site", b.site, ucd="meta.id"))
        if b.observed is not None:
            params.append(_p("best_observed_hits", str(b.observed), dtype="int", unit="ct"))
        w.append(vp.Group(params, name="most_significant"))
    for name, values, unit in (
        ("observed_hits", r.observed, "ct"),
        ("expected_hits", r.expected, "ct"),
        ("upper_limit_90", r.upper_limit_90, "ct"),
    ):
        ps = [
            _p(
                k,
                str(int(x)) if name == "observed_hits" else _f(float(x)),
                dtype="int" if name == "observed_hits" else "float",
                unit=unit,
            )
            for k, x in values.items()
        ]
        w.append(vp.Group(ps, name=name))


def _where_when(v: Any, ext: ExternalEvent) -> None:
    assert ext.time_gps_ns is not None
    pos = None
    if ext.ra_deg is not None and ext.dec_deg is not None:
        pos = (ext.ra_deg, ext.dec_deg, ext.err_deg if ext.err_deg is not None else 0.0)
    add_where_when(v, ext.time_gps_ns, SYSTEM_TOPO, position=pos)


def _summary(
    ext: ExternalEvent, r: TargetedResult | None, meta: FollowupMeta, cfg: AlertConfig
) -> str:
    prefix = TEST_BANNER if cfg.role == "test" else ""
    when = gps_ns_to_utc_iso(ext.time_gps_ns) if ext.time_gps_ns is not None else "unknown time"
    head = (
        f"{prefix}Tocsin follow-up of {ext.ivorn} ({when}), window -{meta.before_s:g} s "
        f"to +{meta.after_s:g} s: "
    )
    if r is None:
        return head + f"NO DATA. {meta.note}"
    if meta.outcome == "detection" and r.best is not None:
        return head + (
            f"DETECTION: {r.best.kind} statistic at scale {r.best.scale_s:g} s, "
            f"{gps_ns_to_utc_iso(r.best.time_gps_ns)}, p = {r.p_value:.3g} after trials "
            f"({r.calibration}). {meta.note}"
        )
    span = (r.window_end - r.window_start) / NS_PER_S
    return head + (
        f"nothing significant (p = {r.p_value:.3g} after trials). 90 % upper limit on extra "
        f"hits in the {span:g} s window, network-wide: {r.upper_limit_90.get('network', 0):.4g} "
        f"(observed {r.observed.get('network', 0)}, expected "
        f"{r.expected.get('network', 0.0):.4g}). {meta.note}"
    )
