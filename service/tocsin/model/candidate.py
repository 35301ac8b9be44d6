"""Candidate record (contract §5): one JSON object per trigger decision."""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, field
from typing import Any

import orjson
from scipy import stats

from tocsin.gpstime import gps_ns_to_utc_iso
from tocsin.types import GpsNs

METHOD_VERSION = "tocsin-engine/2"
"""Bumped whenever a statistic or false alarm rate is computed differently (2: partly-live
bins with live-clock offsets, FAR per second of network live time)."""


def sigma_from_p(p: float) -> float:
    """One-sided Gaussian equivalent of a p-value: ``norm.isf(p)`` (5 sigma <-> 2.87e-7)."""
    if p <= 0.0:
        return math.inf
    if p >= 1.0:
        return -math.inf
    return float(stats.norm.isf(p))


@dataclass(slots=True)
class Candidate:
    """A trigger decision. Times GPS ns; ``far_per_year`` per Julian year after all trials.

    ``statistic`` names which test produced it:
    ``front`` (sites consistent with one plane front), ``sites`` (distinct sites in
    geometry-aware slots), ``network`` (network-summed excess), ``site`` (one site's excess).
    """

    trigger: str
    statistic: str
    time_gps_ns: GpsNs
    window_s: float
    sites: list[str]
    p_value: float
    far_per_year: float
    multiplicity: int = 0
    observed: float | None = None
    expected: float | None = None
    ra_deg: float | None = None
    dec_deg: float | None = None
    err_deg: float | None = None
    hit_times_ns: list[GpsNs] = field(default_factory=list)
    details: dict[str, Any] = field(default_factory=dict)
    revision: int = 1
    id: str = ""

    def __post_init__(self) -> None:
        if not self.id:
            self.id = self.stable_id()

    def stable_id(self) -> str:
        """Deterministic id: same trigger, statistic, window, time and sites -> same id."""
        sites = ",".join(self.sites)
        key = f"{self.trigger}|{self.statistic}|{self.window_s!r}|{self.time_gps_ns}|{sites}"
        return (
            f"{self.trigger[0]}-{self.time_gps_ns}-{hashlib.sha256(key.encode()).hexdigest()[:10]}"
        )

    @property
    def significance_sigma(self) -> float:
        return sigma_from_p(self.p_value)

    def to_json_obj(self) -> dict[str, Any]:
        """The contract's fields plus Tocsin's own extras (``statistic``, ``method`` ...)."""
        obj: dict[str, Any] = {
            "id": self.id,
            "revision": self.revision,
            "trigger": self.trigger,
            "statistic": self.statistic,
            "time_gps_ns": int(self.time_gps_ns),
            "time_utc": gps_ns_to_utc_iso(self.time_gps_ns),
            "window_s": float(self.window_s),
            "sites": list(self.sites),
            "multiplicity": int(self.multiplicity),
            "observed": self.observed,
            "expected": self.expected,
            "p_value": float(self.p_value),
            "far_per_year": float(self.far_per_year),
            "significance_sigma": _finite(self.significance_sigma),
            "ra_deg": self.ra_deg,
            "dec_deg": self.dec_deg,
            "err_deg": self.err_deg,
            "method": METHOD_VERSION,
        }
        if self.hit_times_ns:
            obj["hit_times_ns"] = [int(x) for x in self.hit_times_ns]
        if self.details:
            obj["details"] = self.details
        return obj

    def to_json_line(self) -> bytes:
        return orjson.dumps(self.to_json_obj(), option=orjson.OPT_SERIALIZE_NUMPY) + b"\n"


def _finite(x: float) -> float | None:
    return x if math.isfinite(x) else None
