"""Candidates and configs for alert tests (fictional authority ``tocsin.example``)."""

from __future__ import annotations

from tocsin.model.alert_config import AlertConfig
from tocsin.model.candidate import Candidate
from tocsin.types import GpsNs

T0 = GpsNs(1_457_481_798_000_000_003)  # 2026-03-14T00:03:00.000000003 UTC


def front_candidate(
    *,
    far: float = 0.05,
    revision: int = 1,
    sites: int = 6,
    t_ns: int = T0,
    cid: str = "",
    skip: int = 0,
) -> Candidate:
    """A fitted front; ``skip`` leaves out the first hits (another seed of the cluster)."""
    names = [f"site-{k}" for k in range(skip, sites)]
    hits = [GpsNs(t_ns - 19_573_786 + 1_000_000 * k) for k in range(skip, sites)]
    c = Candidate(
        trigger="coincidence",
        statistic="front",
        time_gps_ns=hits[0],
        window_s=1e-6,
        sites=names,
        p_value=far * 1e-12,
        far_per_year=far,
        multiplicity=len(names),
        hit_times_ns=hits,
        ra_deg=149.99987774621263,
        dec_deg=35.000071900310026,
        err_deg=7.919361200686146e-05,
        details={
            "front_t0_gps_ns": int(t_ns),
            "front_t0_sigma_ns": 16.8,
            # semi-axes whose geometric mean is err_deg, position angle (deg)
            "err_ellipse_deg": [1.0519500614582204e-04, 5.961906760098045e-05, 131.3476],
        },
        revision=revision,
        id=cid,
    )
    return c


def excess_candidate(*, far: float = 100.0, t_ns: int = T0) -> Candidate:
    return Candidate(
        trigger="excess",
        statistic="network",
        time_gps_ns=GpsNs(t_ns),
        window_s=16.0,
        sites=["site-0", "site-1"],
        p_value=1e-9,
        far_per_year=far,
        multiplicity=2,
        observed=260.0,
        expected=180.5,
    )


def config(**kw: object) -> AlertConfig:
    return AlertConfig.model_validate({"authority": "tocsin.example", "stream": "alerts", **kw})
